"""Permutation F-test of several within-animal effects at once: whole-vector sign flips.

A factor that varies within every animal with three or more levels (visual, whisker and
both stimuli alternated in every animal, each difference with its own random slope)
is tested by an F-test of q within-animal effects jointly. Each animal has its own
estimate of those q effects, the vector ``d_a`` (its own GLS fit, the multivariate form
of :func:`grouplevel.inference.permutation.animal_effect_data`), with sampling
covariance ``S_a``; across animals

    d_a = γ + η_a + ε_a,     η_a ~ (0, T),  ε_a ~ (0, S_a),

and the hypothesis is γ = 0 (no effect differs from zero). The exchangeable unit is the
animal's whole vector: under the null hypothesis each ``d_a`` is assumed symmetric
about 0 (``d_a`` and ``−d_a`` have the same distribution) and independent of the other
animals — the "independent and symmetric errors" of Winkler et al. (2014), with animals
as the blocks of Winkler et al. (2015). The q effects of one animal are flipped together,
so their dependence (one animal's responses to visual and to whisker stimuli share its
day, its window, its vasculature) is kept; flipping them one by one would not be valid.

The statistic is a Wald F with the between-animal covariance estimated under the null
hypothesis, where the mean is 0 and the data enter only through ``d_a d_aᵀ``:

    T̂₀ = (1/n) Σ_a (d_a d_aᵀ − S_a), negative eigenvalues set to 0,
    W_a = (T̂₀ + S_a)⁻¹,   H = Σ_a W_a,
    F = (Σ_a W_a d_a)ᵀ H⁻¹ (Σ_a W_a d_a) / q,

the generalised least-squares estimate γ̂ = H⁻¹ Σ W_a d_a tested against its covariance
H⁻¹. Flipping any animal's vector leaves ``d_a d_aᵀ`` and so T̂₀ and every W_a unchanged,
so F is one fixed function of the flipped data and the test is exact under the
assumption above (a refitted T̂ would change with every rearrangement and lose that).
With equal sampling covariances and T̂₀ inside the positive semi-definite cone, F is
``m·r/q`` with ``r = m d̄ᵀ(Σ d_a d_aᵀ)⁻¹d̄``, a monotone function of Hotelling's
``T² = (m−1) r/(1−r)``: the sign-flip p-values are those of Hotelling's T² recomputed for
every rearrangement. F goes to z at equal upper-tail p on (q, df) (df: the slopes'
degrees of freedom) so that voxels with different df compare in the maximum and clusters
and TFCE work on z, as for every other F-test.

Flipping every animal gives F back, so an exhaustive test of m animals has 2ᵐ
rearrangements in pairs, and its smallest attainable p is 2/2ᵐ.

References
----------
Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014). Permutation inference
for the general linear model. NeuroImage 92:381-397.

Winkler AM, Webster MA, Vidaurre D, Nichols TE, Smith SM (2015). Multi-level block
permutation. NeuroImage 123:253-268.

Hotelling H (1931). The generalization of Student's ratio. Ann Math Stat 2:360-378.

Jackson D, White IR, Riley RD (2013). A matrix-based method of moments for fitting the
multivariate random effects model for meta-analysis and meta-regression. Biom J
55:231-245 (moment estimates of the between-study covariance; from memory).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np

from grouplevel.errors import ArgumentError
from grouplevel.inference.permutation import (
    _EFFECT_CHUNK_VOXELS,
    _ESTIMABLE_TOL,
    MapMaxima,
    PermutationBackend,
    PermutationResult,
    PermutationScheme,
    _own_gls,
    cluster_forming_z,
    plan_permutations,
    run_scheme,
)
from grouplevel.model.ftest import RANK_TOLERANCE, f_to_z

# The start of the ``kind`` of these schemes (summary.json; "... of 2 own effects").
VECTOR_FLIPS_KIND = "sign flips of each animal's vector of"


@dataclass(frozen=True)
class AnimalEffectVectors:
    """Each animal's own estimate of q within-animal effects at every voxel.

    Attributes
    ----------
    effect
        (V, m, q) the animal's own GLS estimates (0 where not valid).
    covariance
        (V, m, q, q) their sampling covariance ``S_a`` (identity where not valid).
    valid
        (V, m) the animal estimates all q effects at the voxel (it has runs of every
        condition the rows need).
    """

    effect: np.ndarray
    covariance: np.ndarray
    valid: np.ndarray

    @property
    def n_effects(self) -> int:
        return int(self.effect.shape[2])

    def animals(self, keep: np.ndarray) -> AnimalEffectVectors:
        """The same data for the animals ``keep`` (boolean (m,)) only."""
        return AnimalEffectVectors(
            effect=np.ascontiguousarray(self.effect[:, keep]),
            covariance=np.ascontiguousarray(self.covariance[:, keep]),
            valid=np.ascontiguousarray(self.valid[:, keep]),
        )


def _estimable(U: np.ndarray, M: np.ndarray, Minv: np.ndarray) -> np.ndarray:
    """(v,) whether every row of U is estimable: ``U M⁺M`` reproduces U."""
    recon = np.einsum("qk,vkl,vlj->vqj", U, Minv, M)
    scale = max(1.0, float(np.abs(U).max()))
    tol = _ESTIMABLE_TOL * max(1.0, U.shape[1]) * scale
    return np.all(np.abs(recon - U[None]) < tol, axis=(1, 2))


def estimable_animals(own: np.ndarray, animal: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """(m,) which animals estimate every row of ``targets`` when all their runs have data.

    Parameters
    ----------
    own
        (n_runs, k) the within-animal random-slope columns.
    animal
        (n_runs,) animal codes 0..m-1.
    targets
        (q, 1 + k) rows on each animal's own design ``[1, own]``.
    """
    own = np.asarray(own, dtype=float).reshape(len(animal), -1)
    U = np.atleast_2d(np.asarray(targets, dtype=float))
    m = int(animal.max()) + 1
    out = np.zeros(m, dtype=bool)
    for a in range(m):  # a loop over animals (design only, no voxels)
        Xa = np.column_stack([np.ones(int(np.sum(animal == a))), own[animal == a]])
        M = (Xa.T @ Xa)[None]
        out[a] = bool(_estimable(U, M, np.linalg.pinv(M[0], hermitian=True)[None])[0])
    return out


def animal_effect_vectors(
    y: np.ndarray,
    variance: np.ndarray | None,
    own: np.ndarray,
    targets: np.ndarray,
    animal: np.ndarray,
    var_run: np.ndarray,
    *,
    session: np.ndarray | None = None,
    var_session: np.ndarray | None = None,
    offset: np.ndarray | None = None,
) -> AnimalEffectVectors:
    """Reduce each animal's runs to its own estimates of q effects and their covariance.

    For animal a the runs are regressed on its own design ``[1, own[r]]`` by generalised
    least squares with the within-animal covariance ``diag(σ̂² + s_k²) + ω̂² S Sᵀ`` (as
    :func:`grouplevel.inference.permutation.animal_effect_data` does for one effect);
    ``d_a = U b_a`` and ``S_a = U (XᵀV⁻¹X)⁻¹ Uᵀ`` for the (q, 1 + k) rows ``U``.

    Parameters
    ----------
    y, variance
        (n_runs, V) effects and first-level variances (NaN: no data).
    own
        (n_runs, k) the within-animal columns each animal gets its own coefficient for.
    targets
        (q, 1 + k) the effects, as rows on ``[1, own]`` (e.g. ``[0, 1, 0]`` and
        ``[0, 0, 1]`` for both differences from the reference condition).
    animal
        (n_runs,) animal codes 0..m-1.
    var_run
        (V,) fitted σ̂².
    session, var_session
        (n_runs,) session codes and (V,) ω̂², or None.
    offset
        (n_runs, V) fixed-effect fit of within-animal columns without a random slope,
        subtracted from ``y`` first; None for none.

    Returns
    -------
    AnimalEffectVectors
        An animal that cannot estimate every row at a voxel (no runs of a condition
        there) is not valid there.
    """
    own = np.asarray(own, dtype=float).reshape(len(animal), -1)
    U = np.atleast_2d(np.asarray(targets, dtype=float))
    if U.shape[1] != own.shape[1] + 1:
        raise ArgumentError(
            f"targets need {own.shape[1] + 1} weights per row (intercept and own "
            f"columns); got shape {U.shape}"
        )
    q, m, n_vox = U.shape[0], int(animal.max()) + 1, y.shape[1]
    effect = np.zeros((n_vox, m, q))
    covariance = np.broadcast_to(np.eye(q), (n_vox, m, q, q)).copy()
    valid = np.zeros((n_vox, m), dtype=bool)
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
            om = None if omega is None else omega[sl]
            coef, M, Minv = _own_gls(y, variance, offset, rows, sl, Xa, var_run[sl], om, same)
            S = np.einsum("qk,vkl,rl->vqr", U, Minv, U)
            ok = _estimable(U, M, Minv) & np.all(np.isfinite(S), axis=(1, 2))
            ok &= _positive_definite(np.where(ok[:, None, None], S, np.eye(q)))
            effect[sl, a] = np.where(ok[:, None], coef @ U.T, 0.0)
            covariance[sl, a] = np.where(ok[:, None, None], S, np.eye(q))
            valid[sl, a] = ok
    return AnimalEffectVectors(effect=effect, covariance=covariance, valid=valid)


def _positive_definite(A: np.ndarray) -> np.ndarray:
    """(...,) whether each symmetric matrix of a stack is positive definite."""
    eig = np.linalg.eigvalsh(A)
    return eig[..., 0] > RANK_TOLERANCE * np.maximum(eig[..., -1], np.finfo(float).tiny)


def null_between_covariance(
    data: AnimalEffectVectors, groups: np.ndarray | None = None
) -> np.ndarray:
    """Moment estimate of the between-animal covariance T of the effects under γ = 0.

    ``T̂₀ = (1/n) Σ_a (d_a d_aᵀ − S_a)`` over the n valid animals (of each group of
    animals, when ``groups`` gives each its own T), with negative eigenvalues set to 0.
    It depends on the data only through ``d_a d_aᵀ``, so flipping any animal's vector
    leaves it unchanged (Jackson, White & Riley 2013, Biom J 55:231, for moment
    estimates of this model).

    Parameters
    ----------
    data
        The animals' effect vectors.
    groups
        (m,) group code of every animal, or None for one T.

    Returns
    -------
    ndarray, shape (V, m, q, q)
        The T̂₀ that applies to each animal.
    """
    d, S, ok = data.effect, data.covariance, data.valid
    m = d.shape[1]
    groups = np.zeros(m, dtype=np.int64) if groups is None else np.asarray(groups)
    if groups.shape != (m,):
        raise ArgumentError(f"groups needs one code per animal ({m}); got shape {groups.shape}")
    moment = np.where(ok[..., None, None], d[..., :, None] * d[..., None, :] - S, 0.0)
    out = np.zeros_like(S)
    for g in np.unique(groups):  # a loop over variance groups (a few)
        sel = groups == g
        n = ok[:, sel].sum(axis=1)
        T = moment[:, sel].sum(axis=1) / np.maximum(n, 1)[:, None, None]
        vals, vecs = np.linalg.eigh(T)
        T = np.einsum("vij,vj,vkj->vik", vecs, np.maximum(vals, 0.0), vecs)
        out[:, sel] = T[:, None]
    return out


def _scaled_terms(data: AnimalEffectVectors, groups) -> tuple[np.ndarray, np.ndarray]:
    """``C⁻¹ W_a d_a`` per voxel and animal (``H = C Cᵀ``), so that the F of any flip s
    is ``|Σ_a s_a C⁻¹W_a d_a|² / q``; and which voxels have no F (H not positive
    definite: no valid animal). Chunks of voxels keep the (V, m, q, q) temporaries
    small."""
    V, m, q = data.effect.shape
    scaled, bad = np.empty((V, m, q)), np.empty(V, dtype=bool)
    for lo in range(0, V, _EFFECT_CHUNK_VOXELS):
        sl = slice(lo, min(V, lo + _EFFECT_CHUNK_VOXELS))
        part = AnimalEffectVectors(data.effect[sl], data.covariance[sl], data.valid[sl])
        scaled[sl], bad[sl] = _scaled_chunk(part, groups)
    return scaled, bad


def _scaled_chunk(data: AnimalEffectVectors, groups) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_scaled_terms` of one chunk of voxels."""
    q = data.n_effects
    T0 = null_between_covariance(data, groups)
    eye = np.eye(q)
    total = np.where(data.valid[..., None, None], T0 + data.covariance, eye)
    W = np.where(data.valid[..., None, None], np.linalg.inv(total), 0.0)
    H = W.sum(axis=1)
    bad = ~_positive_definite(H)
    C = np.linalg.cholesky(np.where(bad[:, None, None], eye, H))
    Wd = np.einsum("vaij,vaj->vai", W, data.effect)  # (V, m, q)
    scaled = np.linalg.solve(C[:, None], Wd[..., None])[..., 0]
    scaled[bad] = 0.0
    return scaled, bad


