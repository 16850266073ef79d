"""Fixed-effects design matrix from a Wilkinson-style formula, and group contrasts.

The formula's right-hand side is written as in R or statsmodels (``"1"``,
``"1 + group"``, ``"1 + group + age"``); columns of the runs table are its variables.
Text columns become treatment-coded factors. A column whose value is the same for every
run of an animal is an animal-level covariate; otherwise it is a run-level covariate.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass

import numpy as np
import pandas as pd
from formulaic import Formula, model_matrix

from grouplevel.errors import UserError


@dataclass(frozen=True)
class Design:
    """The design of one first-level contrast's runs.

    Attributes
    ----------
    matrix
        (n_runs, p) fixed-effects design.
    columns
        Coefficient names, e.g. ``Intercept``, ``group[T.sham]``.
    animal_level
        (p,) True for columns constant within every animal.
    animal
        (n_runs,) integer animal codes 0..m-1, in order of first appearance.
    animal_ids
        The m animal identifiers.
    """

    matrix: np.ndarray
    columns: tuple[str, ...]
    animal_level: np.ndarray
    animal: np.ndarray
    animal_ids: tuple[str, ...]

    @property
    def n_animals(self) -> int:
        return len(self.animal_ids)


def formula_variables(formula: str) -> list[str]:
    """The table columns a formula needs.

    Raises
    ------
    UserError
        When the formula cannot be parsed.
    """
    try:
        f = Formula(formula)
    except Exception as exc:  # formulaic raises its own parser errors
        raise UserError(f"[model] formula {formula!r} cannot be parsed: {exc}") from None
    return sorted(str(v) for v in f.required_variables)


def missing_variables(formula: str, columns: list[str]) -> list[str]:
    """Problems for variables the formula names that the table does not have."""
    problems = []
    for var in formula_variables(formula):
        if var not in columns:
            close = difflib.get_close_matches(var, columns, n=1, cutoff=0.6)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            problems.append(
                f"[model] formula names column '{var}', which the runs table does not have"
                f"{hint}; columns: {', '.join(columns)}"
            )
    return problems


def build_design(runs: pd.DataFrame, formula: str) -> Design:
    """Build the design matrix for the included runs of one first-level contrast.

    Parameters
    ----------
    runs
        Included runs, one row per run, with an ``animal`` column and every variable
        the formula names (no missing values).
    formula
        Right-hand side of a Wilkinson-style formula.

    Raises
    ------
    UserError
        When the design is rank-deficient, or leaves no between-animal degrees of
        freedom.
    """
    animal_ids = tuple(dict.fromkeys(runs["animal"].astype(str)))
    codes = {a: i for i, a in enumerate(animal_ids)}
    animal = np.array([codes[a] for a in runs["animal"].astype(str)], dtype=np.intp)
    data = runs.reset_index(drop=True)
    try:
        mm = model_matrix(formula, data, na_action="raise")
    except Exception as exc:
        raise UserError(f"[model] formula {formula!r} cannot be evaluated: {exc}") from None
    X = np.asarray(mm, dtype=float)
    columns = tuple(str(c) for c in mm.columns)
    if X.shape[1] == 0:
        raise UserError(f'[model] formula {formula!r} gives no columns; use "1" for the mean')
    rank = np.linalg.matrix_rank(X)
    if rank < X.shape[1]:
        raise UserError(
            f"[model] formula {formula!r}: the design is rank-deficient ({rank} independent "
            f"of {X.shape[1]} columns: {', '.join(columns)}); drop a redundant term"
        )
    # a column is animal-level when it takes one value within every animal
    animal_level = (pd.DataFrame(X).groupby(animal).nunique() <= 1).all(axis=0).to_numpy()
    between = X[:, animal_level]
    if between.shape[1]:
        # one row per animal carries the animal-level design
        first = np.array([np.flatnonzero(animal == a)[0] for a in range(len(animal_ids))])
        rank_between = np.linalg.matrix_rank(between[first])
        if rank_between < between.shape[1]:
            names = [c for c, b in zip(columns, animal_level, strict=True) if b]
            raise UserError(
                f"[model] formula {formula!r}: the animal-level columns ({', '.join(names)}) "
                "are rank-deficient across animals; an animal-level covariate must differ "
                "between animals and not be confounded with another"
            )
        if len(animal_ids) - rank_between < 1:
            raise UserError(
                f"[model] formula {formula!r}: {len(animal_ids)} animals leave no "
                f"between-animal degrees of freedom for {rank_between} animal-level columns; "
                "add animals or simplify the formula"
            )
    return Design(
        matrix=X,
        columns=columns,
        animal_level=animal_level,
        animal=animal,
        animal_ids=animal_ids,
    )


def contrast_vector(weights: dict[str, float], columns: tuple[str, ...], name: str) -> np.ndarray:
    """Turn a contrast's weights (coefficient name → weight) into a vector.

    Raises
    ------
    UserError
        When a weight names a coefficient the design does not have.
    """
    c = np.zeros(len(columns))
    problems = []
    for coef, w in weights.items():
        if coef not in columns:
            close = difflib.get_close_matches(coef, list(columns), n=1, cutoff=0.5)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            problems.append(
                f"contrast '{name}': weight on '{coef}', which is not a coefficient of the "
                f"design{hint}; coefficients: {', '.join(columns)}"
            )
        else:
            c[columns.index(coef)] = w
    if len(problems) == 1:
        raise UserError(problems[0])
    if problems:
        raise UserError(f"contrast '{name}': {len(problems)} problems", problems)
    return c
