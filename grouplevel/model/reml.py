"""Vectorised REML for runs nested in animals, with known first-level variances.

For one voxel, runs ``k = 1..n`` belong to animals ``a(k)`` and

    y_k = x_kᵀβ + u_a(k) + e_k,   u_a ~ N(0, τ²),   e_k ~ N(0, σ² + s_k²),

where ``s_k²`` is the run's first-level variance (0 when none is given). The covariance
of the runs of one animal is ``V_a = D_a + τ² 11ᵀ`` with ``D_a`` diagonal, so

    V_a⁻¹ = W_a − γ_a w_a w_aᵀ,   γ_a = τ² / (1 + τ² Σ_k w_k),   w_k = 1 / (σ² + s_k²)
    log|V_a| = Σ_k log(1/w_k) + log(1 + τ² Σ_k w_k)

(Sherman–Morrison formula and matrix determinant lemma). Every quantity that REML
needs — ``XᵀV⁻¹X``, ``XᵀV⁻¹y``, the residual quadratic form, the traces ``tr(P V_j)``
and ``tr(P V_i P V_j)`` — reduces to per-animal sums of ``w_k``, ``w_k²``, ``w_k³``
times run-level data, i.e. to small matrix products with the runs × animals
indicator matrix. No n × n matrix is ever built, and all voxels are iterated together.

A run with no data at a voxel (NaN effect or NaN variance) gets ``w_k = 0`` there, as if
its variance were infinite: voxels with partial coverage are fitted with the runs
they have.

The variance parameters θ = (τ², σ²) are estimated by maximising the REML
log-likelihood, starting from method-of-moments values: a Newton step (observed
information) where that information is positive definite, a Fisher-scoring step
(expected information) elsewhere, with step-halving on the log-likelihood and the
boundary θ_j = 0 handled by an active set (a zero estimate is a normal outcome). Each
voxel's data are divided by a per-voxel scale (the residual standard deviation of an
ordinary least-squares fit) so that the numbers are O(1) during the iteration.

Two implementations of the same algorithm are kept: a compiled per-voxel kernel (numba,
run in a few threads; the default) and a numpy version vectorised over chunks of
voxels (the reference the kernel is tested against).

References
----------
Harville, D. A. (1977). Maximum likelihood approaches to variance component estimation
and to related problems. Journal of the American Statistical Association 72:320–338.

Patterson, H. D., & Thompson, R. (1971). Recovery of inter-block information when block
sizes are unequal. Biometrika 58:545–554.

Sherman, J., & Morrison, W. J. (1950). Adjustment of an inverse matrix corresponding to a
change in one element of a given matrix. Annals of Mathematical Statistics 21:124–127.

Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS. Springer.

Searle, S. R., Casella, G., & McCulloch, C. E. (1992). Variance Components. Wiley.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from grouplevel.compiled import lazy_njit
from grouplevel.errors import ArgumentError
from grouplevel.machine import available_cores
from grouplevel.model.memory import CHUNK_ARRAYS, chunk_voxels

# Working-memory budget of one chunk of voxels, in bytes. About 24 arrays of shape
# (chunk, runs) are alive at once inside the iteration (common practice: keep the
# working set to a few tens of MiB so that it stays small next to the input maps).
DEFAULT_CHUNK_BYTES = 48 * 2**20
_ARRAYS_PER_CHUNK = CHUNK_ARRAYS
_MIN_CHUNK = 256

# Step-halving: at most this many halvings of a Fisher-scoring step (2⁻³⁰ ≈ 1e-9).
MAX_STEP_HALVINGS = 30

# Starting values are kept this far inside the parameter space (fraction of the residual
# variance, which is 1 after per-voxel scaling) so that scoring can move both ways
# (common practice).
START_FRACTION = 0.05

# Lower bound of σ² (in scaled units) when some run has no first-level variance:
# σ² = 0 would make that run's variance exactly 0 (a singular covariance).
RUN_VARIANCE_FLOOR = 1e-12

# A 2 × 2 information matrix whose determinant is below this fraction of the product
# of its diagonal is treated as rank one (τ² and σ² not separately identified, e.g.
# one run per animal without first-level variances); its pseudo-inverse is used.
SINGULAR_INFO_RATIO = 1e-10

# A Newton step whose predicted increase of ℓ is below this fraction of |ℓ| cannot be
# resolved in double precision; failing to increase ℓ then means the optimum is reached.
FLAT_DECREMENT = 1e-11

_LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class MixedFit:
    """REML fit of the run-within-animal model at every voxel.

    Attributes
    ----------
    beta : ndarray, shape (V, p)
        GLS fixed effects at the REML estimates.
    cov_beta : ndarray, shape (V, p, p)
        Model-based covariance ``(XᵀV̂⁻¹X)⁻¹`` (Pinheiro & Bates 2000).
    var_animal : ndarray, shape (V,)
        τ̂², the between-animal variance.
    var_run : ndarray, shape (V,)
        σ̂², the between-run variance beyond the first-level variance (zeros when
        not estimated).
    cov_theta : ndarray, shape (V, 2, 2)
        Inverse expected (REML) information of (τ², σ²), restricted to the components
        that are estimated and not on the boundary 0 (zero rows and columns for the
        others). Used for Satterthwaite degrees of freedom.
    dcov_beta : ndarray, shape (V, 2, p, p)
        Derivative of ``cov_beta`` with respect to (τ², σ²).
    loglik : ndarray, shape (V,)
        REML log-likelihood at the estimate (including the ``2π`` constant).
    converged : ndarray of bool, shape (V,)
        True where the iteration met the convergence criterion. False where it did
        not, and at voxels that could not be fitted (too few runs with data, a design
        that is rank deficient on the runs with data, or data with no variation and
        no first-level variances); those voxels hold NaN estimates.
    n_iter : ndarray of int, shape (V,)
        Fisher-scoring iterations used.
    n_runs : ndarray of int, shape (V,)
        Runs with data at the voxel.
    n_animals : ndarray of int, shape (V,)
        Animals with at least one run with data at the voxel.
    estimate_run_variance : bool
        Whether σ² was estimated (False: fixed at 0).
    """

    beta: np.ndarray
    cov_beta: np.ndarray
    var_animal: np.ndarray
    var_run: np.ndarray
    cov_theta: np.ndarray
    dcov_beta: np.ndarray
    loglik: np.ndarray
    converged: np.ndarray
    n_iter: np.ndarray
    n_runs: np.ndarray
    n_animals: np.ndarray
    estimate_run_variance: bool = True


# --------------------------------------------------------------------------------------
# presence patterns (shared with the degrees-of-freedom rules)
# --------------------------------------------------------------------------------------


def presence_patterns(present: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unique columns of a runs × voxels presence mask.

    Parameters
    ----------
    present : ndarray of bool, shape (n_runs, V)

    Returns
    -------
    patterns : ndarray of bool, shape (n_patterns, n_runs)
        The distinct presence patterns.
    inverse : ndarray of int, shape (V,)
        Index of each voxel's pattern.
    """
    present = np.asarray(present, dtype=bool)
    n_runs, n_vox = present.shape
    packed = np.ascontiguousarray(np.packbits(present, axis=0).T)  # (V, bytes)
    keys = packed.view(np.dtype((np.void, packed.shape[1]))).ravel()
    _, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
    patterns = present[:, first].T.copy()
    return patterns, inverse.reshape(n_vox)


def _pattern_ranks(X: np.ndarray, patterns: np.ndarray) -> np.ndarray:
    """Rank of the design restricted to the runs of each presence pattern."""
    ranks = np.zeros(len(patterns), dtype=np.int64)
    for i, pat in enumerate(patterns):  # loop over distinct patterns, not voxels
        if pat.any():
            ranks[i] = np.linalg.matrix_rank(X[pat])
    return ranks


