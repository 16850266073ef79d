"""Fixed-effects design matrix from a Wilkinson-style formula, and group contrasts.

The formula's right-hand side is written as in R or statsmodels (``"1"``,
``"1 + genotype"``, ``"1 + genotype + center(dose)"``); columns of the runs table are its
variables. Text columns become treatment-coded factors whose reference level is the
first in alphabetical order unless ``[model] reference`` names another. Numeric columns
named directly in the formula are centred at their mean over animals unless
``[model] center_covariates = false``; ``center(x)`` and ``scale(x)`` centre (and scale)
at the mean over runs. A column whose value is the same for every run of an animal is
an animal-level covariate; otherwise it is session- or run-level (:func:`variable_levels`).

Default group contrasts are built on a reference grid: the design row of each group
(every combination of factor levels) with every covariate at its centre. A contrast
is named after what it tests (``mean``, ``mean-ko``, ``ko-minus-wt``, ``mean-over-groups``,
``dose-slope``; see docs/model.md), and one that would depend on where an uncentred
covariate is evaluated is left out rather than given a misleading name.

Every design column has a level: the highest level of the nesting run ⊂ session ⊂
animal at which it is constant.

* **animal**: one value within every animal (a group, an age);
* **session**: one value within every session, but different sessions of one animal
  differ (a drug given on one day, vehicle on another);
* **run**: varies between runs of one session (a condition alternated run by run, a
  run's motion).

Session and run columns are *within-animal* columns. The random-effects structure that
follows from the levels (random slopes, a session level, per-group between-animal
variances) is chosen by :func:`random_effects` from the ``[model]`` settings.
"""

from __future__ import annotations

import ast
import difflib
import itertools
import re
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from formulaic import Formula, model_matrix
from formulaic.transforms import TRANSFORMS

from grouplevel.errors import UserError

# Names a formula may call without them being table columns: formulaic's transforms
# (center, scale, C, contr, np, log ...).
_FORMULA_FUNCTIONS = frozenset(TRANSFORMS)
# Transforms that keep a covariate linear and centred (formulaic's stateful transforms).
_CENTRING_TRANSFORMS = ("center", "scale", "standardize")
# Characters kept in a contrast name built from the data (it becomes a folder name).
_UNSAFE = re.compile(r"[^A-Za-z0-9._+-]+")
# Relative tolerance when comparing reference-grid rows (exact arithmetic up to rounding).
_GRID_TOL = 1e-9


@dataclass(frozen=True)
class Factor:
    """A factor of the design and its levels (reference level first).

    ``animals`` counts the animals with runs at each level (an animal counts in every
    level it has runs at when the factor varies within animals).
    """

    variable: str
    term: str  # as it appears in the coefficient names: ``genotype`` or ``C(dose)``
    levels: tuple[str, ...]
    reference: str
    animals: tuple[int, ...]


@dataclass(frozen=True)
class Covariate:
    """A numeric variable of the formula and where the intercept sits on it."""

    variable: str
    centring: str  # plain words: how (and whether) it is centred
    centre: float | None  # the (raw) value the default contrasts are evaluated at; None:
    # not centred (the intercept is the response at 0)


@dataclass(frozen=True)
class GroupContrast:
    """A group contrast: its name, weights on the design columns, and what it tests."""

    name: str
    weights: np.ndarray
    meaning: str


@dataclass(frozen=True)
class GroupFTest:
    """An F-test of several group contrasts at once.

    ``rows`` names the contrasts tested jointly and ``weights`` is their (q, p) matrix;
    ``meaning`` says in plain words what a significant F shows.
    """

    name: str
    rows: tuple[str, ...]
    weights: np.ndarray
    meaning: str
    declared: bool = False  # an [[ftest]] block (else a default of the design)


# Suffix of the default F-test of a factor with more than two levels: all its
# differences from the reference level at once (docs/model.md, "F-tests").
FTEST_SUFFIX = "any-difference"


@dataclass(frozen=True)
class Design:
    """The design of one first-level contrast's runs.

    Attributes
    ----------
    matrix
        (n_runs, p) fixed-effects design.
    columns
        Coefficient names, e.g. ``Intercept``, ``genotype[T.wt]``.
    animal_level
        (p,) True for columns constant within every animal.
    animal
        (n_runs,) integer animal codes 0..m-1, in order of first appearance.
    animal_ids
        The m animal identifiers.
    factors, covariates
        The formula's factors (levels, reference, animals per level) and numeric
        variables (how they are centred).
    default_contrasts
        Contrasts named after what they test (used when the study defines none).
    default_ftests
        For every factor with more than two levels, the F-test of all its differences
        from the reference level at once, named ``<variable>-any-difference``.
    left_out
        Default contrasts that could not be named honestly, with the reason.
    variable_levels
        Each formula variable's level: ``"animal"``, ``"session"`` or ``"run"``.
    session
        (n_runs,) integer session codes 0..s-1, unique across animals (sessions are
        nested in animals: session "1" of two animals are two sessions). Runs without a
        session label form one session per animal.
    session_ids
        The s sessions as ``"<animal>/<session>"``.
    level
        (p,) ``"animal"``, ``"session"`` or ``"run"`` per column (see the module notes).
    column_variables
        (p,) the formula variables of each column's term (empty for the intercept).
    """

    matrix: np.ndarray
    columns: tuple[str, ...]
    animal_level: np.ndarray
    animal: np.ndarray
    animal_ids: tuple[str, ...]
    session: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.intp))
    session_ids: tuple[str, ...] = ()
    level: tuple[str, ...] = ()
    column_variables: tuple[frozenset[str], ...] = ()
    factors: tuple[Factor, ...] = ()
    covariates: tuple[Covariate, ...] = ()
    default_contrasts: tuple[GroupContrast, ...] = ()
    left_out: tuple[str, ...] = ()
    variable_levels: dict[str, str] = field(default_factory=dict)
    # one F-test per factor with more than two levels (see :func:`default_ftests`)
    default_ftests: tuple[GroupFTest, ...] = ()

    @property
    def n_animals(self) -> int:
        return len(self.animal_ids)

    @property
    def n_sessions(self) -> int:
        return len(self.session_ids)

    @property
    def within(self) -> np.ndarray:
        """(p,) True for within-animal (session- or run-level) columns."""
        return np.array([lv != "animal" for lv in self.level], dtype=bool)

    def columns_at(self, level: str) -> list[str]:
        """Names of the columns at one level."""
        return [c for c, lv in zip(self.columns, self.level, strict=True) if lv == level]


