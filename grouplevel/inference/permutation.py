"""Permutation inference on the run-within-animal mixed model, with animals as units.

Runs of one animal share its random effect, so they are never exchanged on their own:
the units of every permutation are whole animals.

* A contrast whose regressor of interest is constant across animals (the group mean,
  or the mean of a reference group with nuisance covariates) is tested by **sign
  flips** of whole animals: every run of an animal is multiplied by the same ±1.
* A contrast of animal-level covariates (a group difference, a slope over age) is
  tested by **permuting whole animals** between positions of the design.
* Nuisance covariates are handled by Freedman–Lane: the data are reduced to the
  residuals of the nuisance-only model, those are flipped or permuted, and the nuisance
  fit is added back (Winkler et al. 2014).
* A contrast of a **within-animal effect with a random slope per animal** (drug vs
  vehicle within every animal) is tested on each animal's own estimate of that effect
  (:func:`animal_effect_data`): every animal's runs are reduced to its GLS estimate of
  the effect and its precision at the fitted variance components, and whole animals'
  own effects are sign-flipped (or permuted between positions of the slope's
  animal-level design, for an effect that differs between groups) — multi-level
  exchangeability with animals as the exchangeable blocks (Winkler et al. 2015).
* Contrasts that weight a within-animal column without its random slope are refused
  (see :func:`animal_level_data`).
* An **F-test of several within-animal random slopes** flips each animal's whole
  vector of own effects: :mod:`grouplevel.inference.vector_flips`, which shares
  :func:`run_scheme` with this engine.
* With **one between-animal variance per group of animals** the animals are not
  exchangeable between groups; the errors are still symmetric, so whole animals are
  sign-flipped (Freedman–Lane residuals for a group difference) and the statistic is
  the heteroscedasticity-robust G statistic (:func:`g_statistic`; Winkler et al. 2014).

The mixed-model statistic is recomputed for every permutation, cheaply. For a design
whose columns are constant within animals, the REML likelihood separates into a
within-animal part, which depends on σ² alone and is unchanged by flipping or moving
whole animals, and an animal-level part: the precision-weighted animal means with
sampling variances ``1/Σ_k w_k``, ``w_k = 1/(σ² + s_k²)``. So σ² is estimated once from
the unpermuted data, and for every permutation τ² is re-estimated by REML on the
(permuted) animal-level data, then β by GLS and its t statistic
(:mod:`grouplevel.inference._refit_kernel`).

Per permutation the engine keeps the maximum statistic, the largest cluster extent and
cluster mass at the cluster-forming threshold and the largest TFCE score; family-wise
error (FWE) corrected p-values follow from those maxima (Nichols & Holmes 2002).

References
----------
Nichols TE, Holmes AP (2002). Nonparametric permutation tests for functional
neuroimaging: a primer with examples. Hum Brain Mapp 15:1-25.

Freedman D, Lane D (1983). A nonstochastic interpretation of reported significance
levels. J Bus Econ Stat 1:292-298.

Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014). Permutation inference
for the general linear model. NeuroImage 92:381-397.

Winkler AM, Webster MA, Vidaurre D, Nichols TE, Smith SM (2015). Multi-level block
permutation. NeuroImage 123:253-268.

Smith SM, Nichols TE (2009). Threshold-free cluster enhancement. NeuroImage 44:83-98.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from grouplevel.distributions import norm_isf, norm_ppf, t_logsf
from grouplevel.errors import ArgumentError
from grouplevel.inference import _refit_kernel
from grouplevel.inference.clusters import Clusters, ClusterWorkspace, find_clusters
from grouplevel.inference.significance import check_sided
from grouplevel.inference.tfce import TfceWorkspace
from grouplevel.inference.tfce import tfce as tfce_map
from grouplevel.machine import available_cores
from grouplevel.model.animals import VARIANCE_FLOOR, animal_means
from grouplevel.model.ftest import f_to_z

# t -> z conversion table: points on u = asinh(t) up to t = 1e8 (our own choice; the
# interpolation error is below 1e-4 in z, far below what a threshold needs).
_TZ_POINTS = 4001
_TZ_MAX_T = 1e8
_MAX_DF_TABLES = 64
# Voxels per chunk when reducing runs to animal means (keeps temporaries small).
_CHUNK_VOXELS = 16384  # runs × chunk float64 temporaries: ~25 MiB each at 200 runs
# Where σ² is folded into τ² (no animal with two runs) and a run has no first-level
# variance, its sampling variance is floored at this share of the voxel's total variance
# τ̂² + σ̂², which keeps the floor relative to the data's scale (our own choice: far below
# any variance that changes a t statistic in its leading digits).
_FOLDED_FLOOR_SHARE = 1e-10
# Tolerance (relative to the design's largest entry) when deciding that a rearranged
# design equals the design times a matrix: exact arithmetic up to rounding.
_SYMMETRY_TOL = 1e-8
_SYMMETRY_BLOCK = 4096  # rearrangements checked at once


@dataclass(frozen=True)
class AnimalLevelData:
    """The unpermuted data reduced to one value per animal and voxel.

    Attributes
    ----------
    mean
        (V, m) precision-weighted animal means (0 where the animal has no data).
    precision
        (V, m) their sampling precisions ``Σ_k 1/(σ̂² + s_k²)`` (0 where no data).
    design
        (m, p) the animal-level design (one row per animal).
    var_animal
        (V,) the REML τ̂² of the unpermuted fit (start of every refit); τ̂² + σ̂² where
        no animal has two runs with data (σ² is not identified apart from τ² there).
    """

    mean: np.ndarray
    precision: np.ndarray
    design: np.ndarray
    var_animal: np.ndarray


def animal_level_data(
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    var_run: np.ndarray,
    var_animal: np.ndarray,
    column_names: tuple[str, ...] | None = None,
) -> AnimalLevelData:
    """Reduce runs × voxels data to animal means and precisions at fixed σ̂².

    Raises
    ------
    ArgumentError
        When a design column varies within an animal (a run-level covariate): runs of
        one animal are not exchangeable when their first-level variances differ, and
        moving them across animals would break the nesting, so such designs are tested
        parametrically only.
    """
    m = int(animal.max()) + 1
    first = np.array([np.flatnonzero(animal == a)[0] for a in range(m)])
    Xa = X[first]
    varies = ~np.all(np.isclose(X, Xa[animal]), axis=0)
    if varies.any():
        names = (
            [column_names[j] for j in np.flatnonzero(varies)]
            if column_names
            else [str(j) for j in np.flatnonzero(varies)]
        )
        raise ArgumentError(
            f"the design has run-level columns ({', '.join(names)}); permutations "
            "exchange whole animals, and runs within an animal are not exchangeable (their "
            "first-level variances differ), so a run-level covariate cannot be permuted "
            "without breaking the nesting; test such designs parametrically, or use "
            "animal-level covariates."
        )
    indicator = np.zeros((m, len(animal)))
    indicator[animal, np.arange(len(animal))] = 1.0
    # σ² is told apart from τ² only by runs of one animal. Where no animal has two runs
    # with data, both add the same amount to every animal's variance, so only their sum
    # is identified, and the split chosen by the fit is arbitrary. Holding that σ̂² fixed
    # would then bound every permuted variance from below by it; put the whole sum into
    # τ² instead, which the refit re-estimates (with one run per animal and no first-level
    # variances the refit then is the ordinary one-sample t of the animals).
    var_run = np.asarray(var_run, dtype=float)
    var_animal = np.asarray(var_animal, dtype=float)
    n_vox = y.shape[1]
    mean = np.empty((n_vox, m))  # (V, m) filled directly: no transposed copy at the end
    prec = np.empty((n_vox, m))
    var_animal_used = np.empty(n_vox)
    # voxel chunks: the runs × voxels temporaries below stay chunk-sized
    for lo in range(0, n_vox, _CHUNK_VOXELS):
        sl = slice(lo, min(n_vox, lo + _CHUNK_VOXELS))
        yc = np.asarray(y[:, sl], dtype=float)
        present = np.isfinite(yc)
        vc = None if variance is None else np.asarray(variance[:, sl], dtype=float)
        if vc is not None:
            present &= np.isfinite(vc)
        within = ((indicator @ present) >= 2).any(axis=0)
        total = var_run[sl] + var_animal[sl]
        vr = np.where(within, var_run[sl], 0.0)
        var_animal_used[sl] = np.where(within, var_animal[sl], total)
        floor = np.where(
            within, VARIANCE_FLOOR, np.maximum(VARIANCE_FLOOR, _FOLDED_FLOOR_SHARE * total)
        )
        means = animal_means(
            yc, animal, n_animals=m, variance=vc, var_run=vr, present=present, floor=floor
        )
        prec[sl] = means.precision.T
        mean[sl] = np.where(means.precision > 0, means.mean, 0.0).T
    var_animal = var_animal_used
    return AnimalLevelData(
        mean=mean,
        precision=prec,
        design=Xa,
        var_animal=var_animal,
    )


# Voxels per chunk of the per-animal dense solves in :func:`animal_effect_data` (each
# chunk holds a few (chunk, runs of one animal, runs of one animal) arrays).
_EFFECT_CHUNK_VOXELS = 8192
# A per-animal coefficient counts as estimable when ``(M⁺M)`` reproduces its unit vector
# to this tolerance (common practice for rank decisions in double precision).
_ESTIMABLE_TOL = 1e-8


def animal_effect_data(
    y: np.ndarray,
    variance: np.ndarray | None,
    own: np.ndarray,
    target: int | np.ndarray,
    animal: np.ndarray,
    design: np.ndarray,
    var_run: np.ndarray,
    var_effect: np.ndarray,
    *,
    session: np.ndarray | None = None,
    var_session: np.ndarray | None = None,
    offset: np.ndarray | None = None,
) -> AnimalLevelData:
    """Reduce each animal's runs to its own GLS estimate of one effect and its precision.

    For animal a with runs r, the runs are regressed on the animal's own design
    ``[1, own[r]]`` (intercept and its within-animal effects) by generalised least
    squares with the within-animal covariance ``diag(σ̂² + s_k²) + ω̂² S Sᵀ`` (``S`` the
    runs × sessions indicator; ω̂² = 0 without sessions). Coefficient ``target`` of that
    fit (0: the animal's intercept; 1 + i: its own i-th within-animal effect) and
    ``1 / Var`` of it are the animal-level data. Across animals that estimate follows
    ``design · γ + η_a + ε_a`` with ``η_a ~ N(0, var_effect)`` (the random intercept or
    slope) and ``ε_a`` of the computed precision, which is the model the permutation
    refit re-estimates.

    Parameters
    ----------
    y, variance
        (n_runs, V) effects and first-level variances (NaN: no data).
    own
        (n_runs, q) the within-animal columns each animal gets its own coefficient for
        (the random-slope columns); q may be 0.
    target
        Which coefficient of ``[1, own]`` is reduced, or (1 + q,) weights of a
        combination of them (e.g. condition B minus condition C).
    animal
        (n_runs,) animal codes 0..m-1.
    design
        (m, r) the animal-level design of the target (its rows are one per animal).
    var_run, var_effect
        (V,) fitted σ̂² and the target's between-animal variance (start of each refit).
    session, var_session
        (n_runs,) session codes and (V,) ω̂², or None.
    offset
        (n_runs, V) fixed-effect fit of within-animal columns without a random slope
        (nuisance), subtracted from ``y`` first; None for none.

    Returns
    -------
    AnimalLevelData
        Animals without information on the target at a voxel (fewer runs than
        coefficients, or the target column constant over their runs there) get
        precision 0.

    References
    ----------
    Winkler AM, Webster MA, Vidaurre D, Nichols TE, Smith SM (2015). Multi-level block
    permutation. NeuroImage 123:253-268.
    """
    own = np.asarray(own, dtype=float).reshape(len(animal), -1)
    m = int(animal.max()) + 1
    n_vox = y.shape[1]
    mean = np.zeros((n_vox, m))
    prec = np.zeros((n_vox, m))
    var_run = np.asarray(var_run, dtype=float)
    omega = None if session is None else np.asarray(var_session, dtype=float)
    for a in range(m):  # a loop over animals; every voxel at once inside
        rows = np.flatnonzero(animal == a)
        Xa = np.column_stack([np.ones(rows.size), own[rows]])
        same = None
        if session is not None:
            same = (session[rows][:, None] == session[rows][None, :]).astype(float)
        for lo in range(0, n_vox, _EFFECT_CHUNK_VOXELS):
            sl = slice(lo, min(n_vox, lo + _EFFECT_CHUNK_VOXELS))
            b, v = _own_fit(
                y,
                variance,
                offset,
                rows,
                sl,
                Xa,
                target,
                var_run[sl],
                None if omega is None else omega[sl],
                same,
            )
            mean[sl, a] = b
            prec[sl, a] = v
    return AnimalLevelData(
        mean=np.ascontiguousarray(mean),
        precision=np.ascontiguousarray(prec),
        design=np.asarray(design, dtype=float).reshape(m, -1),
        var_animal=np.asarray(var_effect, dtype=float).copy(),
    )


def _own_fit(y, variance, offset, rows, sl, Xa, target, var_run, omega, same):
    """GLS estimate and precision of one coefficient for one animal, chunk of voxels."""
    coef, M, Minv = _own_gls(y, variance, offset, rows, sl, Xa, var_run, omega, same)
    k = Xa.shape[1]
    if np.ndim(target) == 0:
        unit = np.zeros(k)
        unit[int(target)] = 1.0
    else:
        unit = np.asarray(target, dtype=float)
    recon = unit @ np.einsum("vkl,vlj->vkj", Minv, M)
    scale = max(1.0, float(np.abs(unit).max()))
    estimable = np.all(np.abs(recon - unit) < _ESTIMABLE_TOL * max(1.0, k) * scale, axis=1)
    var_t = np.einsum("k,vkl,l->v", unit, Minv, unit)
    ok = estimable & (var_t > 0) & np.isfinite(var_t)
    with np.errstate(divide="ignore", invalid="ignore"):
        precision = np.where(ok, 1.0 / var_t, 0.0)
    return np.where(ok, coef @ unit, 0.0), precision


def _own_gls(y, variance, offset, rows, sl, Xa, var_run, omega, same):
    """One animal's GLS fit on its own design ``Xa``, chunk of voxels: the coefficients
    (v, k), the information ``M = XaᵀV⁻¹Xa`` (v, k, k) and its pseudo-inverse."""
    yc = np.asarray(y[rows, sl], dtype=float).T  # (v, n_a)
    if offset is not None:
        yc = yc - np.asarray(offset[rows, sl], dtype=float).T
    present = np.isfinite(yc)
    s2 = np.zeros_like(yc)
    if variance is not None:
        vc = np.asarray(variance[rows, sl], dtype=float).T
        present &= np.isfinite(vc)
        s2 = np.where(present, vc, 0.0)
    d = np.maximum(var_run[:, None] + s2, VARIANCE_FLOOR)
    n_a = rows.size
    cov = np.zeros((yc.shape[0], n_a, n_a))
    if same is not None:
        cov += omega[:, None, None] * same[None]
    cov[:, np.arange(n_a), np.arange(n_a)] += d
    # runs without data: uncoupled, unit variance, zero rows of design and data
    off = ~present
    both = off[:, :, None] | off[:, None, :]
    cov = np.where(both, 0.0, cov)
    cov[:, np.arange(n_a), np.arange(n_a)] = np.where(
        off, 1.0, cov[:, np.arange(n_a), np.arange(n_a)]
    )
    Xv = np.where(present[:, :, None], Xa[None], 0.0)  # (v, n_a, k)
    yv = np.where(present, yc, 0.0)
    L = np.linalg.cholesky(cov)
    Xw = np.linalg.solve(L, Xv)
    yw = np.linalg.solve(L, yv[..., None])[..., 0]
    M = np.einsum("vnk,vnl->vkl", Xw, Xw)
    Minv = np.linalg.pinv(M, hermitian=True)
    coef = np.einsum("vkl,vnl,vn->vk", Minv, Xw, yw)
    return coef, M, Minv


def partition_design(design: np.ndarray, c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split a design into the regressor of interest and nuisance for contrast ``c``.

    Returns ``(x_interest (m,), nuisance (m, p-1))`` with ``[x_interest, nuisance] =
    design · A⁻¹``, where the first row of ``A`` is ``cᵀ`` and the others span the null
    space of ``cᵀ``. The new design spans the same space, the coefficient of
    ``x_interest`` is ``cᵀβ``, and under the null hypothesis ``cᵀβ = 0`` the model is the
    nuisance alone — the reduced model of Freedman–Lane (Winkler et al. 2014, §
    "Permutation strategies"; reparametrisation of the kind in their Appendix A).
    For ``c`` on the intercept, ``x_interest`` is the constant column.

    ``c`` may also be a (q, p) matrix of linearly independent rows (an F-test): then
    ``x_interest`` is (m, q), its coefficients are ``Cβ``, and the nuisance is the
    (m, p − q) part of the design that ``Cβ = 0`` leaves.
    """
    rows = np.asarray(c, dtype=float)
    L = np.atleast_2d(rows)
    q = L.shape[0]
    _, _, vt = np.linalg.svd(L)
    A = np.vstack([L, vt[q:]])  # rows: the contrast rows, then an orthonormal basis ⟂ them
    new = design @ np.linalg.inv(A)
    if rows.ndim == 1:
        return new[:, 0], new[:, 1:]
    return new[:, :q], new[:, q:]


@dataclass(frozen=True)
class PermutationScheme:
    """Which permutations are run.

    Attributes
    ----------
    kind
        ``"sign flips"`` or ``"animal permutations"``.
    signs
        (n, m) ±1 per permutation and animal position (all +1 for permutations).
    orders
        (n, m) which animal's residual goes to each design position (identity for flips).
    exhaustive
        True when every distinct permutation is enumerated.
    n_distinct
        Number of distinct permutations (may be astronomically large: a float).
    smallest_p
        The smallest p-value that these permutations can give: ``n_equivalent / n``
        for an exhaustive scheme, ``1 / n`` for a random one.
    n_equivalent
        How many of the enumerated rearrangements (the identity included) give the
        observed statistic back for any data: the design symmetries of the test (see
        :func:`count_design_symmetries`). 1 for a random scheme.
    """

    kind: str
    signs: np.ndarray
    orders: np.ndarray
    exhaustive: bool
    n_distinct: float
    smallest_p: float
    n_equivalent: int = 1

    @property
    def n(self) -> int:
        return int(self.signs.shape[0])


def count_design_symmetries(
    design: np.ndarray, rearranged: np.ndarray, sided: str = "two", n_interest: int | None = None
) -> int:
    """How many rearranged designs give the same statistic as the design itself.

    A rearrangement moves (or flips) the animals' data; testing the rearranged data on
    the design ``D = [x_interest, nuisance]`` is the same as testing the data on the
    rearranged design ``A``. When ``A = D·M`` for an invertible ``M`` whose first row
    is ``±e₀ᵀ`` — the nuisance columns keep no part of the regressor of interest, and
    that regressor maps onto ± itself plus nuisance — both designs span the same space
    and their coefficient of interest is the same up to sign, so the t statistic is
    ``±t`` for every data set, and so are the refitted variance components (REML sees
    the data only through the residuals off that space). Such rearrangements form a
    group, which pairs every rearrangement with the same number of others, so an
    exhaustive test cannot give a p below (group size) / (rearrangements).

    Examples: all animals flipped (``M = −1`` on the regressor of interest) for a
    two-sided sign-flip test; the two label sets swapped in a balanced two-group
    comparison, two-sided.

    Parameters
    ----------
    design
        (m, p) ``[x_interest, nuisance]`` of full column rank.
    rearranged
        (n, m, p) the design as rearranged by each enumerated rearrangement.
    sided
        ``"two"`` counts M with ±e₀ᵀ (|t| unchanged); one-sided tests only +e₀ᵀ.
    n_interest
        For an F-test, the number q of leading columns of interest. F tests the
        hypothesis that the data lie in the nuisance span, which stays the same whenever
        ``M[:q, q:] = 0`` (the rearranged nuisance columns keep no part of the columns of
        interest); any invertible mixing of the columns of interest leaves F unchanged,
        so there is no sign condition (F is two-sided by nature).

    Returns
    -------
    int
        The number of rearrangements equivalent to the identity (the identity included).

    References
    ----------
    Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014). Permutation
    inference for the general linear model. NeuroImage 92:381-397 (exchangeability
    blocks and the permutation group of a design).
    """
    D = np.asarray(design, dtype=float)
    tol = _SYMMETRY_TOL * max(1.0, float(np.abs(D).max()))
    pinv = np.linalg.pinv(D)
    count = 0
    # blocks of rearrangements keep the (n, m, p) temporaries small
    for lo in range(0, rearranged.shape[0], _SYMMETRY_BLOCK):
        A = np.asarray(rearranged[lo : lo + _SYMMETRY_BLOCK], dtype=float)
        M = pinv @ A  # (n, p, p) least-squares solutions of D·M = A
        exact = np.abs(A - D @ M).max(axis=(1, 2)) <= tol
        if n_interest is not None:
            q = n_interest
            upper = np.abs(M[:, :q, q:]).max(axis=(1, 2), initial=0.0) <= tol
            count += int(np.sum(exact & upper))
            continue
        first = M[:, 0, :]
        rest_zero = np.abs(first[:, 1:]).max(axis=1, initial=0.0) <= tol
        plus = np.abs(first[:, 0] - 1.0) <= tol
        minus = np.abs(first[:, 0] + 1.0) <= tol
        keeps = plus | minus if sided == "two" else plus
        count += int(np.sum(exact & rest_zero & keeps))
    return count


def is_mean_contrast(x_interest: np.ndarray, nuisance: np.ndarray) -> bool:
    """Whether the contrast changes when every animal's data shift by one constant.

    Such a contrast (the group mean, the mean of one group, the mean over groups) is
    tested by sign flips: permuting animals keeps a common shift in the data, so it
    cannot test whether a mean is zero. A contrast that a common shift leaves alone (a
    difference between groups, a slope) is tested by permuting animals. When the
    constant is not in the design's span, a regressor of interest that is the same for
    every animal is taken as a mean (Winkler et al. 2014, sign flips for one-sample
    tests). ``x_interest`` may be (m, q), the columns of interest of an F-test: it is a
    mean test when a common shift moves any of them.
    """
    D = np.column_stack([x_interest, nuisance]).astype(float)
    q = np.asarray(x_interest).reshape(D.shape[0], -1).shape[1]
    ones = np.ones(D.shape[0])
    w, *_ = np.linalg.lstsq(D, ones, rcond=None)
    tol = _SYMMETRY_TOL * max(1.0, float(np.abs(D).max()))
    if np.abs(D @ w - ones).max() <= tol:
        return bool(np.abs(w[:q]).max() > tol)
    return bool(np.allclose(x_interest, x_interest[0]))


class _SignFlipped:
    """The design under every sign flip, built block by block: ``signs[k] · D``."""

    def __init__(self, design: np.ndarray, signs: np.ndarray) -> None:
        self.design, self.signs, self.shape = design, signs, (signs.shape[0], *design.shape)

    def __getitem__(self, rows: slice) -> np.ndarray:
        return self.signs[rows, :, None] * self.design[None]


class _Reordered:
    """The design under every animal permutation, block by block: ``D[orders[k]]``."""

    def __init__(self, design: np.ndarray, orders: np.ndarray) -> None:
        self.design, self.orders, self.shape = design, orders, (orders.shape[0], *design.shape)

    def __getitem__(self, rows: slice) -> np.ndarray:
        return self.design[self.orders[rows]]


def plan_permutations(
    x_interest: np.ndarray,
    nuisance: np.ndarray,
    n_requested: int,
    rng: np.random.Generator,
    sided: str = "two",
    f_test: bool = False,
) -> PermutationScheme:
    """Choose sign flips or animal permutations and enumerate or draw them.

    All distinct permutations are enumerated when there are no more than requested
    (an exact test); otherwise ``n_requested`` are drawn at random with the identity
    first. The identity is always counted. The smallest attainable p of an exhaustive
    scheme counts the rearrangements that give the observed statistic back
    (:func:`count_design_symmetries`): 2/2ᵐ for two-sided sign flips, 2/C(m, m/2)
    for a balanced two-group comparison, two-sided. With ``f_test`` the (m, q)
    ``x_interest`` holds the columns of an F-test, whose design symmetries are counted
    as F's (e.g. 3!/C(6; 2,2,2) for a balanced three-group comparison).
    """
    m = x_interest.shape[0]
    n_interest = np.asarray(x_interest).reshape(m, -1).shape[1] if f_test else None
    if n_requested < 1:
        raise ArgumentError(f"n_permutations must be at least 1, got {n_requested}")
    if is_mean_contrast(x_interest, nuisance):
        n_distinct = 2.0**m
        if n_distinct <= n_requested:
            bits = (np.arange(2**m)[:, None] >> np.arange(m)[None, :]) & 1
            signs = 1 - 2 * bits  # row 0 is the identity
            exhaustive = True
        else:
            signs = rng.choice(np.array([-1, 1]), size=(n_requested, m))
            signs[0] = 1
            exhaustive = False
        orders = np.tile(np.arange(m), (signs.shape[0], 1))
        n = signs.shape[0]
        same = 1
        if exhaustive:
            D = np.column_stack([x_interest, nuisance])
            same = count_design_symmetries(D, _SignFlipped(D, signs), sided, n_interest)
        return PermutationScheme(
            "sign flips", signs.astype(np.int8), orders, exhaustive, n_distinct, same / n, same
        )
    rows = np.column_stack([x_interest, nuisance]).round(12)
    _, cls = np.unique(rows, axis=0, return_inverse=True)
    cls = cls.reshape(-1)
    counts = np.bincount(cls)
    n_distinct = math.factorial(m) / math.prod(math.factorial(int(k)) for k in counts)
    if n_distinct <= n_requested:
        orders = _distinct_orders(cls)
        exhaustive = True
    else:
        orders = np.empty((n_requested, m), dtype=np.intp)
        orders[0] = np.arange(m)
        for i in range(1, n_requested):
            orders[i] = rng.permutation(m)
        exhaustive = False
    signs = np.ones(orders.shape, dtype=np.int8)
    same = 1
    if exhaustive:
        D = np.column_stack([x_interest, nuisance])
        same = count_design_symmetries(D, _Reordered(D, orders), sided, n_interest)
    n = orders.shape[0]
    return PermutationScheme(
        "animal permutations", signs, orders, exhaustive, n_distinct, same / n, same
    )


def _distinct_orders(cls: np.ndarray) -> np.ndarray:
    """Every distinct assignment of animals to design positions, identity first.

    Positions with identical design rows (same ``cls``) are interchangeable, so an
    assignment is determined by which set of animals fills each class of positions.
    """
    m = cls.size
    classes = np.unique(cls)
    positions = [np.flatnonzero(cls == k) for k in classes]
    out: list[np.ndarray] = []

    def fill(remaining: tuple[int, ...], k: int, order: np.ndarray) -> None:
        if k == len(classes):
            out.append(order.copy())
            return
        pos = positions[k]
        for chosen in itertools.combinations(remaining, len(pos)):
            order[pos] = chosen
            rest = tuple(a for a in remaining if a not in chosen)
            fill(rest, k + 1, order)

    fill(tuple(range(m)), 0, np.empty(m, dtype=np.intp))
    orders = np.array(out)
    identity = np.flatnonzero((orders == np.arange(m)).all(axis=1))
    if identity.size:  # put the identity first
        i = identity[0]
        orders[[0, i]] = orders[[i, 0]]
    return orders


class _TtoZ:
    """Tables of z (equal p) over u = asinh(|t|) per df value, for the compiled kernel.

    Non-integer df (Satterthwaite) are rounded to 0.01 when there are many distinct
    values, so the number of tables stays small; the change in z is about 1e-3 for
    df ≥ 2.
    """

    def __init__(self, df: np.ndarray) -> None:
        df = np.asarray(df, dtype=float)
        if np.unique(df).size > _MAX_DF_TABLES:
            df = np.maximum(np.round(df, 2), 0.01)
        self.df = df
        self.values, self.index = np.unique(df, return_inverse=True)
        self.index = self.index.reshape(-1)
        u = np.linspace(0.0, np.arcsinh(_TZ_MAX_T), _TZ_POINTS)
        t = np.sinh(u)
        self.u = u
        self.tables = []
        for d in self.values:
            logp = t_logsf(t, d)
            z = -norm_ppf(np.exp(np.clip(logp, -700, 0)))
            # beyond float range of p, use the asymptotic normal tail
            z = np.where(np.isfinite(z), z, np.sqrt(-2.0 * logp))
            self.tables.append(np.maximum(z, 0.0))


@dataclass(frozen=True)
class PermutationResult:
    """Observed maps and their FWE-corrected p-values from the permutation null.

    Per-voxel arrays are in-mask vectors; ``clusters`` holds the observed clusters on
    the grid.
    """

    scheme: PermutationScheme
    statistic: np.ndarray  # (V,) observed z
    p_fwe_voxel: np.ndarray
    clusters: Clusters
    cluster_forming_z: float
    p_fwe_cluster_extent: np.ndarray  # (n_clusters,)
    p_fwe_cluster_mass: np.ndarray  # (n_clusters,)
    tfce: np.ndarray | None  # (V,) observed TFCE
    p_fwe_tfce: np.ndarray | None
    null_max_stat: np.ndarray  # (n,)
    null_max_extent: np.ndarray  # (n,) voxels
    null_max_mass: np.ndarray
    null_max_tfce: np.ndarray | None


def cluster_forming_z(p: float, sided: str) -> float:
    """z threshold for a cluster-forming p (two-sided p for ``sided="two"``)."""
    return float(norm_isf(p / 2.0 if sided == "two" else p))


def _oriented(z: np.ndarray, sided: str) -> np.ndarray:
    if sided == "positive":
        return np.maximum(z, 0.0)
    if sided == "negative":
        return np.maximum(-z, 0.0)
    return np.abs(z)


def _fwe_p(observed: np.ndarray, null_max: np.ndarray) -> np.ndarray:
    """Share of permutations whose maximum reaches the observed value (identity counted)."""
    ordered = np.sort(null_max)
    count = ordered.size - np.searchsorted(
        ordered, observed - 1e-12 * np.abs(observed), side="left"
    )
    return count / ordered.size


class PermutationBackend(Protocol):
    """What :func:`permutation_test` needs of a compute backend.

    See :mod:`grouplevel.results.compute`.
    """

    @property
    def distributed(self) -> bool:
        """True when work is sent to other processes (else it runs here, in threads)."""

    def permutation_batch(self, n: int) -> int:
        """Permutations per task for a plan of ``n`` permutations."""

    def map_batches(
        self,
        func: Callable[[_PermutationWork, np.ndarray], np.ndarray],
        shared: _PermutationWork,
        batches: list[np.ndarray],
        progress: Callable[[int], None] | None = None,
    ) -> list[np.ndarray]:
        """``[func(shared, b) for b in batches]`` in order; ``progress(len(b))`` per batch."""


class MapMaxima:
    """What every rearrangement of a permutation engine ends with: the statistic's
    largest value, largest cluster extent and mass, and largest TFCE.

    A subclass provides ``statistic(k)`` (the in-mask map of rearrangement k),
    ``oriented(z)`` and the fields ``mask``, ``sided``, ``threshold``, ``connectivity``,
    ``voxel_volume_mm3``, ``use_tfce``, ``tfce_E`` and ``tfce_H``.
    """

    def volume(self, values: np.ndarray) -> np.ndarray:
        out = np.zeros(self.mask.shape)
        out[self.mask] = values
        return out

    def tfce_of(self, vol: np.ndarray) -> np.ndarray:
        return tfce_map(
            vol,
            self.mask,
            connectivity=self.connectivity,
            E=self.tfce_E,
            H=self.tfce_H,
            voxel_volume_mm3=self.voxel_volume_mm3,
            sided=self.sided,
        )

    def workspace(self) -> MaximaWorkspace:
        """Cluster and TFCE buffers for this mask and these settings (one per thread)."""
        tfce = None
        if self.use_tfce:
            tfce = TfceWorkspace(
                self.mask,
                connectivity=self.connectivity,
                E=self.tfce_E,
                H=self.tfce_H,
                voxel_volume_mm3=self.voxel_volume_mm3,
            )
        return MaximaWorkspace(ClusterWorkspace(self.mask, connectivity=self.connectivity), tfce)

    def maxima(
        self, k: int, scratch: MaximaWorkspace | None = None
    ) -> tuple[float, int, float, float]:
        """Maximum statistic, cluster extent, cluster mass and TFCE of permutation k.

        ``scratch`` (from :meth:`workspace`) is reused by the caller's later
        permutations; without it one is made for this call.
        """
        scratch = scratch if scratch is not None else self.workspace()
        z = self.statistic(k)
        max_stat = float(self.oriented(z).max())
        extent, mass = scratch.clusters.maxima(z, self.threshold, self.sided)
        max_tfce = 0.0
        if scratch.tfce is not None:
            max_tfce = scratch.tfce.scores(z, self.sided)
        return max_stat, int(extent), float(mass), max_tfce


@dataclass(frozen=True)
class MaximaWorkspace:
    """The buffers one thread reuses from one rearrangement to the next."""

    clusters: ClusterWorkspace
    tfce: TfceWorkspace | None


@dataclass(frozen=True, eq=False)
class _PermutationWork(MapMaxima):
    """Everything one permutation needs: the arrays shared by all permutations and the
    plan. Picklable, so a distributed backend can send it to each worker once."""

    # (V, q) coefficients of the nuisance-only fit at the unpermuted τ̂² on the (m, q)
    # nuisance columns Z (q = 0: none); the fit Z γ and the residuals mean − Z γ that
    # are flipped / permuted are formed voxel by voxel as the kernels read them, so no
    # (V, m) array is held beside the means
    nuisance: np.ndarray
    Z: np.ndarray
    mean: np.ndarray  # (V, m) animal-level data
    precision: np.ndarray  # (V, m)
    X_perm: np.ndarray  # (m, p) [x_interest, nuisance]
    tau2_start: np.ndarray  # (V,)
    # (V, SUMS) sums of the intercept-only refit that no permutation changes, computed once
    # (_refit_kernel.flip_invariant_sums); no rows for any other design
    sums: np.ndarray
    signs: np.ndarray  # (n, m) float
    orders: np.ndarray  # (n, m) int64
    tables: np.ndarray  # t → z tables, one row per df value
    df_row: np.ndarray  # (V,) table row of each voxel
    du: float
    mask: np.ndarray  # 3-D bool
    sided: str
    threshold: float  # cluster-forming z
    connectivity: int
    voxel_volume_mm3: float
    use_tfce: bool
    tfce_E: float
    tfce_H: float

    def statistic(self, k: int) -> np.ndarray:
        """z map (in-mask) of permutation k; k = 0 is the unpermuted data."""
        z = np.empty(self.mean.shape[0])
        _refit_kernel.refit_z_permuted(
            self.nuisance,
            self.Z,
            self.mean,
            self.precision,
            self.signs[k],
            self.orders[k],
            self.X_perm,
            self.tau2_start,
            self.sums,
            self.tables,
            self.df_row,
            self.du,
            z,
            _refit_kernel.REFIT_MAX_ITER,
            _refit_kernel.REFIT_TOL,
        )
        return z

    def oriented(self, z: np.ndarray) -> np.ndarray:
        """The statistic as it is ranked for the maximum (larger: more extreme)."""
        return _oriented(z, self.sided)

    def permuted(self, k: int) -> np.ndarray:
        """(V, m) animal-level data of permutation k (Freedman–Lane), as one array: for
        the statistics computed with numpy on the whole map."""
        fitted = self.nuisance @ self.Z.T
        residual = (self.mean - fitted)[:, self.orders[k]]
        return fitted + self.signs[k][None, :] * residual


# Smallest residual variance of a variance group, relative to the voxel's largest one,
# in the G statistic (keeps the weights finite where a group's residuals are all 0;
# our own choice, far below any variance that data resolve).
_G_VARIANCE_FLOOR = 1e-12


def g_statistic(Y: np.ndarray, X: np.ndarray, c: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """The G statistic of a rank-one contrast with one variance per group of rows.

    Ordinary least-squares residuals ``ε̂ = R Y`` (``R = I − X X⁺``) give each group's
    variance ``σ̂²_g = Σ_{a∈g} ε̂_a² / Σ_{a∈g} R_aa``; then weighted least squares with
    weights ``1/σ̂²_g(a)`` gives ``G = cᵀβ̂ / √(cᵀ(XᵀWX)⁻¹c)`` — the Aspin–Welch v for two
    group means.

    Parameters
    ----------
    Y : ndarray, shape (V, m)
    X : ndarray, shape (m, r)
    c : ndarray, shape (r,)
    groups : ndarray of int, shape (m,)

    Returns
    -------
    ndarray, shape (V,)

    References
    ----------
    Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014). Permutation
    inference for the general linear model. NeuroImage 92:381-397 (Appendix A).
    """
    n_groups = int(groups.max()) + 1
    R = np.eye(X.shape[0]) - X @ np.linalg.pinv(X)
    E = Y @ R.T
    onehot = np.zeros((X.shape[0], n_groups))
    onehot[np.arange(X.shape[0]), groups] = 1.0
    trace = np.diag(R) @ onehot
    s2 = (E * E) @ onehot / np.maximum(trace, 1e-300)
    s2 = np.maximum(s2, _G_VARIANCE_FLOOR * np.maximum(s2.max(axis=1, keepdims=True), 1e-300))
    w = 1.0 / s2[:, groups]  # (V, m)
    info = np.einsum("va,ar,as->vrs", w, X, X)
    rhs = np.einsum("va,ar,va->vr", w, X, Y)
    beta = np.linalg.solve(info, rhs[..., None])[..., 0]
    var = np.einsum("r,vrs,s->v", c, np.linalg.inv(info), c)
    return (beta @ c) / np.sqrt(var)


def g_statistic_rank(Y: np.ndarray, X: np.ndarray, C: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """The G statistic of an F-test (s = rank(C) rows) with one variance per group of rows.

    With ordinary least-squares residuals and each group's variance estimated as in
    :func:`g_statistic`, ``W = diag(1/σ̂²_g(a))`` and the weighted estimate ψ̂,

        G = ψ̂ᵀ Cᵀ (C (XᵀWX)⁻¹ Cᵀ)⁻¹ C ψ̂ / (Λ s),
        Λ = 1 + 2(s − 1)/(s(s + 2)) Σ_g (1 / Σ_{a∈g} R_aa) (1 − Σ_{a∈g} W_aa / tr W)²,

    Welch's (1951) generalisation of the F statistic to unequal variances as Winkler et
    al. (2014) write it (the formula from memory). With s = 1, Λ = 1 and G is the
    square of :func:`g_statistic`; with one group, Λ = 1 and G is the ordinary F.

    Parameters
    ----------
    Y : ndarray, shape (V, m)
    X : ndarray, shape (m, r)
    C : ndarray, shape (s, r)
    groups : ndarray of int, shape (m,)

    Returns
    -------
    ndarray, shape (V,)

    References
    ----------
    Welch BL (1951). On the comparison of several mean values: an alternative approach.
    Biometrika 38:330-336.

    Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014). Permutation
    inference for the general linear model. NeuroImage 92:381-397 (the G statistic).
    """
    C = np.atleast_2d(np.asarray(C, dtype=float))
    s = C.shape[0]
    n_groups = int(groups.max()) + 1
    R = np.eye(X.shape[0]) - X @ np.linalg.pinv(X)
    E = Y @ R.T
    onehot = np.zeros((X.shape[0], n_groups))
    onehot[np.arange(X.shape[0]), groups] = 1.0
    trace = np.diag(R) @ onehot  # (n_groups,) Σ_{a∈g} R_aa
    s2 = (E * E) @ onehot / np.maximum(trace, 1e-300)
    s2 = np.maximum(s2, _G_VARIANCE_FLOOR * np.maximum(s2.max(axis=1, keepdims=True), 1e-300))
    w = 1.0 / s2[:, groups]  # (V, m)
    info = np.einsum("va,ar,as->vrs", w, X, X)
    rhs = np.einsum("va,ar,va->vr", w, X, Y)
    beta = np.linalg.solve(info, rhs[..., None])[..., 0]
    effect = beta @ C.T  # (V, s)
    cov = np.einsum("ir,vrt,jt->vij", C, np.linalg.inv(info), C)
    quad = np.einsum("vi,vi->v", effect, np.linalg.solve(cov, effect[..., None])[..., 0])
    share = (w @ onehot) / w.sum(axis=1, keepdims=True)  # Σ_{a∈g} W_aa / tr W
    lam = 1.0 + 2.0 * (s - 1) / (s * (s + 2)) * ((1.0 - share) ** 2 / trace).sum(axis=1)
    return quad / (lam * s)


@dataclass(frozen=True, eq=False)
class _FTestWork(_PermutationWork):
    """Permutation work whose statistic is the refitted Wald F of the first q columns,
    as z at equal (upper-tail) p on (q, df)."""

    n_interest: int = 1
    df: np.ndarray = None  # type: ignore[assignment]  # (V,) denominator df

    def f_values(self, k: int) -> np.ndarray:
        f = np.empty(self.mean.shape[0])
        _refit_kernel.refit_f_permuted(
            self.nuisance,
            self.Z,
            self.mean,
            self.precision,
            self.signs[k],
            self.orders[k],
            self.X_perm,
            self.n_interest,
            self.tau2_start,
            f,
            _refit_kernel.REFIT_MAX_ITER,
            _refit_kernel.REFIT_TOL,
        )
        return f

    def statistic(self, k: int) -> np.ndarray:
        z = f_to_z(self.f_values(k), self.n_interest, self.df)
        # an unfittable voxel (NaN) or F = 0 (z = −∞) ranks as the median F
        return np.where(np.isfinite(z), z, 0.0)

    def oriented(self, z: np.ndarray) -> np.ndarray:
        # z rises with F over its whole range: no clamping at 0, so that F below its
        # median keeps its rank in the maximum (clusters and TFCE use z > 0 only)
        return z


@dataclass(frozen=True, eq=False)
class _GroupVarianceFWork(_FTestWork):
    """F-test permutation work with the rank-s G statistic (one variance per group)."""

    groups: np.ndarray = None  # type: ignore[assignment]  # (m,) variance group codes

    def f_values(self, k: int) -> np.ndarray:
        Y = self.permuted(k)
        C = np.eye(self.X_perm.shape[1])[: self.n_interest]
        return g_statistic_rank(Y, self.X_perm, C, self.groups)


@dataclass(frozen=True, eq=False)
class _GroupVarianceWork(_PermutationWork):
    """Permutation work whose statistic is the G statistic of the animal-level data."""

    groups: np.ndarray = None  # type: ignore[assignment]  # (m,) variance group codes

    def statistic(self, k: int) -> np.ndarray:
        Y = self.permuted(k)
        unit = np.zeros(self.X_perm.shape[1])
        unit[0] = 1.0
        g = g_statistic(Y, self.X_perm, unit, self.groups)
        # to z at equal p on each voxel's df (the tables of the refit kernel)
        u = np.arcsinh(np.abs(g))
        z = np.empty_like(g)
        for row in np.unique(self.df_row):  # a loop over distinct df values
            sel = self.df_row == row
            z[sel] = np.interp(u[sel], self._u_grid(), self.tables[row])
        return np.sign(g) * z

    def _u_grid(self) -> np.ndarray:
        return np.arange(self.tables.shape[1]) * self.du


def maxima_rows(
    work: _PermutationWork, ks: np.ndarray, scratch: MaximaWorkspace | None = None
) -> np.ndarray:
    """(len(ks), 4) null maxima of the permutations ``ks``: one task of a distributed run.

    ``scratch``: buffers to reuse (one thread at a time); made here when None.
    """
    out = np.zeros((len(ks), 4))
    scratch = scratch if scratch is not None else work.workspace()
    for i, k in enumerate(ks):
        out[i] = work.maxima(int(k), scratch)
    return out


# voxels of the Freedman–Lane nuisance fit taken together: its (voxels, nuisance
# columns, animals) float64 products stay a few tens of MiB instead of growing with the
# study (our own choice, as the other fixed chunks of the model)
NUISANCE_CHUNK = 32768


def _nuisance_coefficients(
    data: AnimalLevelData, Z: np.ndarray, chunk: int = NUISANCE_CHUNK
) -> np.ndarray:
    """(V, q) coefficients γ of the nuisance-only GLS fit ``Z γ`` of every voxel's animal
    means, at the unpermuted between-animal variance (Freedman & Lane 1983, as in
    Winkler et al. 2014), ``chunk`` voxels at a time.

    Every voxel is fitted on its own, so the chunks change no number; only the
    (chunk, q, m) products are held at once.

    References
    ----------
    Freedman D, Lane D (1983). J Bus Econ Stat 1:292-298.
    Winkler AM et al. (2014). NeuroImage 92:381-397.
    """
    gamma = np.empty((data.mean.shape[0], Z.shape[1]))
    ridge = 1e-300 * np.eye(Z.shape[1])
    for lo in range(0, data.mean.shape[0], chunk):
        sl = slice(lo, lo + chunk)
        precision = data.precision[sl]
        w = precision / (1.0 + data.var_animal[sl, None] * precision)
        ZtW = np.einsum("am,va->vma", Z, w)  # (chunk, q, m)
        A = ZtW @ Z  # (chunk, q, q)
        b = np.einsum("vma,va->vm", ZtW, data.mean[sl])
        gamma[sl] = np.linalg.solve(A + ridge, b[..., None])[..., 0]
    return gamma


def permutation_test(
    data: AnimalLevelData,
    c: np.ndarray,
    df: np.ndarray,
    mask: np.ndarray,
    *,
    n_permutations: int,
    rng: np.random.Generator,
    sided: str = "two",
    connectivity: int = 26,
    cluster_forming_p: float = 0.001,
    voxel_volume_mm3: float = 1.0,
    use_tfce: bool = True,
    tfce_E: float = 0.5,
    tfce_H: float = 2.0,
    progress: Callable[[int, int], None] | None = None,
    threads: int | None = None,
    backend: PermutationBackend | None = None,
    variance_groups: np.ndarray | None = None,
    f_test: bool = False,
) -> PermutationResult:
    """Run the permutation test of contrast ``c`` and return FWE-corrected maps.

    Parameters
    ----------
    data
        Animal-level data of the unpermuted fit (:func:`animal_level_data`).
    c
        (p,) contrast weights on the design columns.
    df
        (V,) degrees of freedom of each voxel's t (t is converted to z at equal p so
        that voxels with different df are comparable).
    mask
        3-D boolean analysis mask; the in-mask voxels are in C order, as in ``data``.
    n_permutations
        Requested number; all distinct ones are enumerated when there are no more.
    rng
        The only source of randomness.
    sided
        ``"two"``, ``"positive"`` or ``"negative"``.
    connectivity, cluster_forming_p, voxel_volume_mm3, use_tfce, tfce_E, tfce_H
        Cluster and TFCE settings.
    progress
        Called with the number of permutations finished since the last call and the
        total number of permutations.
    threads
        Worker threads (default: the available cores); local runs only.
    backend
        Where the permutations run. None, or a backend whose ``distributed`` is False,
        runs them here in ``threads`` threads. A distributed backend
        (:func:`grouplevel.results.compute.open_backend` with ``backend = "dask"``) sends the
        shared arrays to every worker once and evaluates batches of the permutation plan
        there; the plan is drawn here from ``rng`` first, so the same seed gives the
        same null maxima and p-values on either backend. The observed maps are always
        computed here.
    variance_groups
        (m,) group code of every animal when the groups have their own between-animal
        variance. The test then assumes independent and symmetric errors only (not
        equal variances): whole animals are sign-flipped (Freedman–Lane residuals for a
        group difference), and the statistic is the G statistic of Winkler et al.
        (2014) — a weighted least-squares t with one residual variance per group —
        converted to z at ``df``. Every animal must have data at every voxel.
    f_test
        ``c`` is a (q, p) matrix of linearly independent rows tested jointly: the
        statistic is the refitted Wald F (the rank-q G statistic with variance groups),
        converted to z at equal upper-tail p on (q, ``df``); ``sided`` must be
        ``"positive"`` (F grows with a difference in any direction). The rearrangements
        are those of a t contrast of the same columns (sign flips for means, animal
        permutations for differences, Freedman–Lane for nuisance), and design
        symmetries are counted for F (:func:`count_design_symmetries`).

    References
    ----------
    Winkler AM et al. (2014). NeuroImage 92:381-397.
    Smith SM, Nichols TE (2009). NeuroImage 44:83-98.
    """
    check_sided(sided)
    if f_test and sided != "positive":
        raise ArgumentError('an F-test is tested on its upper tail: use sided = "positive"')
    x_i, Z = partition_design(data.design, c)
    X_perm = np.column_stack([x_i, Z])
    V, m = data.mean.shape
    plan_f = {"f_test": True} if f_test else {}  # the t plan is called as it always was
    if variance_groups is not None:
        # unequal variances: only sign flips keep the errors' distribution (symmetric
        # errors, Winkler et al. 2014, "ISE"); a constant regressor asks for them
        scheme = plan_permutations(
            np.ones(m), Z[:, :0], n_permutations, rng, "two" if f_test else sided, **plan_f
        )
    else:
        scheme = plan_permutations(x_i, Z, n_permutations, rng, sided, **plan_f)
    # Freedman–Lane: nuisance-only GLS fit at the unpermuted τ̂² (per voxel)
    if Z.shape[1] and variance_groups is not None:
        # the G statistic's own (ordinary least-squares) nuisance fit
        nuisance = data.mean @ np.linalg.pinv(Z).T
    elif Z.shape[1]:
        nuisance = _nuisance_coefficients(data, Z)
    else:
        nuisance = np.zeros((V, 0))
    to_z = _TtoZ(np.asarray(df, dtype=float))
    thr = cluster_forming_z(cluster_forming_p, sided)
    tables = np.ascontiguousarray(np.array(to_z.tables))
    kind = _PermutationWork
    extra: dict = {}
    if variance_groups is not None:
        if np.any(data.precision <= 0):
            raise ArgumentError(
                "variance_groups: the G statistic needs data from every animal at every "
                "voxel (a precision of 0 was given)"
            )
        kind = _GroupVarianceWork
        extra = {"groups": np.asarray(variance_groups, dtype=np.int64)}
    if f_test:
        extra["n_interest"] = int(np.atleast_2d(c).shape[0])
        extra["df"] = np.asarray(df, dtype=float)
        kind = _GroupVarianceFWork if variance_groups is not None else _FTestWork
    mean = np.ascontiguousarray(data.mean)
    precision = np.ascontiguousarray(data.precision)
    X_perm = np.ascontiguousarray(X_perm, dtype=np.float64)
    Z = np.ascontiguousarray(Z, dtype=np.float64)
    if kind is _PermutationWork and _refit_kernel.intercept_only(X_perm, Z):
        sums = _refit_kernel.flip_invariant_sums(mean, precision)
    else:
        sums = np.zeros((0, _refit_kernel.SUMS))
    work = kind(
        nuisance=np.ascontiguousarray(nuisance, dtype=np.float64),
        Z=Z,
        mean=mean,
        precision=precision,
        X_perm=X_perm,
        tau2_start=np.ascontiguousarray(data.var_animal, dtype=np.float64),
        sums=sums,
        signs=scheme.signs.astype(np.float64),
        orders=scheme.orders.astype(np.int64),
        tables=tables,
        df_row=np.ascontiguousarray(to_z.index, dtype=np.int64),
        du=float(to_z.u[1] - to_z.u[0]),
        mask=mask,
        sided=sided,
        threshold=thr,
        connectivity=connectivity,
        voxel_volume_mm3=voxel_volume_mm3,
        use_tfce=use_tfce,
        tfce_E=tfce_E,
        tfce_H=tfce_H,
        **extra,
    )
    return run_scheme(work, scheme, progress=progress, threads=threads, backend=backend)


def run_scheme(
    work,
    scheme: PermutationScheme,
    *,
    progress: Callable[[int, int], None] | None = None,
    threads: int | None = None,
    backend: PermutationBackend | None = None,
) -> PermutationResult:
    """The null maxima of every rearrangement of ``scheme`` and the FWE-corrected
    observed maps (rearrangement 0 is the identity).

    ``work`` computes one rearrangement's statistic and maxima (``statistic``,
    ``oriented``, ``volume``, ``tfce_of``, ``maxima`` and the cluster settings, as
    :class:`_PermutationWork`); the arguments are those of :func:`permutation_test`.
    """
    mask, thr, sided = work.mask, work.threshold, work.sided
    connectivity, voxel_volume_mm3 = work.connectivity, work.voxel_volume_mm3
    use_tfce = work.use_tfce
    n = scheme.n
    if backend is not None and backend.distributed:
        # the plan is drawn above, locally: the workers only evaluate given permutations
        size = backend.permutation_batch(n)
        batches = [np.arange(lo, min(n, lo + size)) for lo in range(0, n, size)]
        done = None if progress is None else (lambda finished: progress(finished, n))
        null = np.concatenate(backend.map_batches(maxima_rows, work, batches, done))
    else:
        null = np.zeros((n, 4))
        batch = 16
        n_threads = threads or available_cores()
        pool = ThreadPoolExecutor(max_workers=n_threads) if n_threads > 1 else None
        # one set of buffers per share, kept for the whole run: share i of every batch
        # uses set i, and a batch ends before the next starts, so no set is ever used by
        # two threads at once
        scratches = [work.workspace() for _ in range(min(n_threads, max(n, 1)))]
        try:
            for start in range(0, n, batch):
                ks = np.arange(start, min(n, start + batch))
                shares = np.array_split(ks, min(n_threads, ks.size))
                rows = (
                    pool.map(maxima_rows, [work] * len(shares), shares, scratches)
                    if pool is not None
                    else map(maxima_rows, [work], shares, scratches)
                )
                null[ks] = np.concatenate(list(rows))
                if progress is not None:
                    progress(ks.size, n)
        finally:
            if pool is not None:
                pool.shutdown()

    # observed maps (identity permutation)
    z_obs = work.statistic(0)
    vol = work.volume(z_obs)
    oriented = work.oriented(z_obs)
    p_voxel = _fwe_p(oriented, null[:, 0])
    clusters = find_clusters(
        vol, mask, thr, connectivity=connectivity, voxel_volume_mm3=voxel_volume_mm3, sided=sided
    )
    p_extent = _fwe_p(clusters.extent_voxels.astype(float), null[:, 1])
    p_mass = _fwe_p(clusters.mass, null[:, 2])
    tfce_obs = p_tfce = None
    if use_tfce:
        tfce_obs = work.tfce_of(vol)[mask]
        p_tfce = _fwe_p(np.abs(tfce_obs), null[:, 3])
    return PermutationResult(
        scheme=scheme,
        statistic=z_obs,
        p_fwe_voxel=p_voxel,
        clusters=clusters,
        cluster_forming_z=thr,
        p_fwe_cluster_extent=p_extent,
        p_fwe_cluster_mass=p_mass,
        tfce=tfce_obs,
        p_fwe_tfce=p_tfce,
        null_max_stat=null[:, 0],
        null_max_extent=null[:, 1],
        null_max_mass=null[:, 2],
        null_max_tfce=null[:, 3] if use_tfce else None,
    )