# --------------------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------------------


def _as_maps(a) -> np.ndarray:
    """Runs × voxels data as float32 or float64, without copying either.

    float32 input stays float32 (half the memory of float64); it is converted to float64
    one chunk of voxels at a time in the fit. Any other type becomes float64.
    """
    a = np.asarray(a)
    if a.dtype in (np.float32, np.float64):
        return a
    return a.astype(np.float64)


def _check_inputs(y, variance, X, animal, estimate_run_variance):
    y = _as_maps(y)
    if y.ndim == 1:
        y = y[:, None]
    if y.ndim != 2:
        raise ArgumentError(
            f"fit_reml: effects must be a (runs, voxels) array, got shape {y.shape}; "
            "stack one effect map per run as the rows."
        )
    n_runs = y.shape[0]
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2 or X.shape[0] != n_runs:
        raise ArgumentError(
            f"fit_reml: design has shape {X.shape} but there are {n_runs} runs; "
            "the design needs one row per run."
        )
    if not np.all(np.isfinite(X)):
        raise ArgumentError(
            "fit_reml: the design contains NaN or infinite values; fill in every run's "
            "covariates or drop the run."
        )
    animal = np.asarray(animal)
    if animal.ndim != 1 or animal.shape[0] != n_runs:
        raise ArgumentError(
            f"fit_reml: animal codes have shape {animal.shape} but there are {n_runs} "
            "runs; give one animal code per run."
        )
    if not np.issubdtype(animal.dtype, np.integer):
        if np.issubdtype(animal.dtype, np.floating) and np.all(animal == np.round(animal)):
            animal = animal.astype(np.int64)
        else:
            raise ArgumentError(
                "fit_reml: animal codes must be integers 0..m-1; map the animal names to "
                "codes first (e.g. with numpy.unique(..., return_inverse=True))."
            )
    animal = animal.astype(np.int64)
    if n_runs and animal.min() < 0:
        raise ArgumentError("fit_reml: animal codes must be non-negative integers 0..m-1.")
    if variance is not None:
        variance = _as_maps(variance)
        if variance.ndim == 1:
            variance = variance[:, None]
        if variance.shape != y.shape:
            raise ArgumentError(
                f"fit_reml: variances have shape {variance.shape} but effects have shape "
                f"{y.shape}; give one variance map per effect map."
            )
        with np.errstate(invalid="ignore"):
            negative = variance < 0
        if negative.any():
            run = int(np.nonzero(negative.any(axis=1))[0][0])
            raise ArgumentError(
                f"fit_reml: first-level variance of run {run} is negative at "
                f"{int(negative[run].sum())} voxels; a variance map must be ≥ 0 (check "
                "that the map is a variance and not a signed effect)."
            )
    if not estimate_run_variance:
        if variance is None:
            raise ArgumentError(
                "fit_reml: run variance fixed at 0 (known variance) but no first-level "
                "variances were given; give variance maps or estimate the run variance."
            )
        with np.errstate(invalid="ignore"):
            zero = (variance == 0) & np.isfinite(y)
        if zero.any():
            run = int(np.nonzero(zero.any(axis=1))[0][0])
            raise ArgumentError(
                f"fit_reml: first-level variance of run {run} is 0 at {int(zero[run].sum())} "
                "voxels with data, which a known-variance model cannot use; estimate the "
                "run variance or mask those voxels."
            )
    return y, variance, X, animal


# --------------------------------------------------------------------------------------
# closed-form REML pieces for a chunk of voxels
# --------------------------------------------------------------------------------------


class _Design:
    """Run-level constants shared by every voxel: products of X and the animal index."""

    def __init__(self, X: np.ndarray, animal: np.ndarray, n_animals: int) -> None:
        n, p = X.shape
        self.n, self.p, self.m = n, p, n_animals
        self.X = X
        G = np.zeros((n, n_animals))
        G[np.arange(n), animal] = 1.0
        self.G = G  # runs × animals indicator
        self.XX = (X[:, :, None] * X[:, None, :]).reshape(n, p * p)
        self.GX = (G[:, :, None] * X[:, None, :]).reshape(n, n_animals * p)

    def animal_sums(self, a: np.ndarray) -> np.ndarray:
        return a @ self.G

    def animal_x_sums(self, a: np.ndarray) -> np.ndarray:
        return (a @ self.GX).reshape(a.shape[0], self.m, self.p)

    def xx_sums(self, a: np.ndarray) -> np.ndarray:
        return (a @ self.XX).reshape(a.shape[0], self.p, self.p)


def _outer_sum(weight, u, v):
    """Σ_a weight_a u_a v_aᵀ for arrays (c, m), (c, m, p), (c, m, p) → (c, p, p)."""
    return np.matmul(np.swapaxes(weight[:, :, None] * u, 1, 2), v)


def _trace_prod(A, B):
    """tr(A B) for stacks of square matrices."""
    return np.einsum("cij,cji->c", A, B)


def _sym(A):
    return 0.5 * (A + np.swapaxes(A, -1, -2))


def _evaluate(d: _Design, theta, y, s2, pres, n_obs):
    """REML log-likelihood and GLS pieces at θ for a chunk of voxels.

    y, s2, pres: (c, n) arrays; missing runs have pres = 0, y = 0, s2 = 1.
    """
    tau2 = theta[:, 0]
    sig2 = theta[:, 1]
    vk = sig2[:, None] + s2
    w = pres / vk
    S = d.animal_sums(w)
    Sx = d.animal_x_sums(w)
    wy = w * y
    Sy = d.animal_sums(wy)
    gam = tau2[:, None] / (1.0 + tau2[:, None] * S)
    M = d.xx_sums(w) - _outer_sum(gam, Sx, Sx)
    rhs = wy @ d.X - np.einsum("cm,cmp,cm->cp", gam, Sx, Sy)
    M = _sym(M)
    sign, logdet_m = np.linalg.slogdet(M)
    Minv = _sym(np.linalg.inv(M))
    beta = np.einsum("cpq,cq->cp", Minv, rhs)
    r = y - beta @ d.X.T
    wr = w * r
    Sr = d.animal_sums(wr)
    quad = np.sum(wr * r, axis=1) - np.sum(gam * Sr * Sr, axis=1)
    logdet_v = np.sum(pres * np.log(vk), axis=1) + np.sum(np.log1p(tau2[:, None] * S), axis=1)
    loglik = -0.5 * (logdet_v + logdet_m + quad + (n_obs - d.p) * _LOG_2PI)
    loglik = np.where((sign > 0) & np.isfinite(loglik), loglik, -np.inf)
    return {
        "w": w,
        "S": S,
        "Sx": Sx,
        "gam": gam,
        "Minv": Minv,
        "beta": beta,
        "r": r,
        "Sr": Sr,
        "loglik": loglik,
        "tau2": tau2,
    }


