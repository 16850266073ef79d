"""Fixed-effects design matrix from a Wilkinson-style formula, and group contrasts.

The formula's right-hand side is written as in R or statsmodels (``"1"``,
``"1 + group"``, ``"1 + group + age"``); columns of the runs table are its variables.
Text columns become treatment-coded factors.

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

import difflib
from collections.abc import Sequence
from dataclasses import dataclass, field

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
    session, session_ids = session_codes(data, animal, animal_ids)
    return Design(
        matrix=X,
        columns=columns,
        animal_level=animal_level,
        animal=animal,
        animal_ids=animal_ids,
        session=session,
        session_ids=session_ids,
        level=column_levels(X, animal, session),
        column_variables=_column_variables(mm, len(columns)),
    )


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
    return (
        f"contrast '{name}' tests the within-animal column(s) {', '.join(cols)} without a "
        "random slope per animal ([model] random_slopes): its t is judged against the "
        "run-to-run scatter with runs − animals df, which is anti-conservative (too many "
        "false positives) whenever the effect differs between animals; use random_slopes "
        '= "auto" unless you know that it does not'
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
        [c for _, c in contrasts],
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
                "variance is pooled into the run variance; a session-level effect is then "
                "tested with too many degrees of freedom"
            )
    for name, c in contrasts:
        note = unslope_warning(design, random, name, c)
        if note:
            warnings.append(note)
        if permutations > 0:
            refusal = permutation_refusal(design, random, name, c, permutations, full_coverage)
            if refusal:
                problems.append(refusal)
    return random, problems, warnings


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