def _parse(formula: str) -> Formula:
    try:
        return Formula(formula)
    except Exception as exc:  # formulaic raises its own parser errors
        raise UserError(f"[model] formula {formula!r} cannot be parsed: {exc}") from None


def _names_in(expr: str) -> set[str]:
    """Variable names an expression reads (called functions and attributes excluded)."""
    try:
        tree = ast.parse(expr, mode="eval")
    except SyntaxError:
        return set()
    called = {id(node.func) for node in ast.walk(tree) if isinstance(node, ast.Call)} | {
        id(node.value) for node in ast.walk(tree) if isinstance(node, ast.Attribute)
    }
    return {
        node.id for node in ast.walk(tree) if isinstance(node, ast.Name) and id(node) not in called
    }


def _factors_of(f: Formula):
    for term in f:
        yield from term.factors


def formula_variables(formula: str) -> list[str]:
    """The table columns a formula needs.

    formulaic's own ``required_variables`` leaves out the arguments of its stateful
    transforms (``center(dose)`` needs ``dose``), so the variables are read from every
    factor's expression instead.

    Raises
    ------
    UserError
        When the formula cannot be parsed.
    """
    f = _parse(formula)
    names = {str(v) for v in f.required_variables}
    for factor in _factors_of(f):
        names |= _names_in(str(factor.expr))
    return sorted(names - _FORMULA_FUNCTIONS - {"True", "False", "None"})


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


def variable_levels(
    table: pd.DataFrame, variables: list[str], animal: str = "animal", session: str = "session"
) -> dict[str, str]:
    """The level at which each variable varies: ``"animal"``, ``"session"`` or ``"run"``.

    A variable is animal-level when it takes one value within every animal,
    session-level when it takes one value within every session of an animal (and the
    table has sessions), else run-level.
    """
    out = {}
    has_sessions = session in table.columns and (table[session].astype(str) != "").any()
    for var in variables:
        if var not in table.columns:
            continue
        if (table.groupby(animal, sort=False)[var].nunique() <= 1).all():
            out[var] = "animal"
        elif (
            has_sessions
            and (table.groupby([animal, session], sort=False)[var].nunique() <= 1).all()
        ):
            out[var] = "session"
        else:
            out[var] = "run"
    return out


def _level_text(value) -> str:
    if isinstance(value, float | np.floating):
        return f"{float(value):g}"
    return str(value)


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _safe(text: str) -> str:
    """A piece of a contrast name that is safe in a folder name (ASCII, no separators)."""
    return _UNSAFE.sub("_", text).strip("._") or "level"


def _variable_of_factor(expr: str, columns: list[str]) -> str | None:
    """The one table column a categorical factor (``genotype``, ``C(dose, ...)``) reads."""
    if expr in columns:
        return expr
    names = [n for n in _names_in(expr) if n in columns]
    return names[0] if len(names) == 1 else None


def _apply_reference(
    data: pd.DataFrame, reference: dict[str, str], variables: list[str], text_vars: list[str]
) -> None:
    """Order each text variable's levels with its reference level first."""
    for var, level in reference.items():
        if var not in data.columns or var not in variables:
            raise UserError(
                f"[model] reference names '{var}', which the formula does not use; "
                f"text columns of the formula: {', '.join(text_vars) or 'none'}"
            )
        if var not in text_vars:
            raise UserError(
                f"[model] reference.{var}: '{var}' is numeric, not a factor; to treat it "
                f"as one write C({var}) in the formula and use C({var}, contr.treatment(...))"
            )
        levels = sorted(str(v) for v in data[var].unique())
        if level not in levels:
            raise UserError(
                f"[model] reference.{var} = {level!r} is not a level of '{var}'; "
                f"levels: {', '.join(levels)}"
            )
        data[var] = pd.Categorical(
            data[var].astype(str), categories=[level] + [v for v in levels if v != level]
        )


def _categorical_variables(f: Formula) -> set[str]:
    """Variables made factors by the formula: the first argument of ``C(...)``."""
    out = set()
    for factor in _factors_of(f):
        try:
            tree = ast.parse(str(factor.expr), mode="eval")
        except SyntaxError:
            continue
        for node in ast.walk(tree):
            if (
                isinstance(node, ast.Call)
                and isinstance(node.func, ast.Name)
                and node.func.id == "C"
                and node.args
            ):
                out |= _names_in(ast.unparse(node.args[0]))
    return out


def _plain_and_transformed(f: Formula) -> tuple[set[str], set[str], set[str]]:
    """Variables named directly, inside center()/scale(), and inside other expressions."""
    plain, centring, other = set(), set(), set()
    for factor in _factors_of(f):
        expr = str(factor.expr)
        if factor.eval_method.value == "lookup":
            plain.add(expr)
            continue
        try:
            node = ast.parse(expr, mode="eval").body
        except SyntaxError:
            continue
        names = _names_in(expr)
        if (
            isinstance(node, ast.Call)
            and isinstance(node.func, ast.Name)
            and node.func.id in _CENTRING_TRANSFORMS
            and len(node.args) == 1
            and isinstance(node.args[0], ast.Name)
        ):
            centring |= names
        else:
            other |= names
    return plain, centring, other


def _centre_covariates(
    data: pd.DataFrame, animal: np.ndarray, numeric: list[str], plain: set[str], enabled: bool
) -> dict[str, float]:
    """Centre numeric variables named directly in the formula at their mean over animals.

    Each animal counts once (its mean value over its runs), so an animal with more runs
    does not pull the centre: the intercept is the mean response at the average animal's
    covariate value.
    """
    centres = {}
    if not enabled:
        return centres
    for var in sorted(plain & set(numeric)):
        values = data[var].to_numpy(dtype=float)
        per_animal = pd.Series(values).groupby(animal).mean()
        centres[var] = float(per_animal.mean())
        data[var] = values - centres[var]
    return centres