def vector_f(data: AnimalEffectVectors, signs: np.ndarray, groups=None) -> np.ndarray:
    """The F of every flip in ``signs`` ((n, m) ±1) at every voxel: (n, V), NaN where no F.

    The statistic of the module's notes; ``signs`` of all ones give the observed F.
    """
    scaled, bad = _scaled_terms(data, groups)
    g = np.einsum("vaq,na->nvq", scaled, np.asarray(signs, dtype=float))
    f = np.einsum("nvq,nvq->nv", g, g) / data.n_effects
    f[:, bad] = np.nan
    return f


@dataclass(frozen=True, eq=False)
class _VectorFlipWork(MapMaxima):
    """Everything one rearrangement needs (picklable for a distributed backend)."""

    scaled: np.ndarray  # (V, m, q) C⁻¹ W_a d_a
    no_f: np.ndarray  # (V,) bool: no F at the voxel
    df: np.ndarray  # (V,) denominator df of the z conversion
    signs: np.ndarray  # (n, m) float
    mask: np.ndarray  # 3-D bool
    threshold: float  # cluster-forming z
    connectivity: int
    voxel_volume_mm3: float
    use_tfce: bool
    tfce_E: float
    tfce_H: float
    sided: str = "positive"

    def statistic(self, k: int) -> np.ndarray:
        """z (equal upper-tail p) of the F of rearrangement k; k = 0 is the data."""
        g = np.einsum("vaq,a->vq", self.scaled, self.signs[k])
        q = self.scaled.shape[2]
        f = np.where(self.no_f, np.nan, np.einsum("vq,vq->v", g, g) / q)
        with np.errstate(divide="ignore"):
            z = f_to_z(f, q, self.df)
        # a voxel without F (NaN) or with F = 0 (z = −∞) ranks as the median F
        return np.where(np.isfinite(z), z, 0.0)

    def oriented(self, z: np.ndarray) -> np.ndarray:
        return z  # z rises with F over its whole range


