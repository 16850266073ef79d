"""Is a difference consistent across animals?

The consistency question of a group mean (:func:`grouplevel.questions.specificity.consistency`)
counts the animals whose own target effect has the group's sign. A difference needs
its own version, and which one depends on where the difference lies:

* **Within animals** (conditions compared in the same animals, drug − vehicle sessions):
  every animal carries its own difference. :func:`within_animal_consistency` estimates
  it from the animal's runs alone, generalised least squares over its runs and
  sessions (weights from the fitted run and session variances and the first-level
  variances), with its standard error and 95% CI, and counts the animals with the
  group's sign as the mean's consistency does. Heterogeneity of the animals'
  differences is Cochran's Q and I² of an inverse-variance meta-analysis; the group
  difference left out one animal at a time is the fixed-components downdate of the
  fitted model (:func:`grouplevel.model.leave_one_out.leave_one_animal_out_model`).
* **Between groups** (genotype): no animal carries the difference; every animal belongs
  to one side. :func:`group_overlap` describes how each group's animals spread and how
  much the groups overlap: the probability of superiority ``A = P(X₊ > X₋) + ½ P(X₊ =
  X₋)`` (the Mann–Whitney U divided by ``n₊ n₋``, the area under the ROC curve), with
  DeLong's variance and a 95% CI on the logit scale.

Pure: arrays in, frozen dataclasses out.

References
----------
Cochran, W. G. (1954). The combination of estimates from different experiments.
Biometrics 10:101–129.

Higgins, J. P. T., & Thompson, S. G. (2002). Quantifying heterogeneity in a
meta-analysis. Statistics in Medicine 21:1539–1558.

Mann, H. B., & Whitney, D. R. (1947). On a test of whether one of two random variables is
stochastically larger than the other. Annals of Mathematical Statistics 18:50–60.

McGraw, K. O., & Wong, S. P. (1992). A common language effect size statistic.
Psychological Bulletin 111:361–365.

DeLong, E. R., DeLong, D. M., & Clarke-Pearson, D. L. (1988). Comparing the areas under
two or more correlated receiver operating characteristic curves: a nonparametric
approach. Biometrics 44:837–845.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from grouplevel.distributions import chi2_sf, norm_ppf
from grouplevel.errors import ArgumentError
from grouplevel.model.animals import VARIANCE_FLOOR

#: Confidence level of the animals' and the overlap's intervals (common practice).
CONFIDENCE_LEVEL = 0.95
_Z_CRIT = float(norm_ppf(0.5 + CONFIDENCE_LEVEL / 2.0))
#: Relative tolerance of the estimability check of a contrast within one animal (our own
#: choice: far above the rounding of a pseudo-inverse of a few runs).
_ESTIMABLE_TOL = 1e-8

ANIMAL_COLUMNS = (
    "animal",
    "runs",
    "effect",
    "se",
    "ci_low",
    "ci_high",
    "positive",
    "ci_above_zero",
    "loo_effect",
    "loo_t",
    "loo_change",
)


def _float(x) -> float | None:
    x = float(x)
    return x if np.isfinite(x) else None


@dataclass(frozen=True)
class Heterogeneity:
    """Cochran's Q of the animals' differences, its p (χ², k − 1 df) and I²."""

    q: float
    df: int
    p: float
    i_squared: float
    pooled: float

    def summary(self) -> dict:
        return {
            "cochran_q": _float(self.q),
            "df": int(self.df),
            "p": _float(self.p),
            "i_squared": _float(self.i_squared),
            "fixed_effect_mean": _float(self.pooled),
        }


def heterogeneity(effect: np.ndarray, se: np.ndarray) -> Heterogeneity:
    """Cochran's Q and I² of estimates with standard errors (NaN/0 SE left out).

    ``Q = Σ w_i (y_i − ȳ_w)²`` with ``w_i = 1 / se_i²`` and ``ȳ_w`` the inverse-variance
    mean; ``I² = max(0, (Q − (k − 1)) / Q)``.

    References
    ----------
    Cochran WG (1954). Biometrics 10:101-129.

    Higgins JPT, Thompson SG (2002). Stat Med 21:1539-1558.
    """
    effect = np.asarray(effect, dtype=float).ravel()
    se = np.asarray(se, dtype=float).ravel()
    ok = np.isfinite(effect) & np.isfinite(se) & (se > 0)
    k = int(ok.sum())
    if k < 2:
        return Heterogeneity(np.nan, max(k - 1, 0), np.nan, np.nan, np.nan)
    w = 1.0 / se[ok] ** 2
    pooled = float(np.sum(w * effect[ok]) / w.sum())
    q = float(np.sum(w * (effect[ok] - pooled) ** 2))
    i2 = max(0.0, (q - (k - 1)) / q) if q > 0 else 0.0
    return Heterogeneity(q, k - 1, float(chi2_sf(q, k - 1)), i2, pooled)


@dataclass(frozen=True)
class DifferenceConsistency:
    """The target difference animal by animal (a within-animal difference).

    Attributes
    ----------
    animals
        One row per animal, columns :data:`ANIMAL_COLUMNS` (the same as the mean's
        consistency table): the animal's own difference, its SE and 95% CI, whether it
        is positive and whether the CI lies above 0, and the group difference without
        the animal (``loo_effect``, ``loo_t``, ``loo_change`` = LOO − full).
    effect, se, t, df, p
        The group difference of the target values under the fitted model.
    heterogeneity
        Cochran's Q and I² of the animals' differences.
    not_estimable
        Animals whose runs cannot estimate the difference on their own (e.g. they have
        runs of one condition only).
    """

    animals: pd.DataFrame
    effect: float
    se: float
    t: float
    df: float
    p: float
    heterogeneity: Heterogeneity
    not_estimable: tuple[str, ...]

    def table(self) -> pd.DataFrame:
        return self.animals.copy()

    def summary(self) -> dict:
        """Plain JSON types, with the keys of the mean's consistency summary."""
        change = self.animals["loo_change"].to_numpy(dtype=float)
        finite = np.isfinite(change)
        worst = int(np.argmax(np.where(finite, np.abs(change), -np.inf))) if finite.any() else -1
        loo = self.animals["loo_effect"].to_numpy(dtype=float)
        has = self.animals["runs"].to_numpy() > 0
        return {
            "effect": _float(self.effect),
            "se": _float(self.se),
            "t": _float(self.t),
            "df": _float(self.df),
            "p": _float(self.p),
            "animals": int(has.sum()),
            "animals_positive": int(self.animals["positive"].sum()),
            "animals_ci_above_zero": int(self.animals["ci_above_zero"].sum()),
            "animals_not_estimable": list(self.not_estimable),
            "most_influential_animal": str(self.animals["animal"].iloc[worst])
            if worst >= 0
            else "",
            "most_influential_change": _float(change[worst]) if worst >= 0 else None,
            "loo_effect_range": [_float(np.nanmin(loo)), _float(np.nanmax(loo))]
            if np.isfinite(loo).any()
            else [None, None],
            "heterogeneity": self.heterogeneity.summary(),
        }