def _derivatives(d: _Design, st):
    """Score, information and ∂(XᵀV⁻¹X)/∂θ for the state of :func:`_evaluate`.

    Returns g (c, 2), expected information F (c, 2, 2), Q (c, 2, p, p) with
    Q_j = XᵀV⁻¹V_jV⁻¹X, and the observed information H (c, 2, 2).
    """
    w, S, Sx, gam, Minv, r, Sr, tau2 = (
        st["w"],
        st["S"],
        st["Sx"],
        st["gam"],
        st["Minv"],
        st["r"],
        st["Sr"],
        st["tau2"],
    )
    w2 = w * w
    w3 = w2 * w
    S2 = d.animal_sums(w2)
    S3 = d.animal_sums(w3)
    Sx2 = d.animal_x_sums(w2)
    Sx3 = d.animal_x_sums(w3)
    u = 1.0 / (1.0 + tau2[:, None] * S)  # (c, m)
    ca = S * u  # 1ᵀV_a⁻¹1
    bvec = Sx * u[:, :, None]  # 1ᵀV_a⁻¹X_a
    h = Sx2 - (gam * S2)[:, :, None] * Sx  # X_aᵀV_a⁻¹W_a 1
    # XᵀV⁻¹V_jV⁻¹X
    q_tau = _outer_sum(np.ones_like(u), bvec, bvec)
    cross = _outer_sum(gam, Sx2, Sx)
    q_sig = d.xx_sums(w2) - cross - np.swapaxes(cross, 1, 2) + _outer_sum(gam * gam * S2, Sx, Sx)
    # XᵀV⁻¹V_iV⁻¹V_jV⁻¹X
    cross3 = _outer_sum(gam, Sx3, Sx)
    r_ss = (
        d.xx_sums(w3)
        - cross3
        - np.swapaxes(cross3, 1, 2)
        + _outer_sum(gam * gam * S3, Sx, Sx)
        - _outer_sum(gam, h, h)
    )
    r_tt = _outer_sum(ca, bvec, bvec)
    r_ts = _outer_sum(u, h, bvec)
    # tr(V⁻¹V_iV⁻¹V_j)
    t_tt = np.sum(ca * ca, axis=1)
    t_ts = np.sum(S2 * u * u, axis=1)
    t_ss = np.sum(S2 - 2.0 * gam * S3 + gam * gam * S2 * S2, axis=1)
    # score
    w2r = w2 * r
    s2r = d.animal_sums(w2r)
    py_sq = np.sum(w2r * r, axis=1) - 2.0 * np.sum(gam * Sr * s2r, axis=1)
    py_sq += np.sum(gam * gam * Sr * Sr * S2, axis=1)
    pjp = np.sum((Sr * u) ** 2, axis=1)
    tr_p_tau = np.sum(ca, axis=1) - _trace_prod(Minv, q_tau)
    tr_p_sig = np.sum(S - gam * S2, axis=1) - _trace_prod(Minv, q_sig)
    g = np.stack([0.5 * (pjp - tr_p_tau), 0.5 * (py_sq - tr_p_sig)], axis=1)
    mq_t = Minv @ q_tau
    mq_s = Minv @ q_sig
    f_tt = t_tt - 2.0 * _trace_prod(Minv, r_tt) + _trace_prod(mq_t, mq_t)
    f_ts = t_ts - 2.0 * _trace_prod(Minv, r_ts) + _trace_prod(mq_t, mq_s)
    f_ss = t_ss - 2.0 * _trace_prod(Minv, r_ss) + _trace_prod(mq_s, mq_s)
    F = 0.5 * np.stack([np.stack([f_tt, f_ts], -1), np.stack([f_ts, f_ss], -1)], -2)
    Q = np.stack([q_tau, q_sig], axis=1)
    # observed information −∂²ℓ = K − F with K_ij = yᵀP V_i P V_j P y, from the vectors
    # z_σ = P y (per run) and z_τ = Zᵀ P y (per animal): K_ij = z_iᵀV⁻¹z_j − (Xᵀ V⁻¹ z_i)ᵀ
    # (XᵀV⁻¹X)⁻¹ (XᵀV⁻¹z_j).
    py = w * (r - (gam * Sr) @ d.G.T)
    wpy = w * py
    sz = d.animal_sums(wpy)
    t = Sr * u
    a_s = wpy @ d.X - np.einsum("cm,cmp->cp", gam * sz, Sx)
    a_t = np.einsum("cm,cmp->cp", t, bvec)
    k_ss = np.sum(wpy * py, axis=1) - np.sum(gam * sz * sz, axis=1)
    k_tt = np.sum(t * t * ca, axis=1)
    k_ts = np.sum(t * u * sz, axis=1)
    ma_s = np.einsum("cpq,cq->cp", Minv, a_s)
    ma_t = np.einsum("cpq,cq->cp", Minv, a_t)
    k_ss -= np.sum(a_s * ma_s, axis=1)
    k_tt -= np.sum(a_t * ma_t, axis=1)
    k_ts -= np.sum(a_s * ma_t, axis=1)
    K = np.stack([np.stack([k_tt, k_ts], -1), np.stack([k_ts, k_ss], -1)], -2)
    return g, F, Q, K - F


def _pinv_free(F: np.ndarray, free: np.ndarray) -> np.ndarray:
    """Pseudo-inverse of the 2 × 2 information restricted to the free components.

    Rows and columns of fixed components are zero. A (near) rank-one free block
    ``F = λ v vᵀ`` has pseudo-inverse ``F / λ²`` with ``λ = tr F``.
    """
    out = np.zeros_like(F)
    both = free[:, 0] & free[:, 1]
    only0 = free[:, 0] & ~free[:, 1]
    only1 = free[:, 1] & ~free[:, 0]
    a, b, e = F[:, 0, 0], F[:, 0, 1], F[:, 1, 1]
    det = a * e - b * b
    with np.errstate(divide="ignore", invalid="ignore"):
        regular = both & (det > SINGULAR_INFO_RATIO * np.abs(a * e))
        inv = np.stack([np.stack([e, -b], -1), np.stack([-b, a], -1)], -2) / det[:, None, None]
        rank1 = both & ~regular
        lam = a + e
        pin1 = F / (lam * lam)[:, None, None]
        out[regular] = inv[regular]
        ok1 = rank1 & (lam > 0)
        out[ok1] = pin1[ok1]
        s0 = only0 & (a > 0)
        out[s0, 0, 0] = 1.0 / a[s0]
        s1 = only1 & (e > 0)
        out[s1, 1, 1] = 1.0 / e[s1]
    return out


def _positive_definite(H, free):
    """True where the free block of a 2 × 2 symmetric matrix is positive definite."""
    a, b, e = H[:, 0, 0], H[:, 0, 1], H[:, 1, 1]
    both = free[:, 0] & free[:, 1]
    pd_both = (a > 0) & (e > 0) & (a * e - b * b > SINGULAR_INFO_RATIO * a * e)
    pd_one = np.where(free[:, 0], a > 0, True) & np.where(free[:, 1], e > 0, True)
    return np.where(both, pd_both, pd_one)


def _direction(theta, lb, g, F, H, estimate_sigma):
    """Projected Newton / Fisher-scoring direction with an active set at the bounds.

    The Newton step (observed information H) is used where its free block is positive
    definite, the Fisher-scoring step (expected information F) elsewhere: scoring is
    robust far from the optimum, Newton converges quadratically near it.
    """
    at_lb = theta <= lb
    fixed = at_lb & (g <= 0)
    if not estimate_sigma:
        fixed[:, 1] = True
    free = ~fixed

    def solve(free):
        use_h = _positive_definite(H, free)
        info = np.where(use_h[:, None, None], H, F)
        return np.einsum("cij,cj->ci", _pinv_free(info, free), g)

    delta = solve(free)
    wrong_way = at_lb & free & (delta < 0)
    if wrong_way.any():
        free &= ~wrong_way
        delta = solve(free)
    return delta


def _take(st, idx):
    return {k: v[idx] for k, v in st.items()}


def _put(st, idx, new):
    for k, v in new.items():
        st[k][idx] = v