def _factor_list(spec, data: pd.DataFrame, animal: np.ndarray) -> tuple[list[Factor], list]:
    """The design's categorical factors (from formulaic's encoder state) and raw levels."""
    factors, raw_levels = [], []
    for term, (kind, state) in spec.encoder_state.items():
        if getattr(kind, "value", kind) != "categorical":
            continue
        variable = _variable_of_factor(str(term), list(data.columns))
        if variable is None:
            raise _NoGrid(f"the factor {term} does not read exactly one table column")
        levels = list(state.get("categories", []))
        coding = state.get("contrasts")
        base = getattr(getattr(coding, "contrasts", None), "base", None)
        texts = [_level_text(v) for v in levels]
        ref = _level_text(base) if base is not None and _level_text(base) in texts else texts[0]
        order = [texts.index(ref)] + [i for i, t in enumerate(texts) if t != ref]
        column = data[variable].astype(object).map(_level_text).to_numpy()
        counts = tuple(len(set(animal[column == texts[i]])) for i in order)
        factors.append(
            Factor(
                variable=variable,
                term=str(term),
                levels=tuple(texts[i] for i in order),
                reference=ref,
                animals=counts,
            )
        )
        raw_levels.append([levels[i] for i in order])
    return factors, raw_levels


class _NamedContrasts(dict):
    """name -> (weights, meaning); a name that is taken gets a number (levels whose
    folder-safe spellings coincide, e.g. ``a b`` and ``a_b``)."""

    def __init__(self) -> None:
        super().__init__()
        self.differences: dict[str, list[str]] = {}  # factor -> its difference contrasts

    def __setitem__(self, name: str, value: tuple[np.ndarray, str]) -> None:
        unique, k = name, 2
        while unique in self:
            unique, k = f"{name}-{k}", k + 1
        super().__setitem__(unique, value)


class _NoGrid(Exception):
    """The reference grid cannot be built (the reason is its message)."""


def _grid(spec, columns, factors, raw_levels, data, values: dict[str, float]):
    """Design rows of every factor-level combination with covariates at ``values``."""
    cells = list(itertools.product(*raw_levels)) if factors else [()]
    new: dict[str, object] = {}
    for k, f in enumerate(factors):
        col = [cell[k] for cell in cells]
        if isinstance(data[f.variable].dtype, pd.CategoricalDtype):
            col = pd.Categorical(col, categories=data[f.variable].cat.categories)
        new[f.variable] = col
    for var, v in values.items():
        new[var] = np.full(len(cells), v, dtype=float)
    try:
        mm = spec.get_model_matrix(pd.DataFrame(new, index=pd.RangeIndex(len(cells))))
    except Exception as exc:  # formulaic evaluation errors on the grid
        raise _NoGrid(f"the design cannot be evaluated on a reference grid ({exc})") from None
    if tuple(str(c) for c in mm.columns) != columns:
        raise _NoGrid("the reference grid gives other columns than the design")
    return cells, np.asarray(mm, dtype=float)


def _contrasts_at(spec, columns, factors, raw_levels, data, values, slopes, where: str):
    """Named contrasts with the covariates at ``values``: name -> (weights, meaning)."""
    cells, L = _grid(spec, columns, factors, raw_levels, data, values)
    out = _NamedContrasts()
    for k, f in enumerate(factors):
        # the variable is part of the name with several factors, or numeric levels
        # ("mean-dose-2" rather than "mean-2")
        bare = len(factors) == 1 and not any(_is_number(lv) for lv in f.levels)
        prefix = "" if bare else f"{_safe(f.variable)}-"
        rows = {}
        for j, level in enumerate(raw_levels[k]):
            pick = [i for i, cell in enumerate(cells) if cell[k] == level]
            rows[f.levels[j]] = L[pick].mean(axis=0)
        for level, row in rows.items():
            out[f"mean-{prefix}{_safe(level)}"] = (row, f"mean of {f.variable} = {level}{where}")
        differences = []
        for level in f.levels[1:]:
            out[f"{prefix}{_safe(level)}-minus-{_safe(f.reference)}"] = (
                rows[level] - rows[f.reference],
                f"{f.variable} {level} minus {f.reference}{where}",
            )
            differences.append(next(reversed(out)))  # the name given (made unique)
        out.differences[f.variable] = differences
    if factors:
        groups = " and ".join(f.variable for f in factors)
        out["mean-over-groups"] = (
            L.mean(axis=0),
            f"mean over the {groups} groups, each weighted equally{where}",
        )
    else:
        out["mean"] = (L[0], f"group mean{where}")
    for var in slopes:
        _, L1 = _grid(spec, columns, factors, raw_levels, data, {**values, var: values[var] + 1})
        avg = " (averaged over groups, each weighted equally)" if factors else ""
        out[f"{_safe(var)}-slope"] = ((L1 - L).mean(axis=0), f"change per unit of {var}{avg}")
    return out


def _covariate_list(
    f: Formula, data: pd.DataFrame, numeric: list[str], centres: dict[str, float]
) -> tuple[list[Covariate], dict[str, float], list[str], list[str]]:
    """Covariates, where the grid puts them, which are uncentred, which enter linearly."""
    plain, centring, other = _plain_and_transformed(f)
    covariates, values, uncentred, linear = [], {}, [], []
    for var in numeric:
        if var in centres:
            how, centre = f"centred at its mean over animals ({centres[var]:.4g})", centres[var]
            values[var] = 0.0
        elif var in centring:
            run_mean = float(data[var].mean())
            how = f"centred by the formula at its mean over runs ({run_mean:.4g})"
            centre = values[var] = run_mean
        else:
            how, centre = "not centred", None
            values[var] = float(data[var].mean())
            uncentred.append(var)
        if var not in other:
            linear.append(var)
        covariates.append(Covariate(variable=var, centring=how, centre=centre))
    return covariates, values, uncentred, linear


