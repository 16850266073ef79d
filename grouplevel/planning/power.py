"""Planning the next study: power of the group mean for a number of animals and runs.

Runs are nested in animals. An animal's mean over its ``r`` runs varies around the group
mean with variance

    v = τ² + (σ² + s̄²) / r,

where τ² is the between-animal variance, σ² the between-run variance beyond the
first-level noise and s̄² the mean first-level variance of one run. The group mean of
``n`` animals then has standard error ``sqrt(v / n)`` and is tested with a one-sample t
test on the ``n - 1`` between-animal degrees of freedom. Its power follows from the
noncentral t distribution with noncentrality ``effect / SE``.

More runs shrink only the run-level part of ``v``; τ² stays, however many runs each animal
gives. More animals shrink all of it and add degrees of freedom. With a cost per animal
and a cost per run the cheapest design that reaches a target power can be read off a grid
of animals × runs.

Sessions nested in animals add a third level. With ``S`` sessions per animal of ``R``
runs each and ω² the variance of sessions within an animal, an animal's mean varies with

    v = τ² + ω² / S + (σ² + s̄²) / (S R),

so the variance of the grand mean of ``A`` animals is ``v / A`` (the balanced nested
design: common practice, any textbook of nested analysis of variance, e.g. Snijders &
Bosker 2012, chapter 11). More runs shrink only the last term, more sessions the last
two, more animals all three. A within-animal difference between two equal halves
(drug − vehicle) is an animal's own slope: its between-animal variance is the slope
variance, and the halves add ``4 ω² / S + 4 (σ² + s̄²) / (S R)`` when the difference
varies between sessions (drug one day, vehicle another), only ``4 (σ² + s̄²) / (S R)``
when it varies between runs of a session (session effects cancel).

This module (pure: numbers in, numbers and tables out) provides

- :func:`design_power`: power of one or many designs (vectorised);
- :func:`power_grid`: power over a grid of animals × runs, as a table;
- :func:`session_grid`: power over animals × sessions per animal × runs per session,
  with what one more session buys against the same runs added to existing sessions;
- :func:`cheapest_design`: the cheapest design of a grid that reaches a target power;
and :mod:`grouplevel.planning.plan` applies them to the target regions of a finished
analysis (``grouplevel plan``).

A caution goes with every plan: power computed from an observed effect is optimistic.
A region picked because it was significant (or the strongest) has an effect estimate
biased upward, and "observed power" is a transformation of the p-value that says
nothing new about the data (Hoenig & Heisey 2001). Plan with the smallest effect worth
detecting where one can be named.

References
----------
Cohen J (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed.
Erlbaum, chapter 2 (power of the t test from the noncentral t distribution).

Snijders TAB, Bosker RJ (2012). Multilevel Analysis, 2nd ed. Sage, chapter 11
(designing two-level studies: numbers of level-2 units and of level-1 units per unit,
under a budget).

Mumford JA, Nichols TE (2008). Power calculation for group fMRI studies accounting for
arbitrary design and temporal autocorrelation. NeuroImage 39:261-268.

Hoenig JM, Heisey DM (2001). The abuse of power: the pervasive fallacy of power
calculations for data analysis. Am Stat 55:19-24.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

import numpy as np
import pandas as pd

from grouplevel.distributions import t_ppf
from grouplevel.inference.significance import DEFAULT_ALPHA
from grouplevel.inference.significance import SIDES as SIDED_CHOICES

#: Sidedness of the test, in the words of ``[inference] sided``: ``two`` tests
#: ``|T| > t_{1-α/2}``, ``positive`` tests ``T > t_{1-α}``, ``negative`` ``T < -t_{1-α}``.

#: Default grid: 4 to 24 animals (fewer than 4 animals give at most 2 between-animal df
#: and, for sign-flip permutations, no attainable p below 0.125; 24 is our own upper end
#: for one cohort of rodents) and 1 to 8 runs per animal (our own choice: a few sessions
#: of a few runs each).
DEFAULT_ANIMALS = range(4, 25)
DEFAULT_RUNS = range(1, 9)
#: Default grid with sessions: 1 to 6 sessions per animal and 1 to 6 runs per session
#: (our own choice: a few imaging days of a few runs each).
DEFAULT_SESSIONS = range(1, 7)
DEFAULT_RUNS_PER_SESSION = range(1, 7)

#: What the planned effect varies between (see the module notes): ``animal`` for a group
#: mean (an animal-level effect), ``session`` for a difference between two equal halves
#: of an animal's sessions, ``run`` for a difference between two equal halves of the runs
#: of every session.
VARIES_CHOICES = ("animal", "session", "run")

#: Factor by which a difference between two equal halves multiplies the variance of a
#: mean over all its units (each half has half the units: 2 × 2; common practice).
HALVES_FACTOR = 4.0


#: Target power (common practice: 80%, Cohen 1988, chapter 2).
DEFAULT_TARGET_POWER = 0.8

#: Costs in arbitrary units: an animal (purchase, housing, surgery, habituation) costs
#: about as much as ten runs of scanning. Our own rough choice; give your own.
DEFAULT_COST_ANIMAL = 10.0
DEFAULT_COST_RUN = 1.0
#: Cost of one more imaging session of an animal beyond its runs (set-up, anaesthesia or
#: habituation, positioning, a reference scan): our own rough choice; give your own.
DEFAULT_COST_SESSION = 2.0

#: Relative tolerance under which two design costs count as equal (float round-off).
COST_TIE_TOLERANCE = 1e-9

#: Colormap of the power heat map: perceptually uniform and readable with colour-vision
#: deficiencies (Nuñez, Anderton & Renslow 2018, PLoS ONE 13:e0199239).
POWER_COLORMAP = "cividis"

#: Columns of :func:`power_grid`, in order.
GRID_COLUMNS = ("animals", "runs", "se", "df", "noncentrality", "power")

#: Columns of :func:`session_grid`, in order. ``runs`` are runs per session;
#: ``power_one_more_session`` is the power with one more session of as many runs, and
#: ``power_same_runs_in_sessions`` the power when the same extra runs are added to the
#: existing sessions instead (runs per session × (S + 1) / S, a mean).
SESSION_GRID_COLUMNS = (
    "animals",
    "sessions",
    "runs",
    "se",
    "df",
    "noncentrality",
    "power",
    "power_one_more_session",
    "power_same_runs_in_sessions",
)

#: Optional column of ``regions.tsv`` with each region's mean first-level variance s̄².
FIRST_LEVEL_VARIANCE_COLUMN = "first_level_variance"

#: Columns ``regions.tsv`` must have for planning.
_REGION_COLUMNS = ("index", "name", "hemisphere", "effect", "p", "var_animal", "var_run")

CAUTION_OBSERVED = (
    "The effect used here is the one observed in this study. Power computed from an "
    "observed effect is optimistic: a region examined because its effect was significant "
    "(or the strongest) has an estimate biased upward, and power computed from it is a "
    "restatement of the p-value, not new evidence (Hoenig & Heisey 2001, Am Stat "
    "55:19-24). Plan with the smallest effect worth detecting (give it as the effect), "
    "or with a clearly smaller value than the one observed."
)
CAUTION_GIVEN = (
    "The effect used here was given by the user, not taken from the data (power computed "
    "from an observed effect would be optimistic: Hoenig & Heisey 2001, Am Stat "
    "55:19-24)."
)
CAUTION_VARIANCES = (
    " The variances τ² (between animals) and σ² (between runs) are themselves estimates "
    "from {animals} animals and {runs} runs and may be far from the truth; a τ² estimated "
    "as 0 in particular makes more runs look more useful than they are."
)

CAUTION_SESSIONS = (
    " The session variance ω² (day-to-day variation within an animal) comes from "
    "{sessions} sessions in all; a plan that adds sessions relies on it, and an ω² "
    "estimated as 0 makes extra sessions look no better than extra runs."
)

# --------------------------------------------------------------------------------------
# Pure core
# --------------------------------------------------------------------------------------


def _check_variances(
    var_animal: float, var_run: float, first_level: float, var_session: float = 0.0
) -> None:
    for label, value in (
        ("var_animal", var_animal),
        ("var_session", var_session),
        ("var_run", var_run),
        ("mean_first_level_variance", first_level),
    ):
        if not (math.isfinite(value) and value >= 0):
            raise ValueError(f"{label} must be a finite number >= 0, got {value}")
    if var_animal == 0 and var_session == 0 and var_run + first_level == 0:
        raise ValueError("the variances are all 0: the power of such a design is undefined")


def animal_variance(
    var_animal: float,
    var_session: float,
    var_run: float,
    mean_first_level_variance: float,
    sessions: np.ndarray | float,
    runs: np.ndarray | float,
    varies: str = "animal",
) -> np.ndarray:
    """Variance of one animal's estimate of the planned effect (balanced design).

    Parameters
    ----------
    var_animal
        Between-animal variance of the tested effect: the intercept variance τ² for a
        group mean (``varies="animal"``), the slope variance for a within-animal
        difference.
    var_session, var_run, mean_first_level_variance
        ω² (sessions within an animal), σ² (runs beyond the first-level noise) and s̄².
    sessions, runs
        Sessions per animal and runs per session (> 0), broadcast.
    varies
        ``"animal"``, ``"session"`` or ``"run"`` (:data:`VARIES_CHOICES`).

    Returns
    -------
    ndarray
        ``τ² + ω²/S + (σ² + s̄²)/(S R)`` for a mean; a difference of two equal halves of
        sessions gives ``τ² + 4ω²/S + 4(σ² + s̄²)/(S R)``, of runs within every session
        ``τ² + 4(σ² + s̄²)/(S R)``.

    References
    ----------
    Snijders TAB, Bosker RJ (2012). Multilevel Analysis, 2nd ed. Sage, chapter 11.
    """
    if varies not in VARIES_CHOICES:
        raise ValueError(f"varies must be one of {', '.join(VARIES_CHOICES)}, got {varies!r}")
    sessions = np.asarray(sessions, dtype=float)
    runs = np.asarray(runs, dtype=float)
    noise = (float(var_run) + float(mean_first_level_variance)) / (sessions * runs)
    if varies == "animal":
        return var_animal + var_session / sessions + noise
    if varies == "session":
        return var_animal + HALVES_FACTOR * (var_session / sessions + noise)
    return var_animal + HALVES_FACTOR * noise


def design_power(
    effect: float,
    var_animal: float,
    var_run: float,
    mean_first_level_variance: float,
    animals: np.ndarray | float,
    runs: np.ndarray | float,
    *,
    alpha: float = DEFAULT_ALPHA,
    sided: str = "two",
    sessions: np.ndarray | float = 1.0,
    var_session: float = 0.0,
    varies: str = "animal",
) -> dict[str, np.ndarray]:
    """Standard error, df, noncentrality and power of the planned effect, per design.

    Parameters
    ----------
    effect
        The group effect to detect (in the units of the first-level effects).
    var_animal, var_run, mean_first_level_variance
        τ² (of the tested effect: the slope variance for a within-animal difference),
        σ² and s̄² (each >= 0, not all 0).
    animals, runs
        Numbers of animals (>= 2) and runs per session (per animal when ``sessions`` is
        1; > 0, a mean such as 3.3 is allowed), broadcast against each other.
    alpha
        Significance level, 0 < alpha < 1.
    sided
        ``"two"``, ``"positive"`` or ``"negative"`` (see :data:`SIDED_CHOICES`).
    sessions
        Sessions per animal (> 0; default 1: all runs exchangeable).
    var_session
        ω², the variance of sessions within an animal (>= 0).
    varies
        What the effect varies between (:func:`animal_variance`).

    Returns
    -------
    dict
        ``se``, ``df``, ``noncentrality`` and ``power`` arrays of the broadcast shape.

    Notes
    -----
    ``v`` from :func:`animal_variance` (for one session: ``v = τ² + (σ² + s̄²) / runs``),
    ``SE = sqrt(v / animals)``, ``df = animals - 1`` and ``λ = effect / SE``. Two-sided
    power is ``P(T > c) + P(T < -c)`` with ``c = t_{1-α/2, df}`` and ``T ~ t'(df, λ)``
    (noncentral t); one-sided power uses ``c = t_{1-α, df}`` and the tail of the tested
    direction.

    References
    ----------
    Cohen J (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed.
    Erlbaum, chapter 2.

    Snijders TAB, Bosker RJ (2012). Multilevel Analysis, 2nd ed. Sage, chapter 11.
    """
    effect = float(effect)
    if not math.isfinite(effect):
        raise ValueError(f"effect must be finite, got {effect}")
    var_animal, var_run = float(var_animal), float(var_run)
    first_level = float(mean_first_level_variance)
    var_session = float(var_session)
    _check_variances(var_animal, var_run, first_level, var_session)
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must be between 0 and 1, got {alpha}")
    if sided not in SIDED_CHOICES:
        raise ValueError(f"sided must be one of {', '.join(SIDED_CHOICES)}, got {sided!r}")
    animals, runs, sessions = np.broadcast_arrays(
        np.asarray(animals, dtype=float),
        np.asarray(runs, dtype=float),
        np.asarray(sessions, dtype=float),
    )
    if np.any(~np.isfinite(animals)) or np.any(animals < 2):
        raise ValueError("animals must be at least 2 (one-sample t test on animals - 1 df)")
    if np.any(~np.isfinite(runs)) or np.any(runs <= 0):
        raise ValueError("runs per animal must be positive")
    if np.any(~np.isfinite(sessions)) or np.any(sessions <= 0):
        raise ValueError("sessions per animal must be positive")
    v = animal_variance(var_animal, var_session, var_run, first_level, sessions, runs, varies)
    if np.any(v <= 0):
        raise ValueError(
            f"the variances that matter for an effect varying between {varies}s are all 0: "
            "its power is undefined"
        )
    se = np.sqrt(v / animals)
    df = animals - 1.0
    with np.errstate(divide="ignore"):
        nc = effect / se
    from scipy import stats  # the noncentral t only here: scipy.stats loads in 0.4 s

    if sided == "two":
        critical = t_ppf(1.0 - alpha / 2.0, df)
        # P(T < -c; λ) = P(T > c; -λ): scipy's nct.cdf can give NaN far in the lower tail
        # where its survival function of the mirrored variable is accurate.
        power = stats.nct.sf(critical, df, nc) + stats.nct.sf(critical, df, -nc)
    elif sided == "positive":
        power = stats.nct.sf(t_ppf(1.0 - alpha, df), df, nc)
    else:
        power = stats.nct.sf(t_ppf(1.0 - alpha, df), df, -nc)
    return {"se": se, "df": df, "noncentrality": nc, "power": np.clip(power, 0.0, 1.0)}


def power_grid(
    effect: float,
    var_animal: float,
    var_run: float,
    mean_first_level_variance: float,
    *,
    animals: Iterable[int] = DEFAULT_ANIMALS,
    runs: Iterable[int] = DEFAULT_RUNS,
    alpha: float = DEFAULT_ALPHA,
    sided: str = "two",
) -> pd.DataFrame:
    """Power of the group mean over a grid of animals × runs per animal.

    Parameters
    ----------
    effect
        The group effect to detect.
    var_animal, var_run, mean_first_level_variance
        τ² (between animals), σ² (between runs beyond the first-level noise) and s̄²
        (mean first-level variance of one run); each >= 0, not all 0.
    animals, runs
        Whole numbers of animals (>= 2) and of runs per animal (>= 1), without
        repeats.
    alpha
        Significance level.
    sided
        ``"two"``, ``"positive"`` or ``"negative"``.

    Returns
    -------
    pandas.DataFrame
        One row per design, animals slowest: columns ``animals, runs`` (int), ``se``
        (standard error of the group mean), ``df`` (animals - 1), ``noncentrality``
        (effect / se) and ``power``.

    References
    ----------
    Cohen J (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed.
    Erlbaum, chapter 2.

    Snijders TAB, Bosker RJ (2012). Multilevel Analysis, 2nd ed. Sage, chapter 11.
    """
    a = _whole_numbers(animals, "animals", 2)
    r = _whole_numbers(runs, "runs", 1)
    A, R = np.meshgrid(a, r, indexing="ij")
    result = design_power(
        effect,
        var_animal,
        var_run,
        mean_first_level_variance,
        A.ravel(),
        R.ravel(),
        alpha=alpha,
        sided=sided,
    )
    return pd.DataFrame(
        {
            "animals": A.ravel(),
            "runs": R.ravel(),
            "se": result["se"],
            "df": result["df"],
            "noncentrality": result["noncentrality"],
            "power": result["power"],
        },
        columns=list(GRID_COLUMNS),
    )


def session_grid(
    effect: float,
    var_animal: float,
    var_session: float,
    var_run: float,
    mean_first_level_variance: float,
    *,
    animals: Iterable[int] = DEFAULT_ANIMALS,
    sessions: Iterable[int] = DEFAULT_SESSIONS,
    runs: Iterable[int] = DEFAULT_RUNS_PER_SESSION,
    varies: str = "animal",
    alpha: float = DEFAULT_ALPHA,
    sided: str = "two",
) -> pd.DataFrame:
    """Power over a grid of animals × sessions per animal × runs per session.

    Parameters
    ----------
    effect
        The effect to detect.
    var_animal, var_session, var_run, mean_first_level_variance
        τ² of the tested effect (the slope variance for a within-animal difference), ω²,
        σ² and s̄²; each >= 0.
    animals, sessions, runs
        Whole numbers of animals (>= 2), sessions per animal (>= 1; even, >= 2, for an
        effect that varies between sessions, half of them each way) and runs per session
        (>= 1), without repeats.
    varies
        What the effect varies between (:func:`animal_variance`).
    alpha, sided
        Significance level and sidedness.

    Returns
    -------
    pandas.DataFrame
        One row per design (animals slowest, runs fastest) with the columns
        :data:`SESSION_GRID_COLUMNS`. The last two say what one more session of ``runs``
        runs buys against adding the same runs to the existing sessions; for an
        effect that varies between sessions one more session means two (one each way).

    References
    ----------
    Snijders TAB, Bosker RJ (2012). Multilevel Analysis, 2nd ed. Sage, chapter 11.
    """
    a = _whole_numbers(animals, "animals", 2)
    s = _whole_numbers(sessions, "sessions", 1)
    r = _whole_numbers(runs, "runs", 1)
    step = 1
    if varies == "session":
        if np.any(s % 2):
            raise ValueError(
                "sessions must be even for an effect that varies between sessions (half "
                f"of them each way), got {s.tolist()}"
            )
        step = 2
    A, S, R = (x.ravel() for x in np.meshgrid(a, s, r, indexing="ij"))
    kw = {"alpha": alpha, "sided": sided, "var_session": var_session, "varies": varies}
    args = (effect, var_animal, var_run, mean_first_level_variance)
    now = design_power(*args, A, R, sessions=S, **kw)
    more_sessions = design_power(*args, A, R, sessions=S + step, **kw)
    more_runs = design_power(*args, A, R * (S + step) / S, sessions=S, **kw)
    return pd.DataFrame(
        {
            "animals": A,
            "sessions": S,
            "runs": R,
            "se": now["se"],
            "df": now["df"],
            "noncentrality": now["noncentrality"],
            "power": now["power"],
            "power_one_more_session": more_sessions["power"],
            "power_same_runs_in_sessions": more_runs["power"],
        },
        columns=list(SESSION_GRID_COLUMNS),
    )


def _whole_numbers(values: Iterable[int], what: str, smallest: int) -> np.ndarray:
    raw = np.asarray(list(values), dtype=float).reshape(-1)
    if raw.size == 0:
        raise ValueError(f"{what}: give at least one value")
    if np.any(~np.isfinite(raw)) or np.any(raw != np.round(raw)) or np.any(raw < smallest):
        raise ValueError(f"{what} must be whole numbers >= {smallest}, got {raw.tolist()}")
    out = raw.astype(np.int64)
    if np.unique(out).size != out.size:
        raise ValueError(f"{what} must not repeat a value, got {out.tolist()}")
    return out


def design_cost(
    animals: np.ndarray | float,
    runs: np.ndarray | float,
    cost_animal: float,
    cost_run: float,
    *,
    sessions: np.ndarray | float = 1.0,
    cost_session: float = 0.0,
) -> np.ndarray:
    """Cost of a design: ``A × cost_animal + A S × cost_session + A S R × cost_run``.

    ``runs`` are runs per session; with the default one session they are runs per
    animal and the session cost is not counted.
    """
    animals = np.asarray(animals, dtype=float)
    sessions = np.asarray(sessions, dtype=float)
    runs = np.asarray(runs, dtype=float)
    return animals * (
        float(cost_animal) + sessions * (float(cost_session) + runs * float(cost_run))
    )


def cheapest_design(
    grid: pd.DataFrame,
    cost_animal: float,
    cost_run: float,
    target_power: float = DEFAULT_TARGET_POWER,
    *,
    cost_session: float = 0.0,
) -> pd.Series | None:
    """The cheapest design of a grid whose power reaches the target.

    Cost is :func:`design_cost` (with the grid's ``sessions`` column when it has one).
    Among designs of equal cost (within :data:`COST_TIE_TOLERANCE`) the one with
    **fewer animals** is chosen (reduction in the use of animals: Russell & Burch 1959),
    then the one with fewer sessions, then fewer runs.

    Parameters
    ----------
    grid
        A table with columns ``animals``, ``runs`` and ``power`` (:func:`power_grid`).
    cost_animal, cost_run
        Costs of one animal and of one run (>= 0).
    target_power
        Power to reach, 0 < target_power < 1.
    cost_session
        Cost of one session beyond its runs (>= 0; used when the grid has sessions).

    Returns
    -------
    pandas.Series or None
        The grid's row with an added ``cost``; None when no design of the grid reaches
        the target.

    References
    ----------
    Snijders TAB, Bosker RJ (2012). Multilevel Analysis, 2nd ed. Sage, chapter 11
    (optimal allocation under a budget).

    Russell WMS, Burch RL (1959). The Principles of Humane Experimental Technique.
    Methuen, London (reduction).
    """
    for label, value in (
        ("cost_animal", cost_animal),
        ("cost_run", cost_run),
        ("cost_session", cost_session),
    ):
        if not (math.isfinite(value) and value >= 0):
            raise ValueError(f"{label} must be a finite number >= 0, got {value}")
    if cost_animal == 0 and cost_run == 0 and cost_session == 0:
        raise ValueError("the costs are all 0 (cost_animal and cost_run both 0): nothing to save")
    if not 0.0 < target_power < 1.0:
        raise ValueError(f"target_power must be between 0 and 1, got {target_power}")
    missing = [c for c in ("animals", "runs", "power") if c not in grid.columns]
    if missing:
        raise ValueError(f"grid lacks the column(s) {', '.join(missing)}")
    has_sessions = "sessions" in grid.columns
    cost = design_cost(
        grid["animals"].to_numpy(),
        grid["runs"].to_numpy(),
        cost_animal,
        cost_run,
        sessions=grid["sessions"].to_numpy() if has_sessions else 1.0,
        cost_session=cost_session if has_sessions else 0.0,
    )
    ok = grid["power"].to_numpy(dtype=float) >= target_power
    if not ok.any():
        return None
    best = cost[ok].min()
    tie = ok & (cost <= best * (1.0 + COST_TIE_TOLERANCE))
    candidates = grid.loc[tie].assign(cost=cost[tie])
    order = ["animals", "sessions", "runs"] if has_sessions else ["animals", "runs"]
    candidates = candidates.sort_values(order, kind="stable")
    return candidates.iloc[0]


__all__ = [
    "GRID_COLUMNS",
    "SESSION_GRID_COLUMNS",
    "animal_variance",
    "cheapest_design",
    "design_cost",
    "design_power",
    "power_grid",
    "session_grid",
]