def _fit_chunk(d, y, s2, pres, estimate_sigma, max_iter, tol):
    """Fit the voxels of one chunk; every voxel here is estimable.

    Arrays are (c, n) with y = 0 and s2 = 1 at missing runs; returns a dict of results
    in the original units.
    """
    c, n = y.shape
    p = d.p
    n_obs = pres.sum(axis=1)
    # ---- ordinary least squares: per-voxel scale and starting values
    M0 = d.xx_sums(pres)
    b0 = (pres * y) @ d.X
    beta0 = np.linalg.solve(M0, b0[:, :, None])[:, :, 0]
    r0 = (y - beta0 @ d.X.T) * pres
    rss = np.sum(r0 * r0, axis=1)
    resid_df = np.maximum(n_obs - p, 1)
    scale2 = rss / resid_df
    present_s2 = np.where(pres > 0, s2, 0.0)
    mean_s2 = present_s2.sum(axis=1) / np.maximum(n_obs, 1)
    min_s2 = np.where(pres > 0, s2, np.inf).min(axis=1)
    tiny = scale2 <= 1e-24 * np.maximum(np.sum(pres * y * y, axis=1), 1e-300)
    scale2 = np.where(tiny, mean_s2, scale2)
    degenerate = scale2 <= 0  # no variation and no first-level variance
    scale2 = np.where(degenerate, 1.0, scale2)
    scale = np.sqrt(scale2)
    ys = y / scale[:, None]
    s2s = np.where(pres > 0, s2 / scale2[:, None], 1.0)
    r0s = r0 / scale[:, None]
    mean_s2s = mean_s2 / scale2
    # method-of-moments starting values on the OLS residuals
    n_a = d.animal_sums(pres)
    m_obs = np.sum(n_a > 0, axis=1)
    rsum_a = d.animal_sums(r0s)
    with np.errstate(divide="ignore", invalid="ignore"):
        between_ss = np.sum(np.where(n_a > 0, rsum_a * rsum_a / n_a, 0.0), axis=1)
    within_ss = np.sum(r0s * r0s, axis=1) - between_ss
    within_df = n_obs - m_obs
    total = np.sum(r0s * r0s, axis=1) / resid_df
    nbar = n_obs / np.maximum(m_obs, 1)
    between = between_ss / np.maximum(m_obs, 1)
    floor = START_FRACTION * np.maximum(total, 1e-3)
    lb = np.zeros((c, 2))
    if estimate_sigma:
        # within-animal mean square estimates σ² + mean s²; without replicates split
        # the residual variance evenly
        lb[:, 1] = np.where(min_s2 > 0, 0.0, RUN_VARIANCE_FLOOR)
        within = np.where(
            within_df > 0,
            within_ss / np.maximum(within_df, 1) - mean_s2s,
            0.5 * (total - mean_s2s),
        )
        sig0 = np.maximum(np.maximum(within, floor), lb[:, 1])
    else:
        sig0 = np.zeros(c)
    # between-animal mean square of the residuals estimates nbar·τ² + σ² + mean s²
    tau0 = np.maximum((between - sig0 - mean_s2s) / nbar, floor)
    theta = np.stack([tau0, sig0], axis=1)

    # ---- Fisher scoring on all active voxels together
    converged = np.zeros(c, dtype=bool)
    n_iter = np.zeros(c, dtype=np.int64)
    active = np.nonzero(~degenerate)[0]
    ya, sa, pa, na = ys[active], s2s[active], pres[active], n_obs[active]
    th, lba = theta[active], lb[active]
    st = _evaluate(d, th, ya, sa, pa, na)
    for _ in range(max_iter):
        if active.size == 0:
            break
        g, F, _, H = _derivatives(d, st)
        delta = _direction(th, lba, g, F, H, estimate_sigma)
        step_small = np.all(np.abs(delta) <= tol * (1.0 + th), axis=1)
        decrement = np.sum(g * delta, axis=1)
        flat = decrement <= FLAT_DECREMENT * (1.0 + np.abs(st["loglik"]))
        done = step_small
        # line search with step-halving on the voxels still moving
        alpha = np.ones(active.size)
        moving = np.nonzero(~done)[0]
        cand_th = th.copy()
        failed = np.zeros(active.size, dtype=bool)
        pending = moving
        new_st = None
        for _half in range(MAX_STEP_HALVINGS + 1):
            if pending.size == 0:
                break
            trial = np.maximum(th[pending] + alpha[pending, None] * delta[pending], lba[pending])
            sub = _evaluate(d, trial, ya[pending], sa[pending], pa[pending], na[pending])
            old = st["loglik"][pending]
            ok = sub["loglik"] >= old - 1e-12 * (1.0 + np.abs(old))
            good = pending[ok]
            cand_th[good] = trial[ok]
            if new_st is None:
                new_st = {k: v.copy() for k, v in st.items()}
            _put(new_st, good, _take(sub, ok))
            pending = pending[~ok]
            alpha[pending] *= 0.5
        failed[pending] = True
        # no increase possible: at the optimum to the precision of ℓ when the predicted
        # increase is at that level, otherwise a genuine failure (converged stays False)
        done = done | (failed & flat)
        failed &= ~flat
        n_iter[active[moving]] += 1
        if new_st is not None:
            st = new_st
        th = cand_th
        theta[active] = th
        # take the last, tiny step where it is small: it is the most accurate
        last = np.nonzero(step_small)[0]
        th[last] = np.maximum(th[last] + delta[last], lba[last])
        theta[active[last]] = th[last]
        converged[active[done]] = True
        keep = ~(done | failed)
        if not keep.all():
            active = active[keep]
            ya, sa, pa, na = ya[keep], sa[keep], pa[keep], na[keep]
            th, lba = th[keep], lba[keep]
            st = _take(st, keep)
    # ---- final quantities at the estimates, on every non-degenerate voxel
    ok = np.nonzero(~degenerate)[0]
    out = {
        "beta": np.full((c, p), np.nan),
        "cov_beta": np.full((c, p, p), np.nan),
        "var_animal": np.full(c, np.nan),
        "var_run": np.full(c, np.nan),
        "cov_theta": np.full((c, 2, 2), np.nan),
        "dcov_beta": np.full((c, 2, p, p), np.nan),
        "loglik": np.full(c, np.nan),
        "converged": converged & ~degenerate,
        "n_iter": n_iter,
    }
    if ok.size:
        th = theta[ok]
        st = _evaluate(d, th, ys[ok], s2s[ok], pres[ok], n_obs[ok])
        _, F, Q, _ = _derivatives(d, st)
        free = th > lb[ok]
        if not estimate_sigma:
            free[:, 1] = False
        cov_theta = _pinv_free(F, free)
        Minv = st["Minv"]
        dcov = np.einsum("cpq,cjqr,crs->cjps", Minv, Q, Minv)
        sc = scale[ok]
        sc2 = scale2[ok]
        var_run = np.where(th[:, 1] <= lb[ok, 1], 0.0, th[:, 1]) if estimate_sigma else th[:, 1]
        out["beta"][ok] = st["beta"] * sc[:, None]
        out["cov_beta"][ok] = Minv * sc2[:, None, None]
        out["var_animal"][ok] = th[:, 0] * sc2
        out["var_run"][ok] = var_run * sc2
        out["cov_theta"][ok] = cov_theta * (sc2 * sc2)[:, None, None]
        out["dcov_beta"][ok] = dcov
        out["loglik"][ok] = st["loglik"] - (n_obs[ok] - p) * np.log(sc)
    return out