def _default_contrasts(spec, columns, data, animal, f: Formula, numeric, centres):
    """Default contrasts named after what they test, and those left out (with why)."""
    covariates, values, uncentred, linear = _covariate_list(f, data, numeric, centres)
    try:
        factors, raw_levels = _factor_list(spec, data, animal)
    except _NoGrid as exc:
        return [], covariates, [], [f"no default contrasts: {exc}; define [[contrast]]s"], []
    centred = [v for v in numeric if v not in uncentred]
    where = f" at the average {', '.join(centred)}" if centred else ""
    try:
        found = _contrasts_at(spec, columns, factors, raw_levels, data, values, linear, where)
        moved = [
            _contrasts_at(
                spec, columns, factors, raw_levels, data, {**values, u: values[u] + 1}, linear, ""
            )
            for u in uncentred
        ]
    except _NoGrid as exc:
        return factors, covariates, [], [f"no default contrasts: {exc}; define [[contrast]]s"], []
    contrasts, left_out = [], []
    scale = max(1.0, float(np.abs(np.asarray([w for w, _ in found.values()])).max()))
    for name, (w, meaning) in found.items():
        depends = [
            u
            for u, other in zip(uncentred, moved, strict=True)
            if not np.allclose(other[name][0], w, rtol=0, atol=_GRID_TOL * scale)
        ]
        if depends:
            left_out.append(
                f"{name}: depends on where {', '.join(depends)} is evaluated (not centred: "
                "the intercept is the response where every uncentred term is 0); set "
                "[model] center_covariates = true, write center(...), or define a [[contrast]]"
            )
        elif np.allclose(w, 0.0, atol=_GRID_TOL * scale):
            left_out.append(f"{name}: not estimable from this design (all weights zero)")
        else:
            w = np.where(np.abs(w) < _GRID_TOL * scale, 0.0, w)
            contrasts.append(GroupContrast(name=name, weights=w, meaning=meaning))
    for var in numeric:
        if var not in linear:
            left_out.append(
                f"{var}: enters the formula through a non-linear expression, so it has no "
                "single slope; define a [[contrast]] on its column if you want one"
            )
    ftests = default_ftests(factors, found.differences, contrasts, where)
    return factors, covariates, contrasts, left_out, ftests


def default_ftests(
    factors: Sequence[Factor],
    differences: dict[str, list[str]],
    contrasts: Sequence[GroupContrast],
    where: str = "",
) -> list[GroupFTest]:
    """One F-test per factor with more than two levels: all its differences from the
    reference level at once ("is there any difference between the levels?").

    A factor whose differences were not all kept as default contrasts (one depends on
    an uncentred covariate, or is not estimable) gets none.
    """
    by_name = {c.name: c for c in contrasts}
    out = []
    for f in factors:
        names = differences.get(f.variable, [])
        if len(f.levels) <= 2 or len(names) != len(f.levels) - 1:
            continue
        if not all(n in by_name for n in names):
            continue
        weights = np.vstack([by_name[n].weights for n in names])
        if np.linalg.matrix_rank(weights) < len(names):
            continue
        out.append(
            GroupFTest(
                name=f"{_safe(f.variable)}-{FTEST_SUFFIX}",
                rows=tuple(names),
                weights=weights,
                meaning=(
                    f"any difference between the {len(f.levels)} levels of {f.variable} "
                    f"({', '.join(f.levels)})"
                    + (" averaged over the other factors' levels" if len(factors) > 1 else "")
                    + where
                ),
            )
        )
    return out


def build_design(
    runs: pd.DataFrame,
    formula: str,
    *,
    center_covariates: bool = True,
    reference: dict[str, str] | None = None,
) -> Design:
    """Build the design matrix for the included runs of one first-level contrast.

    Parameters
    ----------
    runs
        Included runs, one row per run, with an ``animal`` column and every variable
        the formula names (no missing values; numeric columns already numeric).
    formula
        Right-hand side of a Wilkinson-style formula.
    center_covariates
        Centre numeric variables named directly in the formula at their mean over
        animals, so that the intercept is a mean at the average covariate.
    reference
        Reference level per text variable (default: the first in alphabetical order).

    Raises
    ------
    UserError
        When the formula cannot be evaluated, the design is rank-deficient, or leaves
        no between-animal degrees of freedom, or a reference level is wrong.
    """
    animal_ids = tuple(dict.fromkeys(runs["animal"].astype(str)))
    codes = {a: i for i, a in enumerate(animal_ids)}
    animal = np.array([codes[a] for a in runs["animal"].astype(str)], dtype=np.intp)
    data = runs.reset_index(drop=True).copy()
    f = _parse(formula)
    variables = [v for v in formula_variables(formula) if v in data.columns]
    categorical = _categorical_variables(f)
    numeric = [
        v for v in variables if pd.api.types.is_numeric_dtype(data[v]) and v not in categorical
    ]
    text_vars = [v for v in variables if not pd.api.types.is_numeric_dtype(data[v])]
    for var in text_vars:
        data[var] = data[var].astype(str)
    _apply_reference(data, dict(reference or {}), variables, text_vars)
    plain, _, _ = _plain_and_transformed(f)
    centres = _centre_covariates(data, animal, numeric, plain, center_covariates)
    try:
        mm = model_matrix(formula, data, na_action="raise")
    except Exception as exc:
        raise UserError(f"[model] formula {formula!r} cannot be evaluated: {exc}") from None
    X = np.asarray(mm, dtype=float)
    columns = tuple(str(c) for c in mm.columns)
    if X.shape[1] == 0:
        raise UserError(f'[model] formula {formula!r} gives no columns; use "1" for the mean')
    animal_level = _check_rank(X, columns, animal, len(animal_ids), formula)
    session, session_ids = session_codes(data, animal, animal_ids)
    factors, covariates, contrasts, left_out, ftests = _default_contrasts(
        mm.model_spec, columns, data, animal, f, numeric, centres
    )
    return Design(
        matrix=X,
        columns=columns,
        animal_level=animal_level,
        animal=animal,
        animal_ids=animal_ids,
        factors=tuple(factors),
        covariates=tuple(covariates),
        default_contrasts=tuple(contrasts),
        left_out=tuple(left_out),
        default_ftests=tuple(ftests),
        variable_levels=variable_levels(runs.reset_index(drop=True), variables),
        session=session,
        session_ids=session_ids,
        level=column_levels(X, animal, session),
        column_variables=_column_variables(mm, len(columns)),
    )


