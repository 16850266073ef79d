"""Vectorised REML for runs nested in sessions nested in animals, with random slopes.

For one voxel, run ``k`` of session ``s(k)`` of animal ``a(k)`` in group ``g(a)``:

    y_k = x_kᵀβ + z_kᵀu_a(k) + w_s(k) + e_k
    u_a ~ N(0, T_g(a)),   w_s ~ N(0, ω²),   e_k ~ N(0, σ² + s_k²)

``z_k = (1, slopes_k)`` holds the animal's intercept and one slope for each column of
``slopes`` (an effect that varies within animals); ``T_g`` is a full, positive
semi-definite (1 + q) × (1 + q) matrix, one per animal group; ``ω²`` is the variance of
sessions within animals; ``σ²`` the run variance beyond the known first-level variance
``s_k²``.

The covariance of the runs is block diagonal over animals and linear in the variance
parameters θ (the entries of every ``T_g``, ω², σ²):

    V = Σ_j θ_j G_j + diag(s²),

with fixed, animal-block-diagonal ``G_j``. The data of one chunk of voxels are laid out
as (voxels, animals, runs of the animal) arrays; every quantity REML needs (log|V|,
``XᵀV⁻¹X``, the score and the expected and observed information, with the traces
``tr(P G_i P G_j)``) is assembled from products of the small per-animal blocks,
summed over animals. No n × n matrix is formed and no Python loop runs over voxels:
the per-animal Cholesky factorisations and the GLS fit run in one compiled (numba)
loop, the traces in another that uses the low-rank form of the ``G_j`` (a few columns
z and session indicators per animal, and the identity;
:mod:`grouplevel.model.block_sums`), and chunks of voxels are fitted in a few threads.
The few voxels of each chunk that are still iterating when the rest has finished are
continued together with those of all other chunks.

A run missing at a voxel (NaN effect or variance) is decoupled exactly: its row and
column of the animal block are replaced by those of the identity and its entries of the
inverse block are set to zero, so it adds nothing to any sum (as if its variance were
infinite). The same holds for the padding of animals with fewer runs than the largest.

Parametrisation and boundaries. The iteration runs on φ with θ quadratic in φ:
``T_g = L_g L_gᵀ`` (``L_g`` lower triangular, entries of any sign), ``ω² = φ_ω²``,
``σ² = φ_σ²``. Every φ gives a positive semi-definite ``T_g`` and non-negative
variances, so the constraints never bind in φ; an estimate on the boundary (a zero
variance, a correlation of ±1) is an ordinary stationary point in φ, reached by Newton
steps. The step is Newton's on the REML log-likelihood in φ (observed information,
chain rule through θ(φ)) where that is negative definite, and Fisher scoring in φ
(expected information, lightly regularised) elsewhere, with step-halving on the
log-likelihood. Near a boundary (a nearly singular ``T_g`` or a nearly zero variance)
Newton's step in θ itself, projected back on the admissible set (negative eigenvalues
of ``T_g`` set to 0), is tried first and kept when it increases the log-likelihood: on
a rank-deficient ``T_g`` the Cholesky factor can otherwise only rotate slowly towards
the optimum. Convergence is judged on θ, or on a predicted increase of the
log-likelihood below ``tol`` (flat ridges). Each voxel's data are divided by the
residual standard deviation of an ordinary least-squares fit, as in
:mod:`grouplevel.model.reml`, so the iteration works with numbers of order 1.

Starting values come from moments: per-animal least-squares fits of the ordinary
residuals on ``z`` (the spread of the per-animal coefficients for ``T``, the residual
within-animal variance for σ², the spread of session means for ω²).

References
----------
Patterson, H. D., & Thompson, R. (1971). Recovery of inter-block information when block
sizes are unequal. Biometrika 58:545–554.

Harville, D. A. (1977). Maximum likelihood approaches to variance component estimation
and to related problems. Journal of the American Statistical Association 72:320–338.

Pinheiro, J. C., & Bates, D. M. (1996). Unconstrained parametrizations for
variance-covariance matrices. Statistics and Computing 6:289–296.

Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS. Springer.

Satterthwaite, F. E. (1946). An approximate distribution of estimates of variance
components. Biometrics Bulletin 2:110–114.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from grouplevel.compiled import lazy_njit
from grouplevel.machine import available_cores as _available_cores
from grouplevel.memory import CHUNK_SHARE, GIB, WORKING_BYTES
from grouplevel.model.block_sums import block_sums, low_rank_components
from grouplevel.model.reml import presence_patterns

# Working set of one chunk of voxels when no memory budget is given (common practice:
# a few tens of MiB, small next to the input maps; same figure as reml.py).
DEFAULT_CHUNK_BYTES = 48 * 2**20
# Chunk sizes are kept within these bounds (below the lower one the per-operation
# overhead of numpy dominates; our own measurement on the mixed-model benchmark).
MIN_CHUNK = 64
MAX_CHUNK = 8192
# Arrays of the per-voxel working set counted twice (temporaries of the batched
# products; our own estimate from the code below).
WORKSPACE_FACTOR = 2.0

# Step-halving: at most this many halvings of a step (2⁻³⁰ ≈ 1e-9).
MAX_STEP_HALVINGS = 30
# Halvings are tried several at once while (voxels left) × (lengths) stays below this
# many likelihood evaluations: one call then costs about as much as its numpy overhead
# (our own measurement on the mixed-model benchmark).
HALVING_BATCH = 256
# A chunk stops iterating when no more than this share of its voxels (at least one) is
# left; those voxels are continued together with the slow voxels of all other chunks,
# so that the long tail of a few slow voxels is paid once, not once per chunk (our own
# choice).
STRAGGLER_SHARE = 0.02
# Starting variances are kept at least this fraction of the residual variance (1 after
# scaling) inside the parameter space, so that the iteration can move both ways
# (common practice).
START_FRACTION = 0.05
# Ridge added to the φ-space Fisher information, relative to its largest diagonal
# element, when the observed information is not negative definite (our own choice:
# keeps the step finite where a factor of T is exactly zero).
FISHER_RIDGE = 1e-8
# A step whose predicted increase of ℓ is below this fraction of |ℓ| cannot be resolved
# in double precision; failing to increase ℓ then means the optimum is reached.
FLAT_DECREMENT = 1e-11
# Convergence also when the predicted increase of ℓ (gᵀδ) is below this multiple of
# tol · (1 + |ℓ|): the estimate cannot be improved by more than that (our own choice).
GAIN_FRACTION = 1e-2
# A T_g whose smallest eigenvalue is below this fraction of its largest, or a scalar
# variance below this fraction of the residual variance, is near the boundary: the
# projected θ-space step is tried there (our own choice).
NEAR_BOUNDARY = 1e-2
# A zero variance (or a null direction of T_g) is left again when ∂ℓ/∂θ along it
# exceeds ESCAPE_GRADIENT, by a move of ESCAPE_STEP times the largest eigenvalue of T_g
# (at least 1; scaled units, residual variance 1); our own choices.
ESCAPE_GRADIENT = 1e-6
ESCAPE_STEP = 1e-3
# A variance below this fraction of the voxel's residual variance counts as estimated
# on the boundary 0 (its component, and the covariances involving it, are then left out
# of the Satterthwaite degrees of freedom); our own choice, well below any variance
# that the data can resolve.
BOUNDARY_FRACTION = 1e-6
# A positive definite matrix whose condition number is bounded below 1 / PINV_SAFE is
# inverted directly where a pseudo-inverse is asked for (numpy's pinv cuts singular
# values below 1e-15 of the largest, three orders further; our own choice).
PINV_SAFE = 1e-12
# A design column lies in the span of the animal-level columns and the random slopes
# when its least-squares residual is below this fraction of its norm (common practice
# for floating-point data).
SPAN_TOLERANCE = 1e-8

_LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class MixedModelFit:
    """REML fit of the generalised run-in-session-in-animal model at every voxel.

    Attributes
    ----------
    beta : ndarray, shape (V, p)
        GLS fixed effects at the REML estimates.
    cov_beta : ndarray, shape (V, p, p)
        Model-based covariance ``(XᵀV̂⁻¹X)⁻¹``.
    components : dict of str to ndarray, shape (V,)
        Variance-component estimates by name: ``"animal"`` (or ``"animal[<group>]"``),
        ``"slope[<slope>]"`` (or ``"slope[<slope>][<group>]"``), ``"cov[<slope>]"``
        (intercept–slope covariance), ``"cov[<slope>,<slope>]"`` (two slopes),
        ``"session"`` and ``"run"`` as present in the model.
    var_animal : ndarray, shape (V,)
        Intercept variance (of the first group when there are groups).
    var_run : ndarray, shape (V,)
        σ̂² (zeros when it was fixed at 0).
    loglik : ndarray, shape (V,)
        REML log-likelihood at the estimate, including the ``2π`` constant.
    converged : ndarray of bool, shape (V,)
        False where the iteration did not meet its criterion and at voxels that could
        not be fitted (NaN estimates there).
    n_iter : ndarray of int, shape (V,)
    n_runs, n_animals : ndarray of int, shape (V,)
        Runs with data and animals with at least one run with data.
    estimate_run_variance : bool
    component_names : tuple of str
        Order of the components in ``cov_components`` and ``dcov_beta_components``.
    cov_components : ndarray, shape (V, J, J)
        Inverse expected REML information of the components, restricted to those not
        on the boundary (zero rows and columns for the others).
    dcov_beta_components : ndarray, shape (V, J, p, p)
        Derivative of ``cov_beta`` with respect to each component.
    group_names : tuple of str
        The animal groups (one unnamed group when ``animal_group`` was not given).
    info_by_group : ndarray, shape (V, G, p, p)
        ``Σ_{a in group} X_aᵀV̂_a⁻¹X_a``, each group's share of ``XᵀV̂⁻¹X`` (used by
        :func:`group_welch_df`).
    animals_by_group : ndarray of int, shape (V, G)
        Animals with data in each group.

    Notes
    -----
    ``grouplevel.model.test_contrast`` reads ``beta`` and ``cov_beta`` only and works on
    this fit unchanged. ``grouplevel.model.satterthwaite_df`` is written for the
    two-component random-intercept fit; for this fit use
    :func:`mixed_satterthwaite_df` (reading ``cov_theta`` or ``dcov_beta`` raises a
    ValueError that says so).
    """

    beta: np.ndarray
    cov_beta: np.ndarray
    components: dict[str, np.ndarray]
    var_animal: np.ndarray
    var_run: np.ndarray
    loglik: np.ndarray
    converged: np.ndarray
    n_iter: np.ndarray
    n_runs: np.ndarray
    n_animals: np.ndarray
    estimate_run_variance: bool
    component_names: tuple[str, ...] = ()
    cov_components: np.ndarray = field(default=None, repr=False)
    dcov_beta_components: np.ndarray = field(default=None, repr=False)
    group_names: tuple[str, ...] = ()
    info_by_group: np.ndarray = field(default=None, repr=False)
    animals_by_group: np.ndarray = field(default=None, repr=False)

    @property
    def cov_theta(self) -> np.ndarray:
        """Not available: see :func:`mixed_satterthwaite_df` (raises ValueError)."""
        raise ValueError(_NOT_TWO_COMPONENTS)

    @property
    def dcov_beta(self) -> np.ndarray:
        """Not available: see :func:`mixed_satterthwaite_df` (raises ValueError)."""
        raise ValueError(_NOT_TWO_COMPONENTS)


_NOT_TWO_COMPONENTS = (
    "this fit is of the generalised mixed model, not the two-component random-intercept "
    "model that grouplevel.model.satterthwaite_df handles; use "
    "grouplevel.model.mixed_satterthwaite_df for its Satterthwaite degrees of freedom."
)


# --------------------------------------------------------------------------------------
# argument checks
# --------------------------------------------------------------------------------------


def _as_maps(a, name: str) -> np.ndarray:
    a = np.asarray(a)
    if a.dtype not in (np.float32, np.float64):
        a = a.astype(np.float64)
    if a.ndim == 1:
        a = a[:, None]
    if a.ndim != 2:
        raise ValueError(f"fit_mixed: {name} must be a (runs, voxels) array, got {a.shape}.")
    return a


def _as_codes(a, n: int, name: str) -> np.ndarray:
    a = np.asarray(a)
    if a.ndim != 1 or a.shape[0] != n:
        raise ValueError(f"fit_mixed: {name} must have one entry per row ({n}), got {a.shape}.")
    if not np.issubdtype(a.dtype, np.integer):
        if np.issubdtype(a.dtype, np.floating) and np.all(a == np.round(a)):
            a = a.astype(np.int64)
        else:
            raise ValueError(f"fit_mixed: {name} must hold integer codes 0, 1, 2, ...")
    a = a.astype(np.int64)
    if n and a.min() < 0:
        raise ValueError(f"fit_mixed: {name} codes must be non-negative.")
    return a


def _check_variance(variance, y, estimate_run_variance):
    if variance is not None:
        variance = _as_maps(variance, "variance")
        if variance.shape != y.shape:
            raise ValueError(f"fit_mixed: variance has shape {variance.shape} but y has {y.shape}.")
        with np.errstate(invalid="ignore"):
            if np.any(variance < 0):
                raise ValueError("fit_mixed: first-level variances must be ≥ 0.")
    if not estimate_run_variance:
        if variance is None:
            raise ValueError(
                "fit_mixed: with estimate_run_variance=False the first-level variances "
                "must be given (they are the only run-level variance)."
            )
        with np.errstate(invalid="ignore"):
            if np.any((variance == 0) & np.isfinite(y)):
                raise ValueError(
                    "fit_mixed: a first-level variance is 0 at a run with data, which "
                    "estimate_run_variance=False cannot use; estimate the run variance."
                )
    return variance


def _check_slopes(slopes, slope_names, n):
    if slopes is None:
        if len(slope_names):
            raise ValueError("fit_mixed: slope_names given without slopes.")
        return np.zeros((n, 0)), ()
    slopes = np.asarray(slopes, dtype=np.float64)
    if slopes.ndim == 1:
        slopes = slopes[:, None]
    if slopes.ndim != 2 or slopes.shape[0] != n:
        raise ValueError(f"fit_mixed: slopes must be ({n}, q), got {slopes.shape}.")
    if not np.all(np.isfinite(slopes)):
        raise ValueError("fit_mixed: slopes contain NaN or infinite values.")
    q = slopes.shape[1]
    names = tuple(str(s) for s in slope_names) or tuple(f"{j}" for j in range(q))
    if len(names) != q or len(set(names)) != q:
        raise ValueError(f"fit_mixed: give {q} distinct slope_names, got {slope_names!r}.")
    return slopes, names


def _check_groups(animal_group, group_names, m):
    if animal_group is None:
        if len(group_names):
            raise ValueError("fit_mixed: group_names given without animal_group.")
        return np.zeros(m, dtype=np.int64), ()
    groups = _as_codes(animal_group, m, "animal_group")
    n_groups = int(groups.max()) + 1 if m else 0
    names = tuple(str(g) for g in group_names) or tuple(f"{g}" for g in range(n_groups))
    if len(names) != n_groups or len(set(names)) != n_groups:
        raise ValueError(f"fit_mixed: give {n_groups} distinct group_names, got {group_names!r}.")
    if np.unique(groups).size != n_groups:
        raise ValueError("fit_mixed: animal_group codes must run 0..G-1 without gaps.")
    return groups, names


def _check_session(session, animal, n):
    if session is None:
        return None
    session = _as_codes(session, n, "session")
    owner = {}
    for s, a in zip(session.tolist(), animal.tolist(), strict=True):
        if owner.setdefault(s, a) != a:
            raise ValueError(
                f"fit_mixed: session code {s} occurs in two animals; sessions are nested "
                "in animals, so give each animal's sessions their own codes."
            )
    return session


# --------------------------------------------------------------------------------------
# the model's structure: layout by animal, G_j matrices, θ(φ)
# --------------------------------------------------------------------------------------


class _Structure:
    """Everything about the model that is the same at every voxel."""

    def __init__(self, X, animal, slopes, slope_names, session, groups, group_names, est_run):
        n, p = X.shape
        m = int(animal.max()) + 1
        self.n, self.p, self.m = n, p, m
        # slot of each run inside its animal's block
        order = np.argsort(animal, kind="stable")
        counts = np.bincount(animal, minlength=m)
        starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
        slot = np.empty(n, dtype=np.int64)
        slot[order] = np.arange(n) - starts[animal[order]]
        self.width = int(counts.max())
        self.animal, self.slot = animal, slot
        w = self.width
        self.X = np.zeros((m, w, p))
        self.X[animal, slot] = X
        r = 1 + slopes.shape[1]
        Z = np.zeros((m, w, r))
        Z[animal, slot, 0] = 1.0
        Z[animal, slot, 1:] = slopes
        self.Z = Z
        names, mats, quad = [], [], []
        # the same matrices in low-rank form: basis columns z (then one indicator per
        # session of the animal), entries (column, column, coefficient), identity
        entries, identity = [], []
        n_groups = int(groups.max()) + 1
        self.n_groups = n_groups
        self.groups = groups
        self.group_onehot = (groups[:, None] == np.arange(n_groups)[None, :]).astype(float)
        labels = ("intercept",) + tuple(slope_names)
        for g in range(n_groups):
            in_g = (groups == g).astype(float)[:, None, None]
            suffix = f"[{group_names[g]}]" if group_names else ""
            for a_ in range(r):
                for b_ in range(a_ + 1):
                    Gj = Z[:, :, a_, None] * Z[:, None, :, b_]
                    if a_ != b_:
                        Gj = Gj + np.swapaxes(Gj, 1, 2)
                    mats.append(Gj * in_g)
                    pairs = [(a_, b_, 1.0)] if a_ == b_ else [(a_, b_, 1.0), (b_, a_, 1.0)]
                    entries.append(pairs)
                    identity.append(0.0)
                    if a_ == b_ == 0:
                        names.append(f"animal{suffix}")
                    elif a_ == b_:
                        names.append(f"slope[{labels[a_]}]{suffix}")
                    elif b_ == 0:
                        names.append(f"cov[{labels[a_]}]{suffix}")
                    else:
                        names.append(f"cov[{labels[b_]},{labels[a_]}]{suffix}")
                    quad.append(("T", g, a_, b_))
        if session is not None:
            S = np.full((m, w), -1, dtype=np.int64)
            S[animal, slot] = session
            same = (S[:, :, None] == S[:, None, :]) & (S[:, :, None] >= 0)
            mats.append(same.astype(float))
            names.append("session")
            quad.append(("session",))
            local = _local_codes(S)
            n_local = int(local.max()) + 1
            indicators = (local[:, :, None] == np.arange(n_local)).astype(float)
            entries.append([(r + s_, r + s_, 1.0) for s_ in range(n_local)])
            identity.append(0.0)
        else:
            indicators = np.zeros((m, w, 0))
        if est_run:
            mats.append(np.broadcast_to(np.eye(w), (m, w, w)).copy())
            names.append("run")
            quad.append(("run",))
            entries.append([])
            identity.append(1.0)
        self.names = tuple(names)
        self.G = np.stack(mats)  # (J, m, w, w)
        self.G_flat = self.G.reshape(len(mats), -1)
        self.G_last = np.ascontiguousarray(np.moveaxis(self.G, 0, -1))  # (m, w, w, J)
        self.used = np.any(self.G != 0, axis=(2, 3))  # (J, m): G_j has a block for animal
        self.low_rank = low_rank_components(
            np.concatenate([Z, indicators], axis=2), entries, identity, self.used
        )
        self.X_flat = self.X.reshape(m * w, p)
        self.J = len(names)
        self.r = r
        self.has_session = session is not None
        self.est_run = est_run
        self.session_code = None if session is None else S
        # θ_j = φᵀ C_j φ with φ laid out like θ (L_g entries in the same (a, b) order)
        J = self.J
        C = np.zeros((J, J, J))
        index = {}
        for j, key in enumerate(quad):
            index[key] = j
        for j, key in enumerate(quad):
            if key[0] == "T":
                _, g, a_, b_ = key
                for t in range(b_ + 1):  # T_ab = Σ_t L_at L_bt
                    i1, i2 = index[("T", g, a_, t)], index[("T", g, b_, t)]
                    C[j, i1, i2] += 0.5
                    C[j, i2, i1] += 0.5
            else:
                C[j, j, j] = 1.0
        self.C = C
        self.C_flat = np.ascontiguousarray(C.reshape(J, J * J).T)  # (J·J, J): θ = vec(φφᵀ) C
        self.C_rows = np.ascontiguousarray(C.reshape(J * J, J).T)  # (J, J·J): ∂θ/∂φ = 2 φ C
        # index of T_g[a, b] in θ, for every group (both triangles)
        self.t_index = np.zeros((n_groups, r, r), dtype=np.int64)
        for key, j in index.items():
            if key[0] == "T":
                _, g, a_, b_ = key
                self.t_index[g, a_, b_] = self.t_index[g, b_, a_] = j
        self.scalar_index = np.array([j for j, k in enumerate(quad) if k[0] != "T"], dtype=int)
        self.quad = tuple(quad)
        self.variance_index = np.array(
            [j for j, k in enumerate(quad) if k[0] != "T" or k[2] == k[3]], dtype=np.int64
        )

    def theta(self, phi):
        c, J = phi.shape
        outer = (phi[:, :, None] * phi[:, None, :]).reshape(c, J * J)
        return outer @ self.C_flat

    def floats_per_voxel(self) -> int:
        """Float64 values alive per voxel of a chunk: the animal blocks (covariance,
        its inverse, presence products, trial copies), the per-animal GLS pieces and the
        per-voxel information arrays (counted from the code; WORKSPACE_FACTOR covers
        temporaries)."""
        J, m, w, p = self.J, self.m, self.width, self.p
        blocks = 8 * m * w * w + 6 * m * w * p + 8 * m * w
        info = 3 * J * J * p * p + 6 * J * J + 4 * J * p
        return int(WORKSPACE_FACTOR * (blocks + info))


def _local_codes(S):
    """Session codes (m, w; -1 padding) → 0, 1, ... within each animal (-1 padding)."""
    local = np.full(S.shape, -1, dtype=np.int64)
    for k in range(S.shape[0]):  # loop over animals, not voxels
        valid = S[k] >= 0
        _, local[k, valid] = np.unique(S[k, valid], return_inverse=True)
    return local


# --------------------------------------------------------------------------------------
# small batched linear algebra: loops over the rows of a block, never over voxels
# --------------------------------------------------------------------------------------


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_cholesky_inverse(S, L, Li, logdet):
    """Cholesky factor ``L`` of the small symmetric matrix ``S`` (lower triangle read)
    and ``Li = L⁻¹``; returns (``logdet`` + log|S|, positive definite): the pivots'
    logarithms are added to a running total one by one.

    A pivot that is not positive marks ``S`` as not positive definite and is taken as
    1, so that the loops finish (the caller discards the voxel). Unlike
    :func:`grouplevel.model.reml._nb_chol_inv` this keeps the triangular inverse, from
    which the caller forms only the entries it needs.
    """
    n = S.shape[0]
    spd = True
    for j in range(n):
        d = S[j, j]
        for u in range(j):
            d -= L[j, u] * L[j, u]
        if not d > 0.0:
            spd = False
            d = 1.0
        piv = np.sqrt(d)
        L[j, j] = piv
        logdet += 2.0 * np.log(piv)
        for i in range(j + 1, n):
            acc = S[i, j]
            for u in range(j):
                acc -= L[i, u] * L[j, u]
            L[i, j] = acc / piv
    for i in range(n):
        Li[i, i] = 1.0 / L[i, i]
        for j in range(i):
            acc = 0.0
            for u in range(j, i):
                acc += L[i, u] * Li[u, j]
            Li[i, j] = -acc / L[i, i]
    return logdet, spd


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_spd_inverse(V, inv, logdet, ok):
    """Cholesky-based inverse and log-determinant of each matrix of a (N, w, w) stack."""
    n_mat, w, _ = V.shape
    L = np.zeros((w, w))
    Li = np.zeros((w, w))
    for t in range(n_mat):
        ld, good = _nb_cholesky_inverse(V[t], L, Li, 0.0)
        for i in range(w):
            for j in range(i + 1):
                s = 0.0
                for k in range(i, w):
                    s += Li[k, i] * Li[k, j]
                inv[t, i, j] = s
                inv[t, j, i] = s
        logdet[t] = ld
        ok[t] = good


def _cholesky_inverse(V):
    """Inverse and log-determinant of a stack of SPD matrices (..., w, w).

    Returns (inverse, logdet, ok); ``ok`` is False where the matrix is not positive
    definite (its entries are then meaningless). A compiled loop over the small
    matrices (Cholesky factor, its triangular inverse, their product).
    """
    shape = V.shape
    flat = np.ascontiguousarray(V, dtype=np.float64).reshape(-1, shape[-1], shape[-1])
    inv = np.empty_like(flat)
    logdet = np.empty(flat.shape[0])
    ok = np.empty(flat.shape[0], dtype=np.bool_)
    _nb_spd_inverse(flat, inv, logdet, ok)
    return inv.reshape(shape), logdet.reshape(shape[:-2]), ok.reshape(shape[:-2])


def _solve_small(A, b):
    """Solve stacks of small systems, NaN where singular (no exception for one voxel)."""
    det_ok = np.isfinite(A).all(axis=(-2, -1))
    out = np.full(b.shape, np.nan)
    if det_ok.any():
        Aok = A[det_ok]
        cond = np.linalg.cond(Aok)
        good = np.isfinite(cond) & (cond < 1e14)
        idx = np.nonzero(det_ok)[0][good]
        if idx.size:
            out[idx] = np.linalg.solve(A[idx], b[idx][..., None])[..., 0]
    return out


# --------------------------------------------------------------------------------------
# REML pieces for a chunk of voxels
# --------------------------------------------------------------------------------------


def _evaluate(st: _Structure, phi, y, s2, pres, n_obs):
    """ℓ and the GLS quantities at φ; arrays (c, m, w), missing: pres 0, y 0, s2 0.

    Returns a dict with ``theta``, the inverse blocks ``A`` (c, m, w, w; zero rows and
    columns where a run is missing), ``E = ÃX`` per animal, ``Minv = (XᵀV⁻¹X)⁻¹``, the
    GLS ``beta``, ``a = Ã r`` and the REML log-likelihood ``ll`` (−inf where V or XᵀV⁻¹X
    is not positive definite). One compiled pass over voxels and animals.
    """
    c, m, w = y.shape
    p = st.p
    theta = st.theta(phi)
    A = np.empty((c, m, w, w))
    E = np.empty((c, m, w, p))
    a = np.empty((c, m, w))
    Minv = np.empty((c, p, p))
    beta = np.empty((c, p))
    ll = np.empty(c)
    _nb_evaluate(
        np.ascontiguousarray(theta),
        st.G_last,
        st.X,
        np.ascontiguousarray(y),
        np.ascontiguousarray(s2),
        np.ascontiguousarray(pres),
        np.ascontiguousarray(n_obs, dtype=np.float64),
        A,
        E,
        a,
        Minv,
        beta,
        ll,
    )
    return {"theta": theta, "A": A, "E": E, "Minv": Minv, "beta": beta, "a": a, "ll": ll}


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_evaluate(theta, G, X, y, s2, pres, n_obs, A, E, a, Minv, beta, ll):  # G: (m, w, w, J)
    """Compiled body of :func:`_evaluate`: per voxel, per animal V = Σ θ_j G_j +
    diag(s²) (identity rows and columns where a run is missing), its Cholesky inverse
    and log-determinant, then the GLS fit and the REML log-likelihood (Harville 1977)."""
    c, m, w = y.shape
    J = theta.shape[1]
    p = X.shape[2]
    V = np.zeros((w, w))
    L = np.zeros((w, w))
    Li = np.zeros((w, w))
    M = np.zeros((p, p))
    Lm = np.zeros((p, p))
    Lmi = np.zeros((p, p))
    rhs = np.zeros(p)
    res = np.zeros(w)
    for t in range(c):
        good = True
        logdet_v = 0.0
        for q1 in range(p):
            rhs[q1] = 0.0
            for q2 in range(p):
                M[q1, q2] = 0.0
        for k in range(m):
            for r in range(w):
                for s in range(r + 1):
                    v = 0.0
                    if pres[t, k, r] > 0.0 and pres[t, k, s] > 0.0:
                        for j in range(J):
                            v += theta[t, j] * G[k, r, s, j]
                    V[r, s] = v
                V[r, r] += s2[t, k, r] * pres[t, k, r] + (1.0 - pres[t, k, r])
            # Cholesky factor, its inverse, and Ã = L⁻ᵀL⁻¹
            logdet_v, spd = _nb_cholesky_inverse(V, L, Li, logdet_v)
            good = good and spd
            for i in range(w):
                for j in range(i + 1):
                    acc = 0.0
                    if pres[t, k, i] > 0.0 and pres[t, k, j] > 0.0:
                        for u in range(i, w):
                            acc += Li[u, i] * Li[u, j]
                    A[t, k, i, j] = acc
                    A[t, k, j, i] = acc
            # E = ÃX, XᵀÃX and XᵀÃy summed over animals
            for r in range(w):
                for q in range(p):
                    acc = 0.0
                    for u in range(w):
                        acc += A[t, k, r, u] * X[k, u, q]
                    E[t, k, r, q] = acc
            for q1 in range(p):
                acc = 0.0
                for r in range(w):
                    acc += E[t, k, r, q1] * y[t, k, r]
                rhs[q1] += acc
                for q2 in range(q1 + 1):
                    acc = 0.0
                    for r in range(w):
                        acc += X[k, r, q1] * E[t, k, r, q2]
                    M[q1, q2] += acc
        # (XᵀV⁻¹X)⁻¹ by Cholesky; log|XᵀV⁻¹X|
        logdet_m, spd = _nb_cholesky_inverse(M, Lm, Lmi, 0.0)
        good = good and spd
        for i in range(p):
            for j in range(i + 1):
                acc = 0.0
                for u in range(i, p):
                    acc += Lmi[u, i] * Lmi[u, j]
                Minv[t, i, j] = acc
                Minv[t, j, i] = acc
        for q1 in range(p):
            acc = 0.0
            for q2 in range(p):
                acc += Minv[t, q1, q2] * rhs[q2]
            beta[t, q1] = acc
        # residuals, a = Ã r and rᵀÃr
        quad = 0.0
        for k in range(m):
            for r in range(w):
                acc = y[t, k, r]
                for q in range(p):
                    acc -= X[k, r, q] * beta[t, q]
                res[r] = acc * pres[t, k, r]
            for r in range(w):
                acc = 0.0
                for u in range(w):
                    acc += A[t, k, r, u] * res[u]
                a[t, k, r] = acc
                quad += res[r] * acc
        value = -0.5 * (logdet_v + logdet_m + quad + (n_obs[t] - p) * _LOG_2PI)
        if good and np.isfinite(value):
            ll[t] = value
        else:
            ll[t] = -np.inf


def _information(st: _Structure, ev, index=None):
    """REML score g, expected information F and observed ∂²ℓ H in θ, and Q_j.

    With P = V⁻¹ − V⁻¹X(XᵀV⁻¹X)⁻¹XᵀV⁻¹ and Py = Ã r (Harville 1977):
    ∂ℓ/∂θ_j = −½ tr(P G_j) + ½ yᵀP G_j P y, F_ij = ½ tr(P G_i P G_j) and
    ∂²ℓ/∂θ_i∂θ_j = F_ij − yᵀP G_i P G_j P y, each trace split into per-animal sums
    (compiled loop over voxels and animals on the low-rank form of the G_j, in
    :func:`grouplevel.model.block_sums.block_sums`). ``index`` selects the voxels of
    ``ev`` (all by default) without copying their blocks.
    """
    Minv = ev["Minv"] if index is None else ev["Minv"][index]
    c, J = Minv.shape[0], st.J
    sums = block_sums(ev["A"], ev["E"], ev["a"], ev["Minv"], st.low_rank, index)
    g = np.empty((c, J))
    F = np.empty((c, J, J))
    H = np.empty((c, J, J))
    _nb_assemble(*sums, np.ascontiguousarray(Minv), g, F, H)
    return g, F, H, sums[2]


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_assemble(tr_ag, tr_bb, Q, tr_mr, W1, EGa, gaa, Minv, g, F, H):
    """g, F and H of :func:`_information` from the per-animal sums, voxel by voxel:
    with MQ_j = M⁻¹Q_j, F = ½[tr(ÃG_iÃG_j) − 2 tr_mr + tr(MQ_i MQ_j)],
    g = −½[tr(ÃG_j) − tr(MQ_j)] + ½ aᵀG_ja, H = F − W1 + (XᵀÃG_ia)ᵀM⁻¹(XᵀÃG_ja)."""
    c, J, p, _ = Q.shape
    MQ = np.zeros((J, p, p))
    ME = np.zeros((J, p))
    for t in range(c):
        for j in range(J):
            for q1 in range(p):
                acc2 = 0.0
                for q2 in range(p):
                    acc = 0.0
                    for u in range(p):
                        acc += Minv[t, q1, u] * Q[t, j, u, q2]
                    MQ[j, q1, q2] = acc
                    acc2 += Minv[t, q1, q2] * EGa[t, j, q2]
                ME[j, q1] = acc2
            tr_mq = 0.0
            for q in range(p):
                tr_mq += MQ[j, q, q]
            g[t, j] = -0.5 * (tr_ag[t, j] - tr_mq) + 0.5 * gaa[t, j]
        for i in range(J):
            for j in range(i + 1):
                tr_mqmq = 0.0
                for q1 in range(p):
                    for q2 in range(p):
                        tr_mqmq += MQ[i, q1, q2] * MQ[j, q2, q1]
                # both triangles of the (symmetric) sums, averaged as in the dense form
                f_ij = 0.5 * (tr_bb[t, i, j] - 2.0 * tr_mr[t, i, j] + tr_mqmq)
                f_ji = 0.5 * (tr_bb[t, j, i] - 2.0 * tr_mr[t, j, i] + tr_mqmq)
                f = 0.5 * (f_ij + f_ji)
                w2 = 0.0
                for q in range(p):
                    w2 += EGa[t, i, q] * ME[j, q]
                h = f - 0.5 * (W1[t, i, j] + W1[t, j, i]) + w2
                F[t, i, j] = f
                F[t, j, i] = f
                H[t, i, j] = h
                H[t, j, i] = h


def _put(ev, idx, new, src):
    """Voxels ``idx`` of the evaluation ``ev`` replaced by voxels ``src`` of ``new``."""
    for k, v in new.items():
        ev[k][idx] = v[src]


# --------------------------------------------------------------------------------------
# scaling and starting values
# --------------------------------------------------------------------------------------


def _scale_and_start(st: _Structure, y, s2, pres, n_obs):
    """Divide each voxel by its OLS residual SD; moment starting values of φ.

    Returns (y, s2, scale2, fittable, phi0) with y and s2 scaled in place.
    """
    c = y.shape[0]
    XX = st.X_flat[:, :, None] * st.X_flat[:, None, :]  # (m·w, p, p)
    XtX = (pres.reshape(c, -1) @ XX.reshape(XX.shape[0], -1)).reshape(c, st.p, st.p)
    Xty = np.einsum("map,cma->cp", st.X, y)
    beta = _solve_small(XtX, Xty)
    r = (y - np.einsum("map,cp->cma", st.X, np.nan_to_num(beta))) * pres
    rss = np.einsum("cma,cma->c", r, r)
    yy = np.einsum("cma,cma->c", y, y)
    mean_s2 = np.einsum("cma->c", s2 * pres) / n_obs
    scale2 = rss / np.maximum(n_obs - st.p, 1)
    scale2 = np.where(scale2 <= 1e-24 * np.maximum(yy, 1e-300), mean_s2, scale2)
    fittable = (scale2 > 0) & np.isfinite(beta).all(axis=1)
    scale2 = np.where(fittable, scale2, 1.0)
    scale = np.sqrt(scale2)
    y /= scale[:, None, None]
    s2 /= scale2[:, None, None]
    r /= scale[:, None, None]
    mean_s2 = mean_s2 / scale2
    # per-animal least squares of the residuals on z = (1, slopes): a moment for T
    Zp = st.Z[None] * pres[..., None]  # (c, m, w, r)
    ZtZ = np.einsum("cmar,cmas->cmrs", Zp, Zp)
    ridge = 1e-8 * (np.einsum("cmrr->cm", ZtZ) + 1.0)
    ZtZ = ZtZ + ridge[..., None, None] * np.eye(st.r)
    ZtZ_inv, _, _ = _cholesky_inverse(ZtZ)
    b = (ZtZ_inv @ np.einsum("cmas,cma->cms", Zp, r)[..., None])[..., 0]
    e = (r - np.einsum("cmar,cmr->cma", Zp, b)) * pres
    n_a = pres.sum(axis=2)
    within_df = np.maximum(n_obs - np.minimum(n_a, st.r).sum(axis=1), 1)
    sig2 = np.einsum("cma,cma->c", e, e) / within_df - mean_s2
    sig2 = np.maximum(sig2, START_FRACTION)
    phi = np.zeros((c, st.J))
    var_z = np.einsum("cmar->cr", Zp * Zp) / n_obs[:, None]
    var_z[:, 0] = 1.0
    full = n_a >= st.r  # animals whose coefficients are determined
    for j, key in enumerate(st.quad):
        if key[0] == "T":
            _, g, a_, b_ = key
            if a_ != b_:
                continue
            use = full & (st.groups[None, :] == g)
            k = np.maximum(use.sum(axis=1), 1)
            mean_b = np.where(use, b[..., a_], 0.0).sum(axis=1) / k
            spread = np.where(use, (b[..., a_] - mean_b[:, None]) ** 2, 0.0).sum(axis=1)
            spread = spread / np.maximum(k - 1, 1)
            noise = sig2 * np.where(use, ZtZ_inv[..., a_, a_], 0.0).sum(axis=1) / k
            floor = START_FRACTION / np.maximum(var_z[:, a_], 1e-12)
            phi[:, j] = np.sqrt(np.maximum(spread - noise, floor))
        elif key[0] == "session":
            phi[:, j] = np.sqrt(_session_moment(st, e, pres, sig2 + mean_s2))
        else:
            phi[:, j] = np.sqrt(sig2)
    return y, s2, scale2, fittable, phi


def _session_moment(st: _Structure, e, pres, run_var):
    """Spread of session means of the within-animal residuals, less their noise."""
    codes = st.session_code
    valid = codes >= 0
    _, inv = np.unique(codes[valid], return_inverse=True)
    onehot = np.zeros((codes.size, inv.max() + 1))
    onehot[np.nonzero(valid.ravel())[0], inv] = 1.0
    c = e.shape[0]
    sums = e.reshape(c, -1) @ onehot
    counts = pres.reshape(c, -1) @ onehot
    has = counts > 0
    means2 = np.where(has, sums**2 / np.where(has, counts, 1.0) ** 2, 0.0)
    noise = np.where(has, run_var[:, None] / np.where(has, counts, 1.0), 0.0)
    k = np.maximum(has.sum(axis=1), 1)
    omega = (means2 - noise).sum(axis=1) / k
    return np.maximum(omega, START_FRACTION)


# --------------------------------------------------------------------------------------
# the iteration
# --------------------------------------------------------------------------------------


def _direction(st: _Structure, phi, g, F, H):
    """Newton step in φ where −∂²ℓ/∂φ² is positive definite, else Fisher scoring.

    Returns (δ, gᵀδ) with g the score in φ (chain rule through θ(φ)); δ is 0 where
    neither matrix is positive definite or the step is not finite.
    """
    c, J = phi.shape
    delta = np.empty((c, J))
    gain = np.empty(c)
    _nb_direction(
        np.ascontiguousarray(phi),
        np.ascontiguousarray(g),
        np.ascontiguousarray(F),
        np.ascontiguousarray(H),
        st.C,
        FISHER_RIDGE,
        delta,
        gain,
    )
    return delta, gain


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_direction(phi, g, F, H, C, ridge, delta, gain):
    """Compiled body of :func:`_direction`, voxel by voxel: with ∂θ_j/∂φ_i = 2 Σ_k C_jik φ_k,
    −∂²ℓ/∂φ² = −(Jᵀ H J + 2 Σ_j g_j C_j) and the φ-space Fisher information Jᵀ F J
    (plus a ridge relative to its largest diagonal element)."""
    c, J = phi.shape
    jac = np.zeros((J, J))
    HJ = np.zeros((J, J))
    FJ = np.zeros((J, J))
    A = np.zeros((2, J, J))
    inv = np.zeros((2, J, J))
    logdet = np.zeros(2)
    ok = np.zeros(2, dtype=np.bool_)
    g_phi = np.zeros(J)
    for t in range(c):
        for j in range(J):
            for i in range(J):
                acc = 0.0
                for k in range(J):
                    acc += C[j, i, k] * phi[t, k]
                jac[j, i] = 2.0 * acc
        for i in range(J):
            acc = 0.0
            for j in range(J):
                acc += g[t, j] * jac[j, i]
            g_phi[i] = acc
        for j in range(J):  # H J and F J
            for b in range(J):
                acc_h = 0.0
                acc_f = 0.0
                for k in range(J):
                    acc_h += H[t, j, k] * jac[k, b]
                    acc_f += F[t, j, k] * jac[k, b]
                HJ[j, b] = acc_h
                FJ[j, b] = acc_f
        top = 0.0
        for a in range(J):
            for b in range(J):
                acc_h = 0.0
                acc_f = 0.0
                acc_c = 0.0
                for j in range(J):
                    acc_h += jac[j, a] * HJ[j, b]
                    acc_f += jac[j, a] * FJ[j, b]
                    acc_c += g[t, j] * C[j, a, b]
                A[0, a, b] = -(acc_h + 2.0 * acc_c)
                A[1, a, b] = acc_f
            top = max(top, abs(A[1, a, a]))
        for a in range(J):
            A[1, a, a] += ridge * top + 1e-300
        _nb_spd_inverse(A, inv, logdet, ok)
        use = 0 if ok[0] else 1
        good = ok[0] or ok[1]
        g_sum = 0.0
        for i in range(J):
            acc = 0.0
            for j in range(J):
                acc += inv[use, i, j] * g_phi[j]
            delta[t, i] = acc
            if not np.isfinite(acc):
                good = False
        if not good:
            for i in range(J):
                delta[t, i] = 0.0
        for i in range(J):
            g_sum += g_phi[i] * delta[t, i]
        gain[t] = g_sum


def _project_to_phi(st: _Structure, theta):
    """φ of the nearest admissible θ: every T_g projected on the positive semi-definite
    cone (negative eigenvalues set to 0), scalar variances clipped at 0."""
    phi = np.zeros_like(theta)
    for g in range(st.n_groups):
        T = theta[:, st.t_index[g]]
        lam, vec = np.linalg.eigh(T)
        T = (vec * np.maximum(lam, 0.0)[:, None, :]) @ np.swapaxes(vec, 1, 2)
        L = np.zeros_like(T)
        for j in range(st.r):  # Cholesky that allows zero pivots (rank-deficient T)
            d = T[:, j, j] - np.sum(L[:, j, :j] ** 2, axis=1)
            piv = np.sqrt(np.maximum(d, 0.0))
            L[:, j, j] = piv
            below = T[:, j + 1 :, j] - np.einsum("cik,ck->ci", L[:, j + 1 :, :j], L[:, j, :j])
            safe = np.where(piv > 1e-150, piv, 1.0)
            L[:, j + 1 :, j] = np.where((piv > 1e-150)[:, None], below / safe[:, None], 0.0)
        for a_ in range(st.r):
            for b_ in range(a_ + 1):
                phi[:, st.t_index[g, a_, b_]] = L[:, a_, b_]
    phi[:, st.scalar_index] = np.sqrt(np.maximum(theta[:, st.scalar_index], 0.0))
    return phi


def _theta_step(st: _Structure, theta, g, F, H):
    """Newton (or Fisher-scoring) step in θ, projected: a candidate that reaches a
    boundary optimum (rank-deficient T) in one move, where steps in φ would crawl."""
    inv_h, _, ok_h = _cholesky_inverse(-H)
    inv_f, _, _ = _cholesky_inverse(F)
    step = np.where(ok_h[:, None, None], inv_h, inv_f)
    target = theta + np.einsum("cij,cj->ci", step, g)
    return _project_to_phi(st, np.where(np.isfinite(target), target, theta))


def _near_boundary(st: _Structure, theta):
    """Voxels where a T_g is nearly singular or a scalar variance nearly 0."""
    near = np.zeros(theta.shape[0], dtype=bool)
    for g in range(st.n_groups):
        lam = np.linalg.eigvalsh(theta[:, st.t_index[g]])
        near |= lam[:, 0] <= NEAR_BOUNDARY * np.maximum(lam[:, -1], 1e-300)
    if st.scalar_index.size:
        near |= np.any(theta[:, st.scalar_index] <= NEAR_BOUNDARY, axis=1)
    return near


def _escape_saddles(st: _Structure, phi, vox, g, ev, y, s2, pres, n_obs):
    """Move voxels off a zero variance (or a null direction of T_g) along which the REML
    log-likelihood increases; returns which of ``vox`` moved (φ and ``ev`` updated).

    A factor column that is exactly 0 has a zero gradient in φ, so the iteration stops
    there even where ∂ℓ/∂T is positive along the null space of T (the constrained
    optimality condition fails). The move adds ``ESCAPE_STEP`` times the best null
    direction to θ and is kept when ℓ increases.
    """
    if vox.size == 0:
        return np.zeros(0, dtype=bool)
    theta = st.theta(phi[vox])
    move = np.zeros_like(theta)
    for grp in range(st.n_groups):
        T = theta[:, st.t_index[grp]]
        D = g[:, st.t_index[grp]] * np.where(np.eye(st.r) > 0, 1.0, 0.5)
        lam, vec = np.linalg.eigh(T)
        null = lam <= 1e-10 * np.maximum(lam[:, -1:], 1e-300)
        Dn = np.swapaxes(vec, 1, 2) @ D @ vec
        keep = null[:, :, None] & null[:, None, :]
        # D on the null space of T; the other directions pushed far below (decoupled)
        far = np.where(null, 0.0, 1e30 * (1.0 + np.abs(D).max(axis=(1, 2)))[:, None])
        Dn = np.where(keep, Dn, 0.0) - far[:, :, None] * np.eye(st.r)
        mu, u = np.linalg.eigh(Dn)
        v = (vec @ u[:, :, -1:])[..., 0]
        up = (mu[:, -1] > ESCAPE_GRADIENT) & null.any(axis=1)
        step = ESCAPE_STEP * np.maximum(lam[:, -1], 1.0)
        dT = step[:, None, None] * v[:, :, None] * v[:, None, :]
        for a_ in range(st.r):
            for b_ in range(a_ + 1):
                move[:, st.t_index[grp, a_, b_]] = np.where(up, dT[:, a_, b_], 0.0)
    sc = st.scalar_index
    if sc.size:
        zero = (theta[:, sc] <= 1e-12) & (g[:, sc] > ESCAPE_GRADIENT)
        move[:, sc] = np.where(zero, ESCAPE_STEP, 0.0)
    moved = np.any(move != 0, axis=1)
    if not moved.any():
        return moved
    sel = vox[moved]
    trial = _project_to_phi(st, theta[moved] + move[moved])
    ev_t = _evaluate(st, trial, y[sel], s2[sel], pres[sel], n_obs[sel])
    ll0 = ev["ll"][sel]
    better = ev_t["ll"] > ll0 + FLAT_DECREMENT * (1.0 + np.abs(ll0))
    phi[sel[better]] = trial[better]
    _put(ev, sel[better], ev_t, better)
    moved[np.nonzero(moved)[0][~better]] = False
    return moved


def _iterate(st: _Structure, phi, y, s2, pres, n_obs, max_iter, tol, n_iter=None, leave=0):
    """Maximise the REML log-likelihood over φ for a chunk of (scaled) voxels.

    Every voxel gets at most ``max_iter`` iterations in all (counting the ``n_iter``
    it has had already). With ``leave`` > 0 the loop stops as soon as no more than
    ``leave`` voxels are still iterating; those are returned as ``active`` (their φ and
    counts as they stand) so that the slow voxels of many chunks can be continued
    together. Each voxel's path depends on its own data only, so stopping and
    continuing gives the same estimates as one uninterrupted loop.

    Returns (φ, converged, n_iter, active).
    """
    c = phi.shape[0]
    ev = _evaluate(st, phi, y, s2, pres, n_obs)
    converged = np.zeros(c, dtype=bool)
    n_iter = np.zeros(c, dtype=np.int64) if n_iter is None else n_iter.copy()
    active = np.isfinite(ev["ll"]) & (n_iter < max_iter)
    while True:
        act = np.nonzero(active)[0]
        if act.size <= leave:
            break
        cur = {"theta": ev["theta"][act], "ll": ev["ll"][act]}
        g, F, H, _ = _information(st, ev, act)
        delta, gain = _direction(st, phi[act], g, F, H)
        theta = cur["theta"]
        step_theta = st.theta(phi[act] + delta) - theta
        small = np.all(np.abs(step_theta) <= tol * (1.0 + np.abs(theta)), axis=1)
        # or ℓ within a negligible amount of the maximum of its local quadratic model
        # (flat ridges, e.g. a rank-one T whose factor can still rotate)
        small |= gain <= GAIN_FRACTION * tol * (1.0 + np.abs(cur["ll"]))
        # a tiny last step is the most accurate: take it and stop — unless ℓ still
        # increases along a variance held at exactly 0 (a saddle of the factorisation)
        done = act[small]
        phi[done] += delta[small]
        escaped = _escape_saddles(st, phi, done, g[small], ev, y, s2, pres, n_obs)
        converged[done[~escaped]] = True
        active[done[~escaped]] = False
        pending = act[~small]
        d_pend = delta[~small]
        gain_pend = gain[~small]
        n_iter[act] += 1
        # near a boundary, first try the projected θ-space step; keep it if it increases ℓ
        near = _near_boundary(st, theta[~small])
        if near.any():
            sel = np.nonzero(~small)[0][near]
            vox = act[sel]
            trial = _theta_step(st, theta[sel], g[sel], F[sel], H[sel])
            ev_t = _evaluate(st, trial, y[vox], s2[vox], pres[vox], n_obs[vox])
            ll0 = ev["ll"][vox]
            up = ev_t["ll"] > ll0 + FLAT_DECREMENT * (1.0 + np.abs(ll0))
            phi[vox[up]] = trial[up]
            _put(ev, vox[up], ev_t, up)
            keep = ~np.isin(pending, vox[up])
            pending, d_pend, gain_pend = pending[keep], d_pend[keep], gain_pend[keep]
        tried = 0  # step lengths 1, 1/2, 1/4, ... tried so far
        while pending.size and tried <= MAX_STEP_HALVINGS:
            # the next 1, 1, 2, 4, ... lengths at once while few voxels are left (the
            # same outcome as one after the other: each voxel keeps the first length
            # that is accepted)
            n_len = min(max(tried, 1), HALVING_BATCH // pending.size)
            n_len = int(np.clip(n_len, 1, MAX_STEP_HALVINGS + 1 - tried))
            alphas = 0.5 ** np.arange(tried, tried + n_len)
            k = pending.size
            trial = (phi[pending][None] + alphas[:, None, None] * d_pend[None]).reshape(-1, st.J)
            rep = np.tile(pending, n_len)
            ev_t = _evaluate(st, trial, y[rep], s2[rep], pres[rep], n_obs[rep])
            ll0 = ev["ll"][pending]
            up = (ev_t["ll"] >= np.tile(ll0 - 1e-12 * (1.0 + np.abs(ll0)), n_len)).reshape(n_len, k)
            ok = up.any(axis=0)
            first = np.argmax(up, axis=0)[ok] * k + np.nonzero(ok)[0]
            acc = pending[ok]
            phi[acc] = trial[first]
            _put(ev, acc, ev_t, first)
            pending, d_pend, gain_pend = pending[~ok], d_pend[~ok], gain_pend[~ok]
            tried += n_len
        # no increase possible: at the optimum when the predicted gain is at the
        # precision of ℓ, otherwise a failure
        if pending.size:
            ll0 = ev["ll"][pending]
            converged[pending] = gain_pend <= FLAT_DECREMENT * (1.0 + np.abs(ll0))
            active[pending] = False
        active &= n_iter < max_iter
    return phi, converged, n_iter, active


def _free_components(st: _Structure, theta):
    """Components not on the boundary: variances above BOUNDARY_FRACTION, and the
    covariances whose two variances both are."""
    free = np.ones(theta.shape, dtype=bool)
    for j, key in enumerate(st.quad):
        if key[0] != "T":
            free[:, j] = theta[:, j] > BOUNDARY_FRACTION
    for j, key in enumerate(st.quad):
        if key[0] == "T":
            _, g, a_, b_ = key
            ja = st.quad.index(("T", g, a_, a_))
            jb = st.quad.index(("T", g, b_, b_))
            free[:, j] = (theta[:, ja] > BOUNDARY_FRACTION) & (theta[:, jb] > BOUNDARY_FRACTION)
    return free


def _finish(st: _Structure, phi, y, s2, pres, n_obs, scale2):
    """Estimates in the data's units, at the final φ."""
    ev = _evaluate(st, phi, y, s2, pres, n_obs)
    _, F, _, Q = _information(st, ev)
    theta = ev["theta"]
    free = _free_components(st, theta)
    keep = free[:, :, None] & free[:, None, :]
    F_free = np.where(keep, F, 0.0) + np.where(free, 0.0, 1.0)[:, :, None] * np.eye(st.J)
    cov_theta = _pinv_stack(F_free)
    cov_theta = np.where(keep, cov_theta, 0.0) * (scale2**2)[:, None, None]
    Minv = ev["Minv"]
    dcov = Minv[:, None] @ Q @ Minv[:, None]
    per_animal = np.swapaxes(st.X, 1, 2)[None] @ ev["E"]  # (c, m, p, p)
    by_group = np.einsum("cmpq,mg->cgpq", per_animal, st.group_onehot) / scale2[:, None, None, None]
    scale = np.sqrt(scale2)
    return {
        "beta": ev["beta"] * scale[:, None],
        "cov_beta": Minv * scale2[:, None, None],
        "theta": theta * scale2[:, None],
        "loglik": ev["ll"] - (n_obs - st.p) * np.log(scale),
        "cov_components": cov_theta,
        "dcov": dcov,
        "by_group": by_group,
    }