# --------------------------------------------------------------------------------------
# compiled per-voxel kernel (numba, parallel over blocks of voxels)
# --------------------------------------------------------------------------------------
# The same algorithm as _fit_chunk, written as scalar loops over the runs of one voxel.
# The kernel releases the GIL, and fit_reml runs it on disjoint parts of each chunk in
# a few threads (a thread pool compiles much faster than numba's parallel=True).
# _fit_chunk is the vectorised numpy reference.


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_chol_inv(M, L, Minv, z):
    """Cholesky of a small SPD matrix; fills Minv, returns log|M| (NaN if not SPD)."""
    p = M.shape[0]
    logdet = 0.0
    for j in range(p):
        s = M[j, j]
        for k in range(j):
            s -= L[j, k] * L[j, k]
        if not s > 0.0:
            return np.nan
        ljj = np.sqrt(s)
        L[j, j] = ljj
        logdet += 2.0 * np.log(ljj)
        for i in range(j + 1, p):
            s = M[i, j]
            for k in range(j):
                s -= L[i, k] * L[j, k]
            L[i, j] = s / ljj
    for c in range(p):
        for i in range(p):  # forward: L z = e_c
            s = 1.0 if i == c else 0.0
            for k in range(i):
                s -= L[i, k] * z[k]
            z[i] = s / L[i, i]
        for i in range(p - 1, -1, -1):  # backward: Lᵀ x = z
            s = z[i]
            for k in range(i + 1, p):
                s -= L[k, i] * Minv[k, c]
            Minv[i, c] = s / L[i, i]
    for i in range(p):
        for j in range(i):
            v = 0.5 * (Minv[i, j] + Minv[j, i])
            Minv[i, j] = v
            Minv[j, i] = v
    return logdet


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_evaluate(tau2, sig2, y, s2, pres, X, animal, n_obs, v1, v2, v3):
    """REML log-likelihood at (τ², σ²) for one voxel; fills the scratch arrays."""
    n, p = X.shape
    m = v2.shape[1]
    w, r, S, Sy, gam, Sr, Sx, M, L, Minv, rhs, beta, z = (
        v1[0, :n],
        v1[1, :n],
        v1[2, :m],
        v1[3, :m],
        v1[4, :m],
        v1[5, :m],
        v2[0],
        v3[0],
        v3[1],
        v3[2],
        v1[13, :p],
        v1[14, :p],
        v1[15, :p],
    )
    S[:] = 0.0
    Sy[:] = 0.0
    Sx[:, :] = 0.0
    M[:, :] = 0.0
    rhs[:] = 0.0
    logdet_v = 0.0
    prod = 1.0  # Σ log v_k as the log of running products (one log per ~100 runs)
    for k in range(n):
        if pres[k]:
            vk = sig2 + s2[k]
            wk = 1.0 / vk
            w[k] = wk
            prod *= vk
            if prod > 1e150 or prod < 1e-150:
                logdet_v += np.log(prod)
                prod = 1.0
            a = animal[k]
            S[a] += wk
            Sy[a] += wk * y[k]
            for i in range(p):
                xi = wk * X[k, i]
                Sx[a, i] += xi
                rhs[i] += xi * y[k]
                for j in range(i + 1):
                    M[i, j] += xi * X[k, j]
        else:
            w[k] = 0.0
    logdet_v += np.log(prod)
    for a in range(m):
        ga = tau2 / (1.0 + tau2 * S[a])
        gam[a] = ga
        logdet_v += np.log1p(tau2 * S[a])
        for i in range(p):
            rhs[i] -= ga * Sx[a, i] * Sy[a]
            for j in range(i + 1):
                M[i, j] -= ga * Sx[a, i] * Sx[a, j]
    for i in range(p):
        for j in range(i):
            M[j, i] = M[i, j]
    logdet_m = _nb_chol_inv(M, L, Minv, z)
    if not np.isfinite(logdet_m):
        return -np.inf
    for i in range(p):
        s = 0.0
        for j in range(p):
            s += Minv[i, j] * rhs[j]
        beta[i] = s
    Sr[:] = 0.0
    quad = 0.0
    for k in range(n):
        if pres[k]:
            rk = y[k]
            for i in range(p):
                rk -= X[k, i] * beta[i]
            r[k] = rk
            quad += w[k] * rk * rk
            Sr[animal[k]] += w[k] * rk
        else:
            r[k] = 0.0
    for a in range(m):
        quad -= gam[a] * Sr[a] * Sr[a]
    ll = -0.5 * (logdet_v + logdet_m + quad + (n_obs - p) * _LOG_2PI)
    if not np.isfinite(ll):
        return -np.inf
    return ll


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_tr(A, B):
    p = A.shape[0]
    s = 0.0
    for i in range(p):
        for j in range(p):
            s += A[i, j] * B[j, i]
    return s


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_quadform(Minv, a, b):
    p = a.shape[0]
    s = 0.0
    for i in range(p):
        for j in range(p):
            s += a[i] * Minv[i, j] * b[j]
    return s


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_derivatives(tau2, pres, X, animal, v1, v2, v3, g, F, H, Q):
    """Score g, expected information F, observed information H and Q_j = XᵀV⁻¹V_jV⁻¹X."""
    n, p = X.shape
    m = v2.shape[1]
    w, r, S, gam, Sr, Sx, Minv = v1[0, :n], v1[1, :n], v1[2, :m], v1[4, :m], v1[5, :m], v2[0], v3[2]
    S2, S3, s2r, u, sz = v1[6, :m], v1[7, :m], v1[8, :m], v1[9, :m], v1[10, :m]
    Sx2, Sx3, h, bv = v2[1], v2[2], v2[3], v2[4]
    XX2, XX3, rss, rtt, rts, MQt, MQs = v3[3], v3[4], v3[5], v3[6], v3[7], v3[8], v3[9]
    a_s, a_t = v1[16, :p], v1[17, :p]
    S2[:] = 0.0
    S3[:] = 0.0
    s2r[:] = 0.0
    sz[:] = 0.0
    Sx2[:, :] = 0.0
    Sx3[:, :] = 0.0
    XX2[:, :] = 0.0
    XX3[:, :] = 0.0
    a_s[:] = 0.0
    a_t[:] = 0.0
    w2r2 = 0.0
    k_ss = 0.0
    for k in range(n):
        if pres[k]:
            a = animal[k]
            wk = w[k]
            w2 = wk * wk
            w3 = w2 * wk
            S2[a] += w2
            S3[a] += w3
            s2r[a] += w2 * r[k]
            w2r2 += w2 * r[k] * r[k]
            pyk = wk * (r[k] - gam[a] * Sr[a])
            wpy = wk * pyk
            sz[a] += wpy
            k_ss += wpy * pyk
            for i in range(p):
                xi = X[k, i]
                Sx2[a, i] += w2 * xi
                Sx3[a, i] += w3 * xi
                a_s[i] += wpy * xi
                for j in range(p):
                    XX2[i, j] += w2 * xi * X[k, j]
                    XX3[i, j] += w3 * xi * X[k, j]
    Q[:, :, :] = 0.0
    rss[:, :] = 0.0
    rtt[:, :] = 0.0
    rts[:, :] = 0.0
    t_tt = 0.0
    t_ts = 0.0
    t_ss = 0.0
    py_sq = w2r2
    pjp = 0.0
    sum_ca = 0.0
    tr_v = 0.0
    k_tt = 0.0
    k_ts = 0.0
    for a in range(m):
        ga = gam[a]
        ua = 1.0 / (1.0 + tau2 * S[a])
        u[a] = ua
        ca = S[a] * ua
        sum_ca += ca
        tr_v += S[a] - ga * S2[a]
        t_tt += ca * ca
        t_ts += S2[a] * ua * ua
        t_ss += S2[a] - 2.0 * ga * S3[a] + ga * ga * S2[a] * S2[a]
        py_sq += -2.0 * ga * Sr[a] * s2r[a] + ga * ga * Sr[a] * Sr[a] * S2[a]
        ta = Sr[a] * ua
        pjp += ta * ta
        k_ss -= ga * sz[a] * sz[a]
        k_tt += ta * ta * ca
        k_ts += ta * ua * sz[a]
        for i in range(p):
            bv[a, i] = Sx[a, i] * ua
            h[a, i] = Sx2[a, i] - ga * S2[a] * Sx[a, i]
            a_s[i] -= ga * sz[a] * Sx[a, i]
            a_t[i] += ta * bv[a, i]
        for i in range(p):
            for j in range(p):
                sxx = Sx[a, i] * Sx[a, j]
                Q[0, i, j] += bv[a, i] * bv[a, j]
                Q[1, i, j] += (
                    -ga * (Sx2[a, i] * Sx[a, j] + Sx[a, i] * Sx2[a, j]) + ga * ga * S2[a] * sxx
                )
                rss[i, j] += (
                    -ga * (Sx3[a, i] * Sx[a, j] + Sx[a, i] * Sx3[a, j])
                    + ga * ga * S3[a] * sxx
                    - ga * h[a, i] * h[a, j]
                )
                rtt[i, j] += ca * bv[a, i] * bv[a, j]
                rts[i, j] += ua * h[a, i] * bv[a, j]
    for i in range(p):
        for j in range(p):
            Q[1, i, j] += XX2[i, j]
            rss[i, j] += XX3[i, j]
    for i in range(p):
        for j in range(p):
            st = 0.0
            ss = 0.0
            for k in range(p):
                st += Minv[i, k] * Q[0, k, j]
                ss += Minv[i, k] * Q[1, k, j]
            MQt[i, j] = st
            MQs[i, j] = ss
    tr_p_tau = sum_ca - _nb_tr(Minv, Q[0])
    tr_p_sig = tr_v - _nb_tr(Minv, Q[1])
    g[0] = 0.5 * (pjp - tr_p_tau)
    g[1] = 0.5 * (py_sq - tr_p_sig)
    F[0, 0] = 0.5 * (t_tt - 2.0 * _nb_tr(Minv, rtt) + _nb_tr(MQt, MQt))
    F[0, 1] = 0.5 * (t_ts - 2.0 * _nb_tr(Minv, rts) + _nb_tr(MQt, MQs))
    F[1, 1] = 0.5 * (t_ss - 2.0 * _nb_tr(Minv, rss) + _nb_tr(MQs, MQs))
    F[1, 0] = F[0, 1]
    k_ss -= _nb_quadform(Minv, a_s, a_s)
    k_tt -= _nb_quadform(Minv, a_t, a_t)
    k_ts -= _nb_quadform(Minv, a_s, a_t)
    H[0, 0] = k_tt - F[0, 0]
    H[0, 1] = k_ts - F[0, 1]
    H[1, 0] = H[0, 1]
    H[1, 1] = k_ss - F[1, 1]


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_pinv_free(A, free0, free1, out):
    """Scalar version of :func:`_pinv_free`."""
    out[:, :] = 0.0
    a = A[0, 0]
    b = A[0, 1]
    e = A[1, 1]
    if free0 and free1:
        det = a * e - b * b
        if det > SINGULAR_INFO_RATIO * abs(a * e):
            out[0, 0] = e / det
            out[0, 1] = -b / det
            out[1, 0] = -b / det
            out[1, 1] = a / det
        else:
            lam = a + e
            if lam > 0.0:
                out[0, 0] = a / (lam * lam)
                out[0, 1] = b / (lam * lam)
                out[1, 0] = b / (lam * lam)
                out[1, 1] = e / (lam * lam)
    elif free0:
        if a > 0.0:
            out[0, 0] = 1.0 / a
    elif free1:
        if e > 0.0:
            out[1, 1] = 1.0 / e


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_step(H, F, g, free0, free1, tmp, delta):
    a, b, e = H[0, 0], H[0, 1], H[1, 1]
    if free0 and free1:
        pd = a > 0.0 and e > 0.0 and a * e - b * b > SINGULAR_INFO_RATIO * a * e
    elif free0:
        pd = a > 0.0
    elif free1:
        pd = e > 0.0
    else:
        pd = True
    _nb_pinv_free(H if pd else F, free0, free1, tmp)
    delta[0] = tmp[0, 0] * g[0] + tmp[0, 1] * g[1]
    delta[1] = tmp[1, 0] * g[0] + tmp[1, 1] * g[1]


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_direction(theta, lb, g, F, H, estimate_sigma, tmp, delta):
    """Scalar version of :func:`_direction`."""
    at0 = theta[0] <= lb[0]
    at1 = theta[1] <= lb[1]
    free0 = not (at0 and g[0] <= 0.0)
    free1 = estimate_sigma and not (at1 and g[1] <= 0.0)
    _nb_step(H, F, g, free0, free1, tmp, delta)
    wrong0 = at0 and free0 and delta[0] < 0.0
    wrong1 = at1 and free1 and delta[1] < 0.0
    if wrong0 or wrong1:
        _nb_step(H, F, g, free0 and not wrong0, free1 and not wrong1, tmp, delta)