def _check_rank(X, columns, animal, n_animals: int, formula: str) -> np.ndarray:
    """Full rank overall and across animals; returns which columns are animal-level."""
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
        first = np.array([np.flatnonzero(animal == a)[0] for a in range(n_animals)])
        rank_between = np.linalg.matrix_rank(between[first])
        if rank_between < between.shape[1]:
            names = [c for c, b in zip(columns, animal_level, strict=True) if b]
            raise UserError(
                f"[model] formula {formula!r}: the animal-level columns ({', '.join(names)}) "
                "are rank-deficient across animals; an animal-level covariate must differ "
                "between animals and not be confounded with another"
            )
        if n_animals - rank_between < 1:
            raise UserError(
                f"[model] formula {formula!r}: {n_animals} animals leave no "
                f"between-animal degrees of freedom for {rank_between} animal-level columns; "
                "add animals or simplify the formula"
            )
    return animal_level


def session_codes(
    runs: pd.DataFrame, animal: np.ndarray, animal_ids: tuple[str, ...]
) -> tuple[np.ndarray, tuple[str, ...]]:
    """Session codes unique per (animal, session), in order of first appearance.

    Runs with an empty or absent ``session`` value share one session per animal.
    """
    labels = (
        runs["session"].astype(str).to_numpy()
        if "session" in runs.columns
        else np.full(len(runs), "")
    )
    keys = [f"{animal_ids[a]}/{lab}" for a, lab in zip(animal, labels, strict=True)]
    session_ids = tuple(dict.fromkeys(keys))
    index = {k: i for i, k in enumerate(session_ids)}
    return np.array([index[k] for k in keys], dtype=np.intp), session_ids


def _constant_within(X: np.ndarray, unit: np.ndarray) -> np.ndarray:
    """(p,) True for the columns of ``X`` with one value within every unit."""
    return (pd.DataFrame(X).groupby(unit).nunique() <= 1).all(axis=0).to_numpy()


def column_levels(X: np.ndarray, animal: np.ndarray, session: np.ndarray) -> tuple[str, ...]:
    """``"animal"``, ``"session"`` or ``"run"`` for every column of ``X``."""
    at_animal = _constant_within(X, animal)
    at_session = _constant_within(X, session)
    return tuple(
        "animal" if a else ("session" if s else "run")
        for a, s in zip(at_animal, at_session, strict=True)
    )


def _column_variables(mm, n_columns: int) -> tuple[frozenset[str], ...]:
    """The formula variables behind each column of a formulaic model matrix."""
    out: list[frozenset[str]] = [frozenset()] * n_columns
    spec = mm.model_spec
    for term, sl in spec.term_slices.items():
        names = frozenset(str(v) for v in spec.term_variables.get(term, set()))
        for j in range(sl.start, sl.stop):
            out[j] = names
    return tuple(out)


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


def weights_dict(c: np.ndarray, columns: tuple[str, ...]) -> dict[str, float]:
    """A contrast vector as coefficient name → weight (non-zero weights only)."""
    return {col: float(w) for col, w in zip(columns, c, strict=True) if w != 0.0}


# --- random effects chosen from the levels -------------------------------------------
SLOPES_AUTO = "auto"
SLOPES_NONE = "none"
SESSIONS_AUTO = "auto"
SESSIONS_MODEL = "model"
SESSIONS_NONE = "none"


@dataclass(frozen=True)
class SlopeTerm:
    """How one within-animal design column relates to a random slope.

    ``column = slope column × moderator``, the moderator constant within animals (1 for
    the slope column itself; a group indicator for a slope-by-group interaction).
    """

    slope: int  # index into RandomEffects.slope_columns
    moderator: np.ndarray  # (m,) per animal


@dataclass(frozen=True)
class RandomEffects:
    """The random-effects structure of one design.

    Attributes
    ----------
    slope_columns
        Design columns that get a random slope per animal (correlated with the
        animal's intercept).
    slope_variables
        The formula variables those slopes belong to.
    terms
        Per design column: its :class:`SlopeTerm`, or None (animal-level columns, and
        within-animal columns without a slope).
    sessions
        True when a session variance level (sessions nested in animals) is fitted.
    variance_groups
        The animal-level factor with one between-animal variance per level, or None.
    animal_group
        (m,) group code of every animal (None without variance groups).
    group_names
        The levels of ``variance_groups`` in code order.
    """

    slope_columns: tuple[int, ...] = ()
    slope_variables: tuple[str, ...] = ()
    terms: tuple[SlopeTerm | None, ...] = ()
    sessions: bool = False
    variance_groups: str | None = None
    animal_group: np.ndarray | None = None
    group_names: tuple[str, ...] = ()

    @property
    def extended(self) -> bool:
        """True when the model goes beyond one random intercept per animal."""
        return bool(self.slope_columns) or self.sessions or self.variance_groups is not None


def _slope_term(design: Design, j: int, l_col: int) -> np.ndarray | None:
    """The moderator g with ``X[:, j] = X[:, l_col] · g[animal]``, or None.

    g is an animal-level column of the design (the intercept for the slope column
    itself, a group indicator for a slope-by-group interaction), so it is known for
    every animal, also for one whose runs do not vary the slope column.
    """
    if j == l_col:
        return np.ones(design.n_animals)
    X = design.matrix
    xj, xl = X[:, j], X[:, l_col]
    scale = max(1.0, float(np.abs(xj).max()))
    for k in np.flatnonzero(~design.within):
        if np.all(np.abs(xj - xl * X[:, k]) <= 1e-9 * scale):
            return animal_design(design)[:, k]
    return None


def tested_columns(design: Design, contrasts: Sequence[np.ndarray]) -> np.ndarray:
    """(p,) True for the columns on which some group contrast puts weight."""
    tested = np.zeros(len(design.columns), dtype=bool)
    for c in contrasts:
        tested |= np.asarray(c) != 0
    return tested


def _main_effect_columns(design: Design, variable: str) -> list[int]:
    return [j for j, v in enumerate(design.column_variables) if v == frozenset({variable})]