def _estimable(Xa: np.ndarray, c: np.ndarray) -> bool:
    """Whether ``cᵀβ`` is estimable from the rows ``Xa`` (``c`` in their row space)."""
    if Xa.shape[0] == 0:
        return False
    projected = np.linalg.pinv(Xa) @ Xa @ c
    return bool(np.max(np.abs(projected - c)) <= _ESTIMABLE_TOL * max(1.0, np.abs(c).max()))


def own_differences(
    values: np.ndarray,
    variances: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    c: np.ndarray,
    *,
    var_run: float,
    var_session: float = 0.0,
    session: np.ndarray | None = None,
    n_animals: int | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Each animal's own estimate of ``cᵀβ`` from its runs alone (GLS).

    Within animal ``a`` the runs' covariance is ``σ² I + ω² S_a + diag(s_k²)`` (run and
    session variances; the animal's own random intercept and slopes are what is
    estimated, so they are not part of it). ``cᵀβ_a`` with ``β_a = (X_aᵀW X_a)⁺ X_aᵀW
    y_a``, ``W`` the inverse covariance, and its variance ``cᵀ(X_aᵀW X_a)⁺c``, when
    ``c`` is estimable from the animal's rows (an animal with runs of one condition
    only cannot estimate a condition difference). A total run variance of 0 is raised
    to :data:`grouplevel.model.animals.VARIANCE_FLOOR`; the SE is then NaN.

    Returns
    -------
    effect, se, runs, estimable
        ``(m,)`` each: the animal's difference (NaN when not estimable), its SE, its
        runs with data and whether the difference is estimable from them.
    """
    values = np.asarray(values, dtype=float).ravel()
    X = np.asarray(X, dtype=float)
    animal = np.asarray(animal, dtype=np.int64).ravel()
    c = np.asarray(c, dtype=float).ravel()
    n = values.size
    if X.shape != (n, c.size) or animal.shape != (n,):
        raise ArgumentError(
            f"own_differences: {n} values, a design of shape {X.shape}, {animal.size} animal "
            f"codes and {c.size} contrast weights do not agree."
        )
    s2 = np.zeros(n) if variances is None else np.asarray(variances, dtype=float).ravel()
    present = np.isfinite(values) & np.isfinite(s2)
    m = int(n_animals if n_animals is not None else animal.max() + 1)
    effect = np.full(m, np.nan)
    se = np.full(m, np.nan)
    runs = np.zeros(m, dtype=np.int64)
    estimable = np.zeros(m, dtype=bool)
    sig2 = float(np.nan_to_num(var_run))
    om2 = float(np.nan_to_num(var_session))
    for a in range(m):  # one small solve per animal (target values, not voxels)
        rows = (animal == a) & present
        runs[a] = int(rows.sum())
        Xa = X[rows]
        if not _estimable(Xa, c):
            continue
        estimable[a] = True
        cov = np.diag(sig2 + s2[rows])
        if session is not None and om2 > 0:
            sa = np.asarray(session)[rows]
            cov = cov + om2 * (sa[:, None] == sa[None, :])
        floored = np.diag(cov).max() < VARIANCE_FLOOR
        cov = cov + np.diag(np.where(np.diag(cov) < VARIANCE_FLOOR, VARIANCE_FLOOR, 0.0))
        W = np.linalg.inv(cov)
        info = np.linalg.pinv(Xa.T @ W @ Xa)
        effect[a] = float(c @ info @ Xa.T @ W @ values[rows])
        var = float(c @ info @ c)
        se[a] = np.sqrt(var) if var > 0 and not floored else np.nan
    return effect, se, runs, estimable


def within_animal_consistency(
    values: np.ndarray,
    variances: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    animal_ids: Sequence[str],
    c: np.ndarray,
    *,
    group: tuple[float, float, float, float, float],
    loo_effect: np.ndarray,
    loo_t: np.ndarray,
    var_run: float,
    var_session: float = 0.0,
    session: np.ndarray | None = None,
) -> DifferenceConsistency:
    """Consistency of a within-animal difference across animals.

    Parameters
    ----------
    values, variances
        ``(n_runs,)`` the target-region value of each run and its first-level variance
        (or None).
    X, animal, animal_ids, c
        The group design, animal codes ``0..m-1``, animal names and the contrast.
    group
        ``(effect, se, t, df, p)`` of the group difference of the target values under
        the fitted model.
    loo_effect, loo_t
        ``(m,)`` the group difference and its t without each animal.
    var_run, var_session, session
        The fitted run and session variances of the target values and the runs'
        session codes (None without a session level).

    Returns
    -------
    DifferenceConsistency
    """
    ids = [str(a) for a in animal_ids]
    m = len(ids)
    effect, se, runs, estimable = own_differences(
        values,
        variances,
        X,
        animal,
        c,
        var_run=var_run,
        var_session=var_session,
        session=session,
        n_animals=m,
    )
    loo_effect = np.asarray(loo_effect, dtype=float).ravel()
    loo_t = np.asarray(loo_t, dtype=float).ravel()
    if loo_effect.shape != (m,) or loo_t.shape != (m,):
        raise ArgumentError(f"within_animal_consistency: give {m} leave-one-out values.")
    lo, hi = effect - _Z_CRIT * se, effect + _Z_CRIT * se
    has = runs > 0
    table = pd.DataFrame(
        {
            "animal": ids,
            "runs": runs,
            "effect": effect,
            "se": se,
            "ci_low": lo,
            "ci_high": hi,
            "positive": has & (np.nan_to_num(effect) > 0),
            "ci_above_zero": has & (np.nan_to_num(lo, nan=-np.inf) > 0),
            "loo_effect": loo_effect,
            "loo_t": loo_t,
            "loo_change": loo_effect - group[0],
        },
        columns=list(ANIMAL_COLUMNS),
    )
    return DifferenceConsistency(
        animals=table,
        effect=float(group[0]),
        se=float(group[1]),
        t=float(group[2]),
        df=float(group[3]),
        p=float(group[4]),
        heterogeneity=heterogeneity(effect, se),
        not_estimable=tuple(i for i, h, e in zip(ids, has, estimable, strict=True) if h and not e),
    )


# ----------------------------------------------------------------------------------------
# between groups: spread within each group, overlap between them
# ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Overlap:
    """Probability of superiority of one set of values over another.

    ``a`` is ``P(X₊ > X₋) + ½ P(X₊ = X₋)`` over all pairs; ``se`` DeLong's standard
    error; ``ci`` a 95% interval on the logit scale (NaN at complete separation, where
    the variance estimate is 0); ``p`` the two-sided Mann–Whitney p (scipy).
    """

    a: float
    se: float
    ci: tuple[float, float]
    p: float
    n_plus: int
    n_minus: int

    @property
    def separated(self) -> bool:
        """Every value of one set lies above every value of the other."""
        return self.a in (0.0, 1.0)


def probability_of_superiority(plus: np.ndarray, minus: np.ndarray) -> Overlap:
    """``A = P(X₊ > X₋) + ½ P(X₊ = X₋)`` with DeLong's variance and a 95% CI.

    The placement values ``V₁₀(x) = mean_j ψ(x, y_j)`` and ``V₀₁(y) = mean_i ψ(x_i, y)``
    (ψ = 1, ½, 0 for >, =, <) give ``var(A) = s₁₀² / n₊ + s₀₁² / n₋`` with the sample
    variances ``s²`` of the placements (DeLong et al. 1988). The interval is the Wald
    interval of ``logit A`` (variance ``var(A) / (A(1 − A))²``), so it stays in (0, 1).

    References
    ----------
    DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Biometrics 44:837-845.

    McGraw KO, Wong SP (1992). Psychol Bull 111:361-365.

    Mann HB, Whitney DR (1947). Ann Math Stat 18:50-60.
    """
    x = np.asarray(plus, dtype=float).ravel()
    y = np.asarray(minus, dtype=float).ravel()
    x, y = x[np.isfinite(x)], y[np.isfinite(y)]
    if x.size < 1 or y.size < 1:
        raise ArgumentError("probability_of_superiority: each set needs a finite value.")
    psi = (x[:, None] > y[None, :]) + 0.5 * (x[:, None] == y[None, :])
    a = float(psi.mean())
    v10, v01 = psi.mean(axis=1), psi.mean(axis=0)
    var = 0.0
    if x.size > 1:
        var += float(np.var(v10, ddof=1)) / x.size
    if y.size > 1:
        var += float(np.var(v01, ddof=1)) / y.size
    se = float(np.sqrt(var))
    ci = (np.nan, np.nan)
    if 0.0 < a < 1.0 and var > 0:
        logit = np.log(a / (1.0 - a))
        half = _Z_CRIT * se / (a * (1.0 - a))
        ci = (
            float(1.0 / (1.0 + np.exp(-(logit - half)))),
            float(1.0 / (1.0 + np.exp(-(logit + half)))),
        )
    from scipy import stats  # only for this test: scipy.stats loads in 0.4 s

    p = float(stats.mannwhitneyu(x, y, alternative="two-sided").pvalue)
    return Overlap(a=a, se=se, ci=ci, p=p, n_plus=int(x.size), n_minus=int(y.size))


@dataclass(frozen=True)
class GroupOverlap:
    """How the animals of the two sides of a group difference spread and overlap.

    Attributes
    ----------
    animals
        One row per animal of either side: ``animal, side, group, runs, effect, se,
        ci_low, ci_high`` (the animal's precision-weighted target mean and its CI).
    names
        ``(plus, minus)``: the groups on each side of the difference.
    overlap
        Probability that an animal of the ``plus`` side has a larger target effect
        than one of the ``minus`` side.
    effect, se, t, df, p
        The group difference of the target values under the fitted model.
    """

    animals: pd.DataFrame
    names: tuple[str, str]
    overlap: Overlap
    effect: float
    se: float
    t: float
    df: float
    p: float

    def table(self) -> pd.DataFrame:
        return self.animals.copy()

    def spread(self) -> dict:
        """Per side: animals, median, range and animals with a positive effect."""
        out = {}
        for side, name in zip(("plus", "minus"), self.names, strict=True):
            rows = self.animals[(self.animals["side"] == side) & (self.animals["runs"] > 0)]
            e = rows["effect"].to_numpy(dtype=float)
            e = e[np.isfinite(e)]
            out[side] = {
                "group": name,
                "animals": int(e.size),
                "median": _float(np.median(e)) if e.size else None,
                "min": _float(e.min()) if e.size else None,
                "max": _float(e.max()) if e.size else None,
                "animals_positive": int((e > 0).sum()),
            }
        return out

    def summary(self) -> dict:
        o = self.overlap
        return {
            "effect": _float(self.effect),
            "se": _float(self.se),
            "t": _float(self.t),
            "df": _float(self.df),
            "p": _float(self.p),
            "groups": self.spread(),
            "probability_of_superiority": _float(o.a),
            "probability_of_superiority_se": _float(o.se),
            "probability_of_superiority_ci": [_float(o.ci[0]), _float(o.ci[1])],
            "mann_whitney_p": _float(o.p),
            "separated": bool(o.separated),
        }


def group_overlap(
    effect: np.ndarray,
    se: np.ndarray,
    runs: np.ndarray,
    side: np.ndarray,
    animal_ids: Sequence[str],
    names: tuple[str, str],
    *,
    group: tuple[float, float, float, float, float],
) -> GroupOverlap:
    """Spread of each side's animals and the overlap of the two sides.

    Parameters
    ----------
    effect, se, runs
        ``(m,)`` each animal's precision-weighted target mean, its SE and runs with
        data (:func:`grouplevel.model.animals.animal_means`).
    side
        ``(m,)`` +1 for an animal on the side the difference adds, −1 for the side it
        subtracts, 0 for an animal outside the difference.
    animal_ids, names
        Animal names; the names of the ``+1`` and ``−1`` sides.
    group
        ``(effect, se, t, df, p)`` of the group difference under the fitted model.
    """
    effect = np.asarray(effect, dtype=float).ravel()
    se = np.asarray(se, dtype=float).ravel()
    runs = np.asarray(runs).ravel()
    side = np.asarray(side).ravel()
    ids = [str(a) for a in animal_ids]
    if not (effect.size == se.size == runs.size == side.size == len(ids)):
        raise ArgumentError("group_overlap: give one effect, SE, run count and side per animal.")
    has = (runs > 0) & np.isfinite(effect)
    plus, minus = has & (side > 0), has & (side < 0)
    if not plus.any() or not minus.any():
        raise ArgumentError("group_overlap: each side of the difference needs an animal with data.")
    take = side != 0
    table = pd.DataFrame(
        {
            "animal": np.asarray(ids)[take],
            "side": np.where(side[take] > 0, "plus", "minus"),
            "group": np.where(side[take] > 0, names[0], names[1]),
            "runs": runs[take].astype(np.int64),
            "effect": effect[take],
            "se": se[take],
            "ci_low": (effect - _Z_CRIT * se)[take],
            "ci_high": (effect + _Z_CRIT * se)[take],
        }
    )
    return GroupOverlap(
        animals=table,
        names=(str(names[0]), str(names[1])),
        overlap=probability_of_superiority(effect[plus], effect[minus]),
        effect=float(group[0]),
        se=float(group[1]),
        t=float(group[2]),
        df=float(group[3]),
        p=float(group[4]),
    )