# Scratch space for one voxel at a time, reused across voxels. v1 holds the vectors
# (rows: w, r, S, Sy, gam, Sr, S2, S3, s2r, u, sz, nr, ra, rhs, beta, z, a_s, a_t),
# v2 the (animals, p) arrays (Sx, Sx2, Sx3, h, bv) and v3 the (p, p) matrices (M, L,
# Minv, XX2, XX3, rss, rtt, rts, MQt, MQs). Three arrays keep the compiled code small.
_N_V1, _N_V2, _N_V3 = 18, 5, 10


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_workspace(n, m, p):
    return (
        np.zeros((_N_V1, max(n, m, p))),
        np.zeros((_N_V2, m, p)),
        np.zeros((_N_V3, p, p)),
    )


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_fit_voxel(
    y,
    s2,
    pres,
    X,
    animal,
    m,
    estimate_sigma,
    max_iter,
    tol,
    v1,
    v2,
    v3,
    o_beta,
    o_cov,
    o_theta,
    o_cth,
    o_dcov,
    o_misc,
):
    """Fit one voxel (columns already copied); writes the outputs, returns nothing."""
    n, p = X.shape
    r = v1[1, :n]
    # ---- ordinary least squares: scale and starting values
    n_obs = 0
    sum_s2 = 0.0
    min_s2 = np.inf
    yy = 0.0
    M, L, Minv, rhs, beta = v3[0], v3[1], v3[2], v1[13, :p], v1[14, :p]
    M[:, :] = 0.0
    rhs[:] = 0.0
    for k in range(n):
        if pres[k]:
            n_obs += 1
            sum_s2 += s2[k]
            min_s2 = min(min_s2, s2[k])
            yy += y[k] * y[k]
            for i in range(p):
                rhs[i] += X[k, i] * y[k]
                for j in range(p):
                    M[i, j] += X[k, i] * X[k, j]
    _nb_chol_inv(M, L, Minv, v1[15, :p])
    for i in range(p):
        s = 0.0
        for j in range(p):
            s += Minv[i, j] * rhs[j]
        beta[i] = s
    rss = 0.0
    nr, ra = v1[11, :m], v1[12, :m]
    nr[:] = 0.0
    ra[:] = 0.0
    for k in range(n):
        if pres[k]:
            rk = y[k]
            for i in range(p):
                rk -= X[k, i] * beta[i]
            r[k] = rk
            rss += rk * rk
            nr[animal[k]] += 1.0
            ra[animal[k]] += rk
    resid_df = max(n_obs - p, 1)
    mean_s2 = sum_s2 / max(n_obs, 1)
    scale2 = rss / resid_df
    if scale2 <= 1e-24 * max(yy, 1e-300):
        scale2 = mean_s2
    if not scale2 > 0.0:
        o_misc[0] = np.nan  # degenerate: no variation, no first-level variance
        o_misc[1] = 0.0
        o_misc[2] = 0.0
        return
    scale = np.sqrt(scale2)
    for k in range(n):
        if pres[k]:
            y[k] /= scale
            s2[k] /= scale2
            r[k] /= scale
    between_ss = 0.0
    m_obs = 0
    for a in range(m):
        if nr[a] > 0:
            m_obs += 1
            ra_s = ra[a] / scale
            between_ss += ra_s * ra_s / nr[a]
    total_ss = rss / scale2
    total = total_ss / resid_df
    within_df = n_obs - m_obs
    nbar = n_obs / max(m_obs, 1)
    between = between_ss / max(m_obs, 1)
    floor = START_FRACTION * max(total, 1e-3)
    mean_s2s = mean_s2 / scale2
    lb = np.zeros(2)
    th = np.zeros(2)
    if estimate_sigma:
        lb[1] = 0.0 if min_s2 > 0.0 else RUN_VARIANCE_FLOOR
        if within_df > 0:
            within = (total_ss - between_ss) / within_df - mean_s2s
        else:
            within = 0.5 * (total - mean_s2s)
        th[1] = max(max(within, floor), lb[1])
    th[0] = max((between - th[1] - mean_s2s) / nbar, floor)
    # ---- Newton / Fisher scoring with step-halving
    g = np.zeros(2)
    F = np.zeros((2, 2))
    H = np.zeros((2, 2))
    Q = np.zeros((2, p, p))
    tmp = np.zeros((2, 2))
    delta = np.zeros(2)
    trial = np.zeros(2)
    ll = _nb_evaluate(th[0], th[1], y, s2, pres, X, animal, n_obs, v1, v2, v3)
    converged = False
    n_iter = 0
    for _ in range(max_iter):
        _nb_derivatives(th[0], pres, X, animal, v1, v2, v3, g, F, H, Q)
        _nb_direction(th, lb, g, F, H, estimate_sigma, tmp, delta)
        small = abs(delta[0]) <= tol * (1.0 + th[0]) and abs(delta[1]) <= tol * (1.0 + th[1])
        flat = g[0] * delta[0] + g[1] * delta[1] <= FLAT_DECREMENT * (1.0 + abs(ll))
        if small:
            # take the last, tiny step: it is the most accurate
            th[0] = max(th[0] + delta[0], lb[0])
            th[1] = max(th[1] + delta[1], lb[1])
            converged = True
            break
        alpha = 1.0
        accepted = False
        for _half in range(MAX_STEP_HALVINGS + 1):
            trial[0] = max(th[0] + alpha * delta[0], lb[0])
            trial[1] = max(th[1] + alpha * delta[1], lb[1])
            llt = _nb_evaluate(trial[0], trial[1], y, s2, pres, X, animal, n_obs, v1, v2, v3)
            if llt >= ll - 1e-12 * (1.0 + abs(ll)):
                accepted = True
                break
            alpha *= 0.5
        n_iter += 1
        if not accepted:
            # no increase possible: converged when the predicted increase is at the
            # precision of ℓ, otherwise a genuine failure
            converged = flat
            break
        th[0] = trial[0]
        th[1] = trial[1]
        ll = llt
    # ---- final quantities at the estimate
    ll = _nb_evaluate(th[0], th[1], y, s2, pres, X, animal, n_obs, v1, v2, v3)
    _nb_derivatives(th[0], pres, X, animal, v1, v2, v3, g, F, H, Q)
    free0 = th[0] > lb[0]
    free1 = estimate_sigma and th[1] > lb[1]
    _nb_pinv_free(F, free0, free1, tmp)
    s4 = scale2 * scale2
    for i in range(2):
        for j in range(2):
            o_cth[i, j] = tmp[i, j] * s4
    for i in range(p):
        o_beta[i] = beta[i] * scale
        for j in range(p):
            o_cov[i, j] = Minv[i, j] * scale2
    for q in range(2):
        for i in range(p):
            for j in range(p):
                s = 0.0
                for k in range(p):
                    for l in range(p):
                        s += Minv[i, k] * Q[q, k, l] * Minv[l, j]
                o_dcov[q, i, j] = s
    o_theta[0] = th[0] * scale2
    if estimate_sigma and th[1] > lb[1]:
        o_theta[1] = th[1] * scale2
    else:
        o_theta[1] = 0.0
    o_misc[0] = ll - (n_obs - p) * np.log(scale)
    o_misc[1] = 1.0 if converged else 0.0
    o_misc[2] = n_iter


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_fit_many(
    y,
    variance,
    present,
    X,
    animal,
    m,
    estimate_sigma,
    max_iter,
    tol,
    o_beta,
    o_cov,
    o_theta,
    o_cth,
    o_dcov,
    o_misc,
):
    """Fit the voxels in the rows of the (voxels, runs) arrays ``y``, ``variance``.

    Runs without the GIL so that several threads can fit disjoint sets of voxels.
    """
    nv, n = y.shape
    p = X.shape[1]
    v1, v2, v3 = _nb_workspace(n, m, p)
    yv = np.zeros(n)
    sv = np.zeros(n)
    pv = np.zeros(n, dtype=np.bool_)
    for t in range(nv):
        for k in range(n):
            pv[k] = present[t, k]
            yv[k] = y[t, k] if pv[k] else 0.0
            sv[k] = variance[t, k] if pv[k] else 1.0
        _nb_fit_voxel(
            yv,
            sv,
            pv,
            X,
            animal,
            m,
            estimate_sigma,
            max_iter,
            tol,
            v1,
            v2,
            v3,
            o_beta[t],
            o_cov[t],
            o_theta[t],
            o_cth[t],
            o_dcov[t],
            o_misc[t],
        )