def random_effects(
    design: Design,
    runs: pd.DataFrame,
    contrasts: Sequence[np.ndarray],
    *,
    random_slopes: str | tuple[str, ...] = SLOPES_AUTO,
    sessions: str = SESSIONS_AUTO,
    variance_groups: str | None = None,
) -> RandomEffects:
    """Choose the random effects of a design from its levels and the ``[model]`` keys.

    Parameters
    ----------
    design
        From :func:`build_design`.
    runs
        The same runs (for the ``variance_groups`` column).
    contrasts
        The group contrasts' weight vectors.
    random_slopes
        ``"auto"``: a slope for every within-animal formula variable on whose columns
        some contrast puts weight; ``"none"``; or the formula variables to give slopes.
    sessions
        ``"auto"``: a session level when some animal has two or more sessions and some
        session two or more runs; ``"model"``: always (an error when no animal has two
        sessions); ``"none"``: sessions pooled into the run variance.
    variance_groups
        A runs-table column constant within animals, or None.

    Raises
    ------
    UserError
        Naming the ``[model]`` key, for a variable that is not within-animal, a slope
        variable without a main effect in the formula, sessions asked for without
        repeated sessions, or a group column that varies within an animal.
    """
    X = design.matrix
    within_vars = sorted(
        {v for j in np.flatnonzero(design.within) for v in design.column_variables[j]}
        - {
            v
            for j in np.flatnonzero(~design.within)
            for v in design.column_variables[j]
            if len(design.column_variables[j]) == 1
        }
    )
    if random_slopes == SLOPES_NONE:
        variables: list[str] = []
    elif random_slopes == SLOPES_AUTO:
        tested = tested_columns(design, contrasts) & design.within
        variables = sorted(
            {v for j in np.flatnonzero(tested) for v in design.column_variables[j]}
            & set(within_vars)
        )
    else:
        variables = list(random_slopes)
        for v in variables:
            if v not in within_vars:
                raise UserError(
                    f"[model] random_slopes names {v!r}, which is not a formula variable "
                    "that varies within animals"
                    + (
                        f" (within-animal variables: {', '.join(within_vars)})"
                        if within_vars
                        else " (the formula has none)"
                    )
                    + '; list only those, or use "auto"'
                )
    slope_columns: list[int] = []
    for v in variables:
        cols = [j for j in _main_effect_columns(design, v) if design.within[j]]
        if not cols:
            raise UserError(
                f"[model] random_slopes: {v!r} enters the formula only in interactions; "
                f"add its main effect (e.g. '+ {v}') so that its random slope has a column"
            )
        slope_columns.extend(cols)
    slope_columns += _interaction_slopes(
        design, variables, slope_columns, contrasts if random_slopes == SLOPES_AUTO else None
    )
    terms: list[SlopeTerm | None] = [None] * X.shape[1]
    for j in np.flatnonzero(design.within):
        for i, col in enumerate(slope_columns):
            g = _slope_term(design, int(j), col)
            if g is not None:
                terms[j] = SlopeTerm(slope=i, moderator=g)
                break
    return RandomEffects(
        slope_columns=tuple(slope_columns),
        slope_variables=tuple(variables),
        terms=tuple(terms),
        sessions=_sessions_on(design, sessions, slope_columns),
        **_variance_groups(design, runs, variance_groups),
    )


def _within_variables(design: Design, j: int, animal_vars: set[str]) -> frozenset[str]:
    """The within-animal formula variables of design column ``j``."""
    return frozenset(design.column_variables[j] - animal_vars)


def _interaction_slopes(
    design: Design,
    variables: Sequence[str],
    slope_columns: Sequence[int],
    contrasts: Sequence[np.ndarray] | None,
) -> list[int]:
    """Columns of interactions between within-animal slope variables that get their own
    random slope (e.g. ``drug:time`` with drug and time both varying within animals).

    An animal's drug-by-time interaction varies between animals as its drug and time
    effects do; without its own slope the interaction, and every animal-level moderation
    of it (``genotype:drug:time``), would be judged against the run-to-run scatter. The
    interaction column of two or more slope variables gets a slope when the formula has
    it as a column of its own; with ``contrasts`` (the ``"auto"`` rule) only when some
    contrast weights a column whose within-animal variables are exactly those of the
    interaction (the interaction itself or its animal-level moderations).

    References
    ----------
    Barr DJ, Levy R, Scheepers C, Tily HJ (2013). Random effects structure for
    confirmatory hypothesis testing: keep it maximal. J Mem Lang 68:255-278.
    """
    chosen = set(variables)
    animal_vars = {
        v
        for j in np.flatnonzero(~design.within)
        for v in design.column_variables[j]
        if len(design.column_variables[j]) == 1
    }
    tested = None
    if contrasts is not None:
        weighted = tested_columns(design, contrasts) & design.within
        tested = {_within_variables(design, int(k), animal_vars) for k in np.flatnonzero(weighted)}
    out: list[int] = []
    for j in np.flatnonzero(design.within):
        names = design.column_variables[j]
        if len(names) < 2 or not names <= chosen or j in slope_columns:
            continue
        if tested is not None and frozenset(names) not in tested:
            continue
        out.append(int(j))
    return sorted(out, key=lambda j: (len(design.column_variables[j]), j))


def _sessions_on(design: Design, sessions: str, slope_columns: Sequence[int] = ()) -> bool:
    """Whether a session variance level is fitted (see :func:`random_effects`).

    The session variance is identified apart from the animal's own effects only by
    *replicate* sessions: two sessions of one animal with the same values of every
    session-level column that carries a random slope (with one drug and one vehicle
    session per animal and a random drug slope, day-to-day variance and the slope
    variance cannot be told apart, and the slope absorbs it). And apart from the run
    variance only when some session has two or more runs.
    """
    if sessions == SESSIONS_NONE:
        return False
    key_columns = [j for j in slope_columns if design.level[j] == "session"]
    first = np.unique(design.session, return_index=True)[1]
    keys = pd.DataFrame(design.matrix[first][:, key_columns].round(12))
    keys["animal"] = design.animal[first]
    replicate = bool(keys.duplicated().any())
    runs_per_session = np.bincount(design.session)
    repeated = replicate and runs_per_session.max() >= 2
    if sessions == SESSIONS_MODEL and not repeated:
        need = (
            " with the same value of " + ", ".join(design.columns[j] for j in key_columns)
            if key_columns
            else ""
        )
        raise UserError(
            '[model] sessions = "model" needs an animal with two or more sessions'
            f"{need} (the runs table's 'session' column) and a session with two or more "
            "runs; otherwise the session variance cannot be told apart from the animal's "
            f"own effects or the run variance (found at most {runs_per_session.max()} "
            'run(s) per session). Use "auto" or "none"'
        )
    return repeated