def plan_vector_flips(
    m: int, n_effects: int, n_requested: int, rng: np.random.Generator
) -> PermutationScheme:
    """Sign flips of m animals' whole vectors of ``n_effects`` effects: all 2ᵐ when no
    more than requested (then the identity and the all-flip pair give the same F, so the
    smallest attainable p is 2/2ᵐ), else ``n_requested`` random ones, identity first.

    The flips are those of a one-sample sign-flip test of the same animals (same seed,
    same flips); the scheme's ``kind`` names the unit flipped.
    """
    scheme = plan_permutations(
        np.ones((m, 1)), np.zeros((m, 0)), n_requested, rng, "positive", f_test=True
    )
    return replace(scheme, kind=f"{VECTOR_FLIPS_KIND} {n_effects} own effects")


def vector_flip_test(
    data: AnimalEffectVectors,
    df: np.ndarray,
    mask: np.ndarray,
    *,
    n_permutations: int,
    rng: np.random.Generator,
    sided: str = "positive",
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
) -> PermutationResult:
    """Permutation F-test of q within-animal effects by flipping each animal's vector.

    Parameters
    ----------
    data
        The animals' own effect vectors (:func:`animal_effect_vectors`).
    df
        (V,) denominator df of the z conversion (the slopes' df).
    mask
        3-D boolean mask; the in-mask voxels in C order, as in ``data``.
    n_permutations
        Requested number; all 2ᵐ flips are enumerated when there are no more.
    rng
        The only source of randomness.
    sided
        Must be ``"positive"`` (F grows with an effect in any direction).
    connectivity, cluster_forming_p, voxel_volume_mm3, use_tfce, tfce_E, tfce_H
        Cluster and TFCE settings (on z > 0).
    progress, threads, backend
        As for :func:`grouplevel.inference.permutation.permutation_test`.
    variance_groups
        (m,) group code per animal when each group has its own between-animal
        covariance: T̂₀ is estimated within each group (still unchanged by flips).

    Returns
    -------
    PermutationResult
        ``statistic`` is the z of the F of the module's notes at the data.

    Notes
    -----
    The test assumes that under the null hypothesis every animal's vector of effects is
    symmetric about 0 and independent of the other animals' (Winkler et al. 2014, 2015);
    it does not assume equal sampling covariances or normality.

    References
    ----------
    Winkler AM et al. (2014). NeuroImage 92:381-397.
    Winkler AM et al. (2015). NeuroImage 123:253-268.
    """
    if sided != "positive":
        raise ArgumentError('an F-test is tested on its upper tail: use sided = "positive"')
    V, m, _ = data.effect.shape
    if int(mask.sum()) != V:
        raise ArgumentError(f"mask has {int(mask.sum())} voxels but the data have {V}")
    scheme = plan_vector_flips(m, data.n_effects, n_permutations, rng)
    scaled, no_f = _scaled_terms(data, variance_groups)
    work = _VectorFlipWork(
        scaled=scaled,
        no_f=no_f,
        df=np.broadcast_to(np.asarray(df, dtype=float), (V,)).copy(),
        signs=scheme.signs.astype(np.float64),
        mask=mask,
        threshold=cluster_forming_z(cluster_forming_p, sided),
        connectivity=connectivity,
        voxel_volume_mm3=voxel_volume_mm3,
        use_tfce=use_tfce,
        tfce_E=tfce_E,
        tfce_H=tfce_H,
    )
    return run_scheme(work, scheme, progress=progress, threads=threads, backend=backend)