def _pinv_stack(A):
    """Pseudo-inverse of a stack of symmetric positive semi-definite matrices (NaN where
    not finite). Where the Cholesky inverse exists and bounds the condition number
    (cond₂ ≤ n² max|A| max|A⁻¹|) below ``1 / PINV_SAFE``, far from numpy's cut-off for
    small singular values, the pseudo-inverse is that inverse; numpy's ``pinv``
    elsewhere."""
    n = A.shape[-1]
    out = np.full(A.shape, np.nan)
    good = np.isfinite(A).all(axis=(1, 2))
    inv, _, ok = _cholesky_inverse(np.where(good[:, None, None], A, np.eye(n)))
    with np.errstate(invalid="ignore", over="ignore"):
        bound = n * n * np.abs(A).max(axis=(1, 2)) * np.abs(inv).max(axis=(1, 2))
        safe = good & ok & (bound * PINV_SAFE < 1.0)
    out[safe] = inv[safe]
    rest = good & ~safe
    if rest.any():
        out[rest] = np.linalg.pinv(A[rest], hermitian=True)
    return out


# --------------------------------------------------------------------------------------
# public entry points
# --------------------------------------------------------------------------------------


def _chunk_size(st: _Structure, memory_gb, n_threads: int = 1) -> int:
    """Voxels per chunk: the working sets of ``n_threads`` chunks fit the budget."""
    per_voxel = WORKING_BYTES * st.floats_per_voxel() * n_threads
    if memory_gb is None:
        budget = DEFAULT_CHUNK_BYTES
    else:
        if not memory_gb > 0:
            raise ValueError(f"fit_mixed: memory_gb must be positive, got {memory_gb}.")
        budget = CHUNK_SHARE * memory_gb * GIB
    return int(min(MAX_CHUNK, max(MIN_CHUNK, budget // per_voxel)))


def _estimable(X, present, p):
    patterns, inverse = presence_patterns(present)
    ok = np.zeros(len(patterns), dtype=bool)
    for i, pat in enumerate(patterns):  # loop over distinct presence patterns, not voxels
        ok[i] = pat.sum() > p and np.linalg.matrix_rank(X[pat]) == p
    return ok[inverse]


def _layout(st: _Structure, a, idx, fill):
    """(runs, V) columns ``idx`` → (c, animals, width) float64, ``fill`` in the padding."""
    out = np.full((idx.size, st.m, st.width), fill, dtype=np.float64)
    out[:, st.animal, st.slot] = a[:, idx].T
    return out


def fit_mixed(
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    *,
    slopes: np.ndarray | None = None,
    slope_names: tuple[str, ...] | list[str] = (),
    session: np.ndarray | None = None,
    animal_group: np.ndarray | None = None,
    group_names: tuple[str, ...] | list[str] = (),
    estimate_run_variance: bool = True,
    max_iter: int = 100,
    tol: float = 1e-8,
    memory_gb: float | None = None,
) -> MixedModelFit:
    """Fit runs nested in sessions nested in animals, with random slopes, by REML.

    Parameters
    ----------
    y : ndarray, shape (n_runs, V)
        First-level effect of each run at each voxel; NaN where the run has no data.
        float32 input is converted to float64 one chunk of voxels at a time.
    variance : ndarray, shape (n_runs, V), or None
        First-level variances ``s_k²`` (NaN: no data); None means 0.
    X : ndarray, shape (n_runs, p)
        Fixed-effects design.
    animal : ndarray of int, shape (n_runs,)
        Animal code 0..m-1 of each run.
    slopes : ndarray, shape (n_runs, q), optional
        Run-level values of the effects that get a random slope per animal (usually
        the within-animal columns of ``X``, e.g. a centred condition code).
    slope_names : sequence of str
        One name per slope column (default "0", "1", ...), used in ``components``.
    session : ndarray of int, shape (n_runs,), optional
        Session code of each run, unique across animals; adds a session variance ω².
    animal_group : ndarray of int, shape (m,), optional
        Group code 0..G-1 of each animal; each group gets its own animal covariance
        matrix ``T_g`` (intercept variance, slope variances and covariances). The
        session and run variances are shared by all groups.
    group_names : sequence of str
        One name per group (default "0", "1", ...), used in ``components``.
    estimate_run_variance : bool
        Estimate σ²; False fixes it at 0 (then every run with data needs a positive
        first-level variance).
    max_iter : int
        Maximum Newton / Fisher-scoring iterations per voxel.
    tol : float
        Convergence when every component of θ moves by at most ``tol · (1 + |θ_j|)``
        in units of the voxel's residual variance.
    memory_gb : float, optional
        Memory budget in GiB; the chunk's working set stays within
        ``grouplevel.memory.CHUNK_SHARE`` of it.

    Returns
    -------
    MixedModelFit

    Raises
    ------
    ValueError
        For arrays of the wrong shape or type, codes that are not 0..m-1 integers,
        sessions shared between animals, negative variances.

    Notes
    -----
    Voxels with no more runs than ``rank(X)``, a design that is rank deficient on the
    runs with data, or no variation and no first-level variances are not fitted (NaN,
    ``converged`` False). Identification needs enough of each level: a slope variance
    needs animals with at least two distinct slope values, a session variance animals
    with several sessions and sessions with several runs (or first-level variances);
    where the data cannot tell components apart, ``loglik`` is still maximised but the
    split between them is arbitrary.

    References
    ----------
    Patterson, H. D., & Thompson, R. (1971). Biometrika 58:545–554.
    Harville, D. A. (1977). Journal of the American Statistical Association 72:320–338.
    Pinheiro, J. C., & Bates, D. M. (1996). Statistics and Computing 6:289–296.
    Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS.
    Springer.
    """
    y = _as_maps(y, "y")
    n_runs, n_vox = y.shape
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2 or X.shape[0] != n_runs or not np.all(np.isfinite(X)):
        raise ValueError(f"fit_mixed: X must be a finite ({n_runs}, p) array, got {X.shape}.")
    if n_runs == 0:
        raise ValueError("fit_mixed: no runs.")
    animal = _as_codes(animal, n_runs, "animal")
    m = int(animal.max()) + 1
    if np.unique(animal).size != m:
        raise ValueError("fit_mixed: animal codes must run 0..m-1 without gaps.")
    if max_iter < 1 or not tol > 0:
        raise ValueError("fit_mixed: max_iter must be ≥ 1 and tol > 0.")
    variance = _check_variance(variance, y, estimate_run_variance)
    slopes, slope_names = _check_slopes(slopes, slope_names, n_runs)
    groups, group_names = _check_groups(animal_group, group_names, m)
    session = _check_session(session, animal, n_runs)
    st = _Structure(
        X, animal, slopes, slope_names, session, groups, group_names, bool(estimate_run_variance)
    )
    present = np.isfinite(y)
    if variance is not None:
        present &= np.isfinite(variance)
    runs_v = present.sum(axis=0)
    animals_g = np.zeros((n_vox, int(groups.max()) + 1), dtype=np.int64)
    for a in range(m):  # loop over animals, not voxels
        animals_g[:, groups[a]] += present[animal == a].any(axis=0)
    animals_v = animals_g.sum(axis=1)
    p = X.shape[1]
    out = {
        "beta": np.full((n_vox, p), np.nan),
        "cov_beta": np.full((n_vox, p, p), np.nan),
        "theta": np.full((n_vox, st.J), np.nan),
        "loglik": np.full(n_vox, np.nan),
        "cov_components": np.full((n_vox, st.J, st.J), np.nan),
        "dcov": np.full((n_vox, st.J, p, p), np.nan),
        "by_group": np.full((n_vox, st.n_groups, p, p), np.nan),
    }
    converged = np.zeros(n_vox, dtype=bool)
    n_iter = np.zeros(n_vox, dtype=np.int64)
    idx_all = np.nonzero(_estimable(X, present, p))[0]
    n_threads = _available_cores()
    cs = _chunk_size(st, memory_gb, n_threads)
    chunks = [idx_all[i : i + cs] for i in range(0, idx_all.size, cs)]

    def work(idx):
        pres = _layout(st, present, idx, 0.0)
        yc = np.where(pres > 0, _layout(st, y, idx, 0.0), 0.0)
        s2 = np.zeros_like(yc) if variance is None else _layout(st, variance, idx, 0.0)
        s2 = np.where(pres > 0, s2, 0.0)
        n_obs = pres.sum(axis=(1, 2))
        yc, s2, scale2, fittable, phi = _scale_and_start(st, yc, s2, pres, n_obs)
        fit_idx = np.nonzero(fittable)[0]
        sub = (yc[fit_idx], s2[fit_idx], pres[fit_idx], n_obs[fit_idx], scale2[fit_idx])
        leave = int(STRAGGLER_SHARE * fit_idx.size)
        phi, conv, its, left = _iterate(st, phi[fit_idx], *sub[:4], max_iter, tol, leave=leave)
        done = ~left
        res = _finish(st, phi[done], *(a[done] for a in sub)) if done.any() else {}
        finished = (idx[fit_idx][done], res, conv[done], its[done])
        slow = (idx[fit_idx][left], phi[left], its[left]) + tuple(a[left] for a in sub)
        return finished, slow

    def store(target, res, conv, its):
        if target.size == 0:
            return
        for key, value in res.items():
            out[key][target] = value
        converged[target] = conv & np.isfinite(res["loglik"])
        n_iter[target] = its

    # chunks of voxels in a few threads (numpy and the compiled kernels release the
    # GIL); the few slow voxels of every chunk are then continued together
    slow_parts = []
    with ThreadPoolExecutor(max_workers=n_threads) as pool:
        for finished, slow in pool.map(work, chunks):
            store(*finished)
            slow_parts.append(slow)
    if any(part[0].size for part in slow_parts):
        target, phi, its, *data = (np.concatenate(parts) for parts in zip(*slow_parts, strict=True))
        for i in range(0, target.size, cs):
            part = slice(i, i + cs)
            sub = tuple(a[part] for a in data)
            phi_s, conv, its_s, _ = _iterate(
                st, phi[part], *sub[:4], max_iter, tol, n_iter=its[part]
            )
            store(target[part], _finish(st, phi_s, *sub), conv, its_s)
    theta = out["theta"]
    components = {name: theta[:, j] for j, name in enumerate(st.names)}
    var_run = components["run"] if st.est_run else np.where(np.isnan(out["loglik"]), np.nan, 0.0)
    return MixedModelFit(
        beta=out["beta"],
        cov_beta=out["cov_beta"],
        components=components,
        var_animal=theta[:, 0],
        var_run=var_run,
        loglik=out["loglik"],
        converged=converged,
        n_iter=n_iter,
        n_runs=runs_v.astype(np.int64),
        n_animals=animals_v,
        estimate_run_variance=bool(estimate_run_variance),
        component_names=st.names,
        cov_components=out["cov_components"],
        dcov_beta_components=out["dcov"],
        group_names=group_names or ("all",),
        info_by_group=out["by_group"],
        animals_by_group=animals_g,
    )


def mixed_satterthwaite_df(fit: MixedModelFit, c) -> np.ndarray:
    """Satterthwaite degrees of freedom of ``cᵀβ`` for a :class:`MixedModelFit`.

    ``df = 2 (cᵀΦc)² / (gᵀ C g)``, ``g_j = cᵀ(∂Φ/∂θ_j)c``, with ``C`` the inverse expected
    REML information of the components not on the boundary. With per-group animal
    variances and a contrast between groups this is the mixed-model form of Welch's
    degrees of freedom.

    Parameters
    ----------
    fit : MixedModelFit
    c : array_like, shape (p,)

    Returns
    -------
    ndarray, shape (V,)
        Infinite where no free component affects ``cᵀΦc``; NaN where not fitted.

    References
    ----------
    Satterthwaite, F. E. (1946). Biometrics Bulletin 2:110–114.
    Welch, B. L. (1947). The generalization of "Student's" problem when several
    different population variances are involved. Biometrika 34:28–35.
    Giesbrecht, F. G., & Burns, J. C. (1985). Biometrics 41:477–486.
    """
    c = np.asarray(c, dtype=np.float64).ravel()
    if c.shape != (fit.beta.shape[1],) or not np.all(np.isfinite(c)) or not np.any(c):
        raise ValueError(
            f"mixed_satterthwaite_df: give {fit.beta.shape[1]} finite weights, not all 0."
        )
    phi = np.einsum("p,vpq,q->v", c, fit.cov_beta, c)
    g = np.einsum("p,vjpq,q->vj", c, fit.dcov_beta_components, c)
    var_phi = np.einsum("vi,vij,vj->v", g, fit.cov_components, g)
    with np.errstate(divide="ignore", invalid="ignore"):
        df = 2.0 * phi * phi / var_phi
    df = np.where((var_phi <= 0) & np.isfinite(phi), np.inf, df)
    return np.where(np.isnan(phi), np.nan, df)


def _in_span(columns: np.ndarray, basis: np.ndarray) -> np.ndarray:
    """Whether each column lies in the span of ``basis`` (least squares residual)."""
    if basis.shape[1] == 0:
        return np.zeros(columns.shape[1], dtype=bool)
    coef, *_ = np.linalg.lstsq(basis, columns, rcond=None)
    resid = np.linalg.norm(columns - basis @ coef, axis=0)
    return resid <= SPAN_TOLERANCE * np.maximum(np.linalg.norm(columns, axis=0), 1e-300)


def group_welch_df(fit: MixedModelFit, c, X, animal, animal_group=None) -> np.ndarray:
    """Welch–Satterthwaite degrees of freedom with one variance share per animal group.

    ``cᵀΦc`` splits exactly into one share per group, ``v_g = bᵀ K_g b`` with
    ``b = Φc`` and ``K_g`` the group's part of ``XᵀV̂⁻¹X`` (``fit.info_by_group``);
    each share is judged against its group's between-animal degrees of freedom
    ``d_g = animals with data in g − rank(animal-level columns of X within g)``, and

        df = (Σ_g v_g)² / Σ_g (v_g² / d_g).

    With two groups of animals and a contrast between their means this is Welch's
    degrees of freedom for the animal means; with one group it is the between-animal
    rule.

    Parameters
    ----------
    fit : MixedModelFit
        A fit with ``animal_group`` (or without: one group).
    c : array_like, shape (p,)
    X : ndarray, shape (n_runs, p)
        The design given to :func:`fit_mixed`.
    animal : ndarray of int, shape (n_runs,)
    animal_group : ndarray of int, shape (m,), optional
        The groups given to :func:`fit_mixed`.

    Returns
    -------
    ndarray, shape (V,)
        NaN where not fitted, or where a group with a share has no degrees of freedom.

    References
    ----------
    Welch, B. L. (1947). Biometrika 34:28–35.
    Satterthwaite, F. E. (1946). Biometrics Bulletin 2:110–114.
    """
    from grouplevel.model.contrasts import animal_level_columns

    X = np.asarray(X, dtype=np.float64)
    X = X[:, None] if X.ndim == 1 else X
    animal = np.asarray(animal, dtype=np.int64)
    c = np.asarray(c, dtype=np.float64).ravel()
    if c.shape != (fit.beta.shape[1],) or X.shape[1] != c.size or animal.shape != (len(X),):
        raise ValueError("group_welch_df: c, X and animal do not match the fit.")
    m = int(animal.max()) + 1
    groups = np.zeros(m, dtype=np.int64) if animal_group is None else np.asarray(animal_group)
    n_groups = fit.info_by_group.shape[1]
    if groups.shape != (m,) or int(groups.max()) + 1 != n_groups:
        raise ValueError("group_welch_df: animal_group does not match the fit's groups.")
    level = animal_level_columns(X, animal)
    rank = np.zeros(n_groups)
    for g in range(n_groups):  # loop over groups, not voxels
        rows = groups[animal] == g
        rank[g] = np.linalg.matrix_rank(X[rows][:, level]) if level.any() else 0
    d = fit.animals_by_group - rank[None, :]
    b = np.einsum("vpq,q->vp", fit.cov_beta, c)
    share = np.einsum("vp,vgpq,vq->vg", b, fit.info_by_group, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(share > 0, share**2 / np.where(d > 0, d, np.nan), 0.0)
        df = share.sum(axis=1) ** 2 / terms.sum(axis=1)
    return df