def _variance_groups(design: Design, runs: pd.DataFrame, column: str | None) -> dict:
    if column is None:
        return {}
    if column not in runs.columns:
        raise UserError(
            f"[model] variance_groups names column {column!r}, which the runs table does not "
            f"have; columns: {', '.join(c for c in runs.columns if c != 'line')}"
        )
    values = runs[column].astype(str).to_numpy()
    per_animal = pd.Series(values).groupby(design.animal).nunique()
    if (per_animal > 1).any():
        bad = design.animal_ids[int(per_animal.index[per_animal > 1][0])]
        raise UserError(
            f"[model] variance_groups = {column!r}: the column varies within animal {bad}; "
            "it must be an animal-level factor (one value per animal)"
        )
    first = np.array([np.flatnonzero(design.animal == a)[0] for a in range(design.n_animals)])
    names = tuple(sorted(set(values[first])))
    if len(names) < 2:
        raise UserError(
            f"[model] variance_groups = {column!r} has one level ({names[0]}); it needs two "
            "or more groups of animals"
        )
    codes = np.array([names.index(v) for v in values[first]], dtype=np.intp)
    small = [n for i, n in enumerate(names) if (codes == i).sum() < 2]
    if small:
        raise UserError(
            f"[model] variance_groups = {column!r}: group(s) {', '.join(small)} have fewer "
            "than 2 animals; a between-animal variance needs at least 2 animals per group"
        )
    return {"variance_groups": column, "animal_group": codes, "group_names": names}


# --- what a contrast tests ---------------------------------------------------------
CONTRAST_ANIMAL = "animal"  # only animal-level columns
CONTRAST_SLOPE = "slope"  # only columns of one random slope (and its moderators)
CONTRAST_WITHIN = "within"  # a within-animal column without a random slope
CONTRAST_SLOPES = "slopes"  # a combination of random-slope columns without moderators
CONTRAST_MIXED = "mixed"  # animal-level and within-animal columns, or slopes with moderators


def contrast_kind(design: Design, random: RandomEffects, c: np.ndarray) -> tuple[str, int | None]:
    """The level a contrast tests, and the slope index for a slope contrast."""
    weighted = np.flatnonzero(np.asarray(c) != 0)
    within = design.within
    if not within[weighted].any():
        return CONTRAST_ANIMAL, None
    if within[weighted].all():
        terms = [random.terms[j] if random.terms else None for j in weighted]
        if any(t is None for t in terms):
            return CONTRAST_WITHIN, None
        slopes = {t.slope for t in terms}  # type: ignore[union-attr]
        if len(slopes) == 1:
            return CONTRAST_SLOPE, slopes.pop()
        # several slopes (e.g. condition B minus C, one slope each): fine as long as
        # no animal-level column moderates them, so every animal's combination of its
        # own effects has the same expectation
        pure = all(
            t is None
            or t.slope not in slopes
            or j in weighted
            and j == random.slope_columns[t.slope]
            for j, t in enumerate(random.terms)
        )
        if pure:
            return CONTRAST_SLOPES, None
    return CONTRAST_MIXED, None


def slope_design(design: Design, random: RandomEffects, slope: int) -> tuple[np.ndarray, list[int]]:
    """The animal-level design of one random slope and the design columns it stands for.

    Column i of the returned (m, r) matrix is the moderator of design column
    ``columns[i]`` (1 for the slope column itself), so that a contrast ``c`` of the full
    design reads ``c[columns]`` on it.
    """
    columns = [j for j, t in enumerate(random.terms) if t is not None and t.slope == slope]
    G = np.column_stack([random.terms[j].moderator for j in columns])  # type: ignore[union-attr]
    return G, columns


def own_effect_rows(random: RandomEffects, weights: np.ndarray) -> np.ndarray:
    """The rows of a contrast or F-test on several random slopes, written on each
    animal's own design ``[1, slope columns]`` (intercept weight 0): the animal's own
    combinations of its effects that the rows test."""
    weights = np.atleast_2d(np.asarray(weights, dtype=float))
    own = weights[:, list(random.slope_columns)]
    return np.column_stack([np.zeros(weights.shape[0]), own])


def animal_design(design: Design) -> np.ndarray:
    """(m, p) one row of the design per animal (its first run)."""
    first = np.array([np.flatnonzero(design.animal == a)[0] for a in range(design.n_animals)])
    return design.matrix[first]


def unslope_warning(design: Design, random: RandomEffects, name: str, c: np.ndarray) -> str | None:
    """A caution for a contrast on a within-animal column that has no random slope."""
    kind, _ = contrast_kind(design, random, c)
    if kind != CONTRAST_WITHIN:
        return None
    cols = [design.columns[j] for j in np.flatnonzero(np.asarray(c) != 0) if design.within[j]]
    on_sessions = random.sessions and all(
        design.level[j] == "session" for j in np.flatnonzero(np.asarray(c) != 0) if design.within[j]
    )
    against = (
        "the scatter of sessions within animals with sessions − animals df"
        if on_sessions
        else "the run-to-run scatter with runs − animals df"
    )
    return (
        f"contrast '{name}' tests the within-animal column(s) {', '.join(cols)} without a "
        f"random slope per animal ([model] random_slopes): its t is judged against {against}, "
        "which is anti-conservative (too many false positives) whenever the effect differs "
        "between animals"
        + (" beyond what one session per animal and condition absorbs" if on_sessions else "")
        + '; use random_slopes = "auto" unless you know that it does not'
    )