def _fit_compiled(
    y, variance, present, idx, X, animal, n_animals, estimate_sigma, max_iter, tol, pool, n_threads
):
    """Run the compiled kernel on the voxels ``idx``, split over a few threads."""
    k = idx.size
    p = X.shape[1]
    o_beta = np.full((k, p), np.nan)
    o_cov = np.full((k, p, p), np.nan)
    o_theta = np.full((k, 2), np.nan)
    o_cth = np.full((k, 2, 2), np.nan)
    o_dcov = np.full((k, 2, p, p), np.nan)
    o_misc = np.zeros((k, 3))
    outs = (o_beta, o_cov, o_theta, o_cth, o_dcov, o_misc)
    n_jobs = min(n_threads, max(k // _MIN_CHUNK, 1))
    bounds = np.linspace(0, k, n_jobs + 1).astype(np.int64)
    jobs = [slice(int(lo), int(hi)) for lo, hi in zip(bounds[:-1], bounds[1:], strict=True)]
    # voxel-major copies of the chunk, so the kernel reads each voxel's runs contiguously
    if idx.size and idx[-1] - idx[0] + 1 == idx.size:
        cols = slice(int(idx[0]), int(idx[-1]) + 1)
    else:
        cols = idx
    # (float32 input becomes float64 here, one chunk at a time: exact, as every float32
    # is a float64)
    yc = np.ascontiguousarray(y[:, cols].T, dtype=np.float64)
    pc = np.ascontiguousarray(present[:, cols].T)
    if variance is None:
        vc = np.zeros_like(yc)
    else:
        vc = np.ascontiguousarray(variance[:, cols].T, dtype=np.float64)

    def run(part: slice) -> None:
        _nb_fit_many(
            yc[part],
            vc[part],
            pc[part],
            X,
            animal,
            n_animals,
            bool(estimate_sigma),
            int(max_iter),
            float(tol),
            *(o[part] for o in outs),  # slices are views: the kernel writes in place
        )

    list(pool.map(run, jobs))
    return {
        "beta": o_beta,
        "cov_beta": o_cov,
        "var_animal": o_theta[:, 0],
        "var_run": o_theta[:, 1],
        "cov_theta": o_cth,
        "dcov_beta": o_dcov,
        "loglik": o_misc[:, 0],
        "converged": o_misc[:, 1] > 0,
        "n_iter": o_misc[:, 2].astype(np.int64),
    }


def _default_chunk(n_runs: int) -> int:
    return max(_MIN_CHUNK, DEFAULT_CHUNK_BYTES // (8 * max(n_runs, 1) * _ARRAYS_PER_CHUNK))


def fit_reml(
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    *,
    estimate_run_variance: bool = True,
    max_iter: int = 100,
    tol: float = 1e-8,
    chunk_size: int | None = None,
    memory_gb: float | None = None,
    backend: str = "compiled",
) -> MixedFit:
    """Fit ``y = Xβ + u_animal + e`` by REML at every voxel at once.

    Parameters
    ----------
    y : ndarray, shape (n_runs, V)
        First-level effect of each run at each voxel; NaN where a run has no data.
        float32 or float64; float32 is not copied as a whole but converted to float64
        one chunk of voxels at a time (the fit itself is in float64).
    variance : ndarray, shape (n_runs, V), or None
        First-level variance ``s_k²`` of each effect (NaN: no data). None means 0.
        float32 or float64, as ``y``.
    X : ndarray, shape (n_runs, p)
        Fixed-effects design, one row per run.
    animal : ndarray of int, shape (n_runs,)
        Animal code 0..m-1 of each run.
    estimate_run_variance : bool
        Estimate σ², the between-run variance beyond ``s_k²``. False fixes σ² = 0 (the
        random-effects meta-analysis model per animal; needs variances > 0).
    max_iter : int
        Maximum Fisher-scoring iterations per voxel.
    tol : float
        Convergence when every component of the scoring step is below
        ``tol · (1 + θ_j)`` in units of the voxel's residual variance.
    chunk_size : int, optional
        Voxels processed together. Default: from ``memory_gb`` when given
        (:func:`grouplevel.memory.chunk_voxels`), else a working set near
        ``DEFAULT_CHUNK_BYTES``.
    memory_gb : float, optional
        Memory budget in GiB (``[compute] memory_gb``); sets the chunk size so that one
        chunk's working set stays within ``grouplevel.memory.CHUNK_SHARE`` of it.
        Ignored when ``chunk_size`` is given.
    backend : {"compiled", "numpy"}
        ``"compiled"`` (default) runs a numba kernel over voxels in parallel;
        ``"numpy"`` runs the same algorithm vectorised over each chunk of voxels (the
        reference the compiled kernel is tested against).

    Returns
    -------
    MixedFit

    Notes
    -----
    Voxels with ``n_runs ≤ rank(X)``, with a design that is rank deficient on the runs
    with data, or with no variation and no first-level variances are not fitted: their
    estimates are NaN and ``converged`` is False. A voxel whose iteration stops without
    meeting the criterion keeps its last estimate with ``converged`` False.

    The compiled kernel is built by numba on first use and cached next to the module
    (about half a minute once per installation); it runs in as many threads as the
    process may use cores. Peak extra memory is a boolean runs × voxels presence mask,
    a few chunk-sized float64 copies and the outputs, below the size of ``y``; float32
    input is never copied as a whole. With one run per animal and no
    first-level variances τ² and σ² are not separately identified; only their sum is
    meaningful then (the information is rank one and its pseudo-inverse is used).

    References
    ----------
    Harville, D. A. (1977). Journal of the American Statistical Association 72:320–338.
    Patterson, H. D., & Thompson, R. (1971). Biometrika 58:545–554.
    Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS.
    Springer.
    """
    y, variance, X, animal = _check_inputs(y, variance, X, animal, estimate_run_variance)
    if max_iter < 1:
        raise ArgumentError(f"fit_reml: max_iter must be at least 1, got {max_iter}.")
    n_runs, n_vox = y.shape
    p = X.shape[1]
    n_animals = int(animal.max()) + 1 if n_runs else 0
    present = np.isfinite(y)
    if variance is not None:
        present &= np.isfinite(variance)
    d = _Design(X, animal, n_animals)
    runs_v = present.sum(axis=0)
    animals_v = np.zeros(n_vox, dtype=np.int64)
    for a in range(n_animals):  # loop over animals, not voxels
        animals_v += present[animal == a].any(axis=0)
    patterns, inverse = presence_patterns(present)
    ranks = _pattern_ranks(X, patterns)
    estimable = (ranks[inverse] == p) & (runs_v > p)

    beta = np.full((n_vox, p), np.nan)
    cov_beta = np.full((n_vox, p, p), np.nan)
    var_animal = np.full(n_vox, np.nan)
    var_run = np.full(n_vox, np.nan)
    cov_theta = np.full((n_vox, 2, 2), np.nan)
    dcov_beta = np.full((n_vox, 2, p, p), np.nan)
    loglik = np.full(n_vox, np.nan)
    converged = np.zeros(n_vox, dtype=bool)
    n_iter = np.zeros(n_vox, dtype=np.int64)

    if backend not in ("compiled", "numpy"):
        raise ArgumentError(f"fit_reml: backend must be 'compiled' or 'numpy', got {backend!r}.")
    if chunk_size is not None:
        cs = int(chunk_size)
    elif memory_gb is not None:
        cs = chunk_voxels(n_runs, memory_gb)
    else:
        cs = _default_chunk(n_runs)
    if cs < 1:
        raise ArgumentError(f"fit_reml: chunk_size must be positive, got {chunk_size}.")
    idx_all = np.nonzero(estimable)[0]
    n_threads = available_cores() if backend == "compiled" else 1
    with ThreadPoolExecutor(max_workers=n_threads) as pool:
        for start in range(0, idx_all.size, cs):
            idx = idx_all[start : start + cs]
            if backend == "compiled":
                res = _fit_compiled(
                    y,
                    variance,
                    present,
                    idx,
                    X,
                    animal,
                    n_animals,
                    estimate_run_variance,
                    max_iter,
                    tol,
                    pool,
                    n_threads,
                )
            else:
                pres = present[:, idx].T.astype(np.float64)
                yc = np.where(pres > 0, y[:, idx].T.astype(np.float64, copy=False), 0.0)
                if variance is None:
                    s2 = np.where(pres > 0, 0.0, 1.0)
                else:
                    s2 = np.where(pres > 0, variance[:, idx].T.astype(np.float64, copy=False), 1.0)
                res = _fit_chunk(d, yc, s2, pres, estimate_run_variance, max_iter, tol)
                del yc, s2, pres
            beta[idx] = res["beta"]
            cov_beta[idx] = res["cov_beta"]
            var_animal[idx] = res["var_animal"]
            var_run[idx] = res["var_run"]
            cov_theta[idx] = res["cov_theta"]
            dcov_beta[idx] = res["dcov_beta"]
            loglik[idx] = res["loglik"]
            converged[idx] = res["converged"]
            n_iter[idx] = res["n_iter"]
    return MixedFit(
        beta=beta,
        cov_beta=cov_beta,
        var_animal=var_animal,
        var_run=var_run,
        cov_theta=cov_theta,
        dcov_beta=dcov_beta,
        loglik=loglik,
        converged=converged,
        n_iter=n_iter,
        n_runs=runs_v.astype(np.int64),
        n_animals=animals_v.astype(np.int64),
        estimate_run_variance=bool(estimate_run_variance),
    )