def permutation_refusal(
    design: Design,
    random: RandomEffects,
    name: str,
    c: np.ndarray,
    permutations: int,
    full_coverage: bool = True,
) -> str | None:
    """Why ``[inference] permutations`` cannot test this contrast correctly, or None."""
    head = f"contrast '{name}': [inference] permutations = {permutations}"
    if random.variance_groups is not None and not full_coverage:
        return (
            f"{head} with [model] variance_groups = {random.variance_groups!r} needs data "
            "from every animal at every voxel (the G statistic of Winkler et al. 2014 is "
            "computed on whole animals); set [study] min_coverage = 1, or permutations = 0"
        )
    kind, _ = contrast_kind(design, random, c)
    if kind == CONTRAST_WITHIN:
        cols = [design.columns[j] for j in np.flatnonzero(np.asarray(c) != 0) if design.within[j]]
        return (
            f"{head}: the contrast tests within-animal column(s) ({', '.join(cols)}) that "
            "have no random slope, so animals' own effects cannot be exchanged. Give them a "
            '[model] random_slopes (the default "auto" does) or set permutations = 0'
        )
    if kind == CONTRAST_MIXED:
        return (
            f"{head}: the contrast mixes animal-level and within-animal columns (or "
            "within-animal effects that animal-level columns moderate differently); "
            "permutations exchange one level at a time. Test the parts as separate "
            "contrasts, or set permutations = 0"
        )
    return None


def model_problems(
    design: Design,
    runs: pd.DataFrame,
    contrasts: Sequence[tuple[str, np.ndarray]],
    model,
    permutations: int,
    full_coverage: bool = True,
    ftests: Sequence[GroupFTest] = (),
) -> tuple[RandomEffects, list[str], list[str]]:
    """The random effects of a design from the ``[model]`` settings, with what ``check``
    must refuse and what it must caution about.

    Parameters
    ----------
    design, runs
        The design and its runs.
    contrasts
        (name, weights) of every group contrast.
    model
        The ``[model]`` settings (:class:`grouplevel.config.ModelSettings`).
    permutations
        ``[inference] permutations``.
    full_coverage
        True when every run must have data at every voxel (``[study] min_coverage``
        = 1).
    ftests
        The F-tests of the design; their rows count as tested contrasts (random slopes
        "auto"), and an F-test that cannot be permuted correctly is refused.

    Returns
    -------
    random, problems, warnings

    Raises
    ------
    UserError
        When the ``[model]`` random-effects keys do not fit the design.
    """
    random = random_effects(
        design,
        runs,
        [c for _, c in contrasts] + [row for f in ftests for row in f.weights],
        random_slopes=model.random_slopes,
        sessions=model.sessions,
        variance_groups=model.variance_groups,
    )
    problems: list[str] = []
    warnings: list[str] = []
    if model.sessions == SESSIONS_NONE:
        auto = _sessions_on(design, SESSIONS_AUTO, random.slope_columns)
        if auto:
            warnings.append(
                '[model] sessions = "none": animals have repeated sessions, whose day-to-day '
                "variance is pooled into the run variance; a session-level effect (one "
                "value per session, e.g. drug on one day and vehicle on another) is then "
                "tested with too many degrees of freedom (too many false positives). Set "
                'sessions = "auto" to fit sessions as their own level'
            )
    for name, c in contrasts:
        note = unslope_warning(design, random, name, c)
        if note:
            warnings.append(note)
        if permutations > 0:
            refusal = permutation_refusal(design, random, name, c, permutations, full_coverage)
            if refusal:
                problems.append(refusal)
    for f in ftests:
        union = np.abs(f.weights).sum(axis=0)
        note = unslope_warning(design, random, f"F-test {f.name}", union)
        if note:
            warnings.append(note)
        if permutations > 0:
            refusal = ftest_permutation_refusal(design, random, f, permutations, full_coverage)
            if refusal and f.declared:
                problems.append(refusal)
            elif refusal:
                # a default F-test never makes a study invalid: it stays parametric
                warnings.append(
                    f"{refusal.split(': [inference]')[0]} (a default F-test) is tested "
                    "parametrically only (FDR; no permutation inference): "
                    + refusal.split(": ", 2)[-1]
                )
    return random, problems, warnings


def ftest_kind(design: Design, random: RandomEffects, weights: np.ndarray):
    """The level an F-test tests (as :func:`contrast_kind` of all its columns at once)."""
    return contrast_kind(design, random, np.abs(np.atleast_2d(weights)).sum(axis=0))


def ftest_permutation_refusal(
    design: Design,
    random: RandomEffects,
    ftest: GroupFTest,
    permutations: int,
    full_coverage: bool = True,
) -> str | None:
    """Why ``[inference] permutations`` cannot test this F-test correctly, or None.

    Permuted: F-tests of animal-level columns (whole-animal permutations or sign flips,
    Freedman–Lane), of one random slope with its animal-level moderators (each
    animal's own slope), and of several random slopes without moderators (each
    animal's vector of its own effects, flipped as a whole:
    :mod:`grouplevel.inference.vector_flips`). Refused: F-tests whose rows mix levels,
    weight within-animal columns without a random slope, or weight several random
    slopes that animal-level columns moderate (the moderators would have to be removed
    as nuisance from every animal's vector at once, which is not implemented).
    """
    union = np.abs(ftest.weights).sum(axis=0)
    head = f"F-test '{ftest.name}': [inference] permutations = {permutations}"
    kind, _ = ftest_kind(design, random, ftest.weights)
    weighted = np.flatnonzero(union != 0)
    if kind == CONTRAST_MIXED and design.within[weighted].all():
        return (
            f"{head}: its rows weight several within-animal random slopes that "
            "animal-level columns moderate (an interaction such as stimulus × genotype); "
            "flipping each animal's vector of own effects would first need those "
            "moderators removed from every vector at once, which is not implemented. "
            "Test it with permutations = 0, or test its rows as separate contrasts"
        )
    refusal = permutation_refusal(
        design, random, f"F-test {ftest.name}", union, permutations, full_coverage
    )
    if refusal:
        return refusal.replace("contrast 'F-test ", "F-test '").replace("the contrast", "it")
    return None


def _describe(design: Design, random: RandomEffects) -> str:
    parts = []
    if random.slope_columns:
        names = ", ".join(design.columns[j] for j in random.slope_columns)
        parts.append(f"random slopes ({names})")
    if random.sessions:
        parts.append("a session level")
    if random.variance_groups:
        parts.append(f"variance groups ({random.variance_groups})")
    return " and ".join(parts)


def describe_random_effects(design: Design, random: RandomEffects) -> str:
    """One line for logs and summaries: the random effects fitted."""
    text = _describe(design, random)
    return "a random intercept per animal" + (f", {text}" if text else "")
