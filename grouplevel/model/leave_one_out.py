"""Leave-one-animal-out group maps by exact downdating of the GLS solution.

At fixed variance components (τ̂², σ̂²) the generalised least-squares estimate is

    β̂ = (Σ_a X_aᵀV_a⁻¹X_a)⁻¹ Σ_a X_aᵀV_a⁻¹y_a,

a sum of one term per animal, because V is block-diagonal over animals. Leaving animal
a out removes its term from both sums:

    β̂₍₋ₐ₎ = (A − A_a)⁻¹ (b − b_a),   A_a = X_aᵀV_a⁻¹X_a,   b_a = X_aᵀV_a⁻¹y_a,

with Cov(β̂₍₋ₐ₎) = (A − A_a)⁻¹. Each A_a and b_a has the closed form of the random-
intercept block (Sherman–Morrison: V_a⁻¹ = W_a − γ_a w_a w_aᵀ, γ_a = τ²/(1 + τ² Σ w)),
so all animals and all voxels are downdated together from per-animal sums — one pass
over the data, a p × p solve per animal and voxel, instead of one REML refit per animal.
For the general model (random slopes, sessions, variance groups)
:func:`leave_one_animal_out_model` forms each A_a and b_a from the animal's own
covariance block instead (:mod:`grouplevel.model.marginal`), at fixed components.

With ``update_variances=False`` the variance components stay at their full-data
estimates: the "fixed variance components" case-deletion of Christensen, Pearson &
Johnson (1992) and Haslett & Dillane (2004), exact for that model.

A refit without the animal would re-estimate them too. With ``update_variances=True``
(the default) each left-out fit takes **one Fisher-scoring step** of the REML variance
components from the full-data estimates, on the data without the animal,

    θ₍₋ₐ₎ = θ̂ + I₍₋ₐ₎(θ̂)⁻¹ U₍₋ₐ₎(θ̂),   θ = (τ², σ²), clipped at 0,

with the REML score U_k = ½[(y − Xβ)ᵀV⁻¹V_kV⁻¹(y − Xβ) − tr(PV_k)] and expected
information I_kl = ½ tr(PV_kPV_l) (Harville 1977; V_τ = the animal's block of ones,
V_σ = the identity on runs with data), and the GLS estimate and its covariance follow
the step to first order, ∂β̂/∂θ_k = −A⁻¹XᵀV⁻¹V_kV⁻¹(y − Xβ̂), ∂A/∂θ_k = −XᵀV⁻¹V_kV⁻¹X
(the one-step idea of Pregibon 1981, applied to the variance components as Christensen,
Pearson & Johnson 1992 do). Every piece is a sum of per-animal closed forms of the
random-intercept block, so the whole update is still one pass over the data. The
score quadratic Q_k(β) = (y − Xβ)ᵀV⁻¹V_kV⁻¹(y − Xβ) and g_k(β) = XᵀV⁻¹V_kV⁻¹(y − Xβ)
of a left-out fit are taken at its own β̂₍₋ₐ₎ through their exact expansion about the
full fit's β̂ (Hessian 2C_k, slope −C_k with C_k = XᵀV⁻¹V_kV⁻¹X), so each left-out fit
costs O(p²) beyond its p × p solves, not a pass over every animal. Its distance from
full refits is measured by tests/unit/test_leave_one_out.py and
benchmarks/bench_leave_one_out.py.

The random-intercept downdate runs as a compiled per-voxel kernel (numba; p × p and
per-animal scratch arrays only, voxel-major float64 copies of one chunk of the runs ×
voxels arrays); callers run chunks side by side in threads.

References
----------
Christensen, R., Pearson, L. M., & Johnson, W. (1992). Case-deletion diagnostics for
mixed models. Technometrics 34:38–45.
Haslett, J., & Dillane, D. (2004). Application of 'delete = replace' to deletion
diagnostics for variance component estimation in the linear mixed model. Journal of the
Royal Statistical Society B 66:131–143.
Harville, D. A. (1977). Maximum likelihood approaches to variance component estimation
and to related problems. Journal of the American Statistical Association 72:320–338.
Pregibon, D. (1981). Logistic regression diagnostics. Annals of Statistics 9:705–724.
Golub, G. H., & Van Loan, C. F. (2013). Matrix Computations, 4th ed. Johns Hopkins
University Press (§8.5, the cyclic Jacobi eigenvalue method).
Sherman, J., & Morrison, W. J. (1950). Annals of Mathematical Statistics 21:124–127.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from grouplevel.compiled import lazy_njit
from grouplevel.model.marginal import RandomTerms, animal_gls_pieces
from grouplevel.model.memory import voxel_chunks

# voxels downdated together; the temporaries are two (chunk, runs) float64 copies and
# the (animals + 1, chunk) outputs (common practice: a few MiB)
DEFAULT_CHUNK = 4096
# run variances below this fraction of the voxel's total variance are raised to it, so
# that a run with σ̂² = 0 and no first-level variance keeps a finite weight
RELATIVE_VARIANCE_FLOOR = 1e-10
# voxels per chunk of the model-based downdate, whose per-animal covariance blocks are
# (chunk, animals, runs, runs) float64 arrays (common practice: a few tens of MiB)
DEFAULT_MODEL_CHUNK = 1024


@dataclass(frozen=True)
class LeaveOneOut:
    """Group contrast maps with each animal left out in turn.

    Attributes
    ----------
    effect, se, t : ndarray, shape (m, V)
        cᵀβ̂₍₋ₐ₎, its standard error and t for animal a left out (NaN where the design
        has no rank without that animal's runs at a voxel).
    effect_full, se_full, t_full : ndarray, shape (V,)
        The same with every animal, at the same variance components (equal to the
        full REML fit's GLS estimate).
    var_animal, var_run : ndarray, shape (m, V), or None
        The variance components each left-out estimate used: the one-step update from
        the full-data estimates (None when the components were held fixed or not asked
        for: ``return_variances``).
    """

    effect: np.ndarray
    se: np.ndarray
    t: np.ndarray
    effect_full: np.ndarray
    se_full: np.ndarray
    t_full: np.ndarray
    var_animal: np.ndarray | None = None
    var_run: np.ndarray | None = None


def _checked(y, X, animal, c, chunk: int, name: str):
    """The inputs of a leave-one-out function as arrays, their shapes checked."""
    y = np.asarray(y)
    X = np.asarray(X, dtype=float)
    animal = np.asarray(animal, dtype=np.intp)
    c = np.asarray(c, dtype=float).ravel()
    n = y.shape[0]
    if X.shape[0] != n or animal.shape != (n,) or c.shape != (X.shape[1],):
        raise ValueError(
            f"{name}: y has {n} runs, X {X.shape}, animal {animal.shape}, c {c.shape}; "
            "they must agree"
        )
    if chunk < 1:
        raise ValueError(f"{name}: chunk must be at least 1, got {chunk}")
    return y, X, animal, c


def leave_one_animal_out(
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    c: np.ndarray,
    var_animal: np.ndarray,
    var_run: np.ndarray,
    *,
    update_variances: bool = True,
    estimate_run_variance: bool = True,
    return_variances: bool = False,
    chunk: int = DEFAULT_CHUNK,
) -> LeaveOneOut:
    """Downdate the GLS contrast estimate for every animal left out.

    Parameters
    ----------
    y : ndarray, shape (n_runs, V)
        Run effects; NaN where a run has no data at a voxel.
    variance : ndarray, shape (n_runs, V), or None
        First-level variances (NaN: no data); None means 0.
    X : ndarray, shape (n_runs, p)
        Fixed-effects design.
    animal : ndarray of int, shape (n_runs,)
        Animal codes 0..m-1.
    c : array_like, shape (p,)
        Contrast.
    var_animal, var_run : ndarray, shape (V,)
        The full-data estimates τ̂² and σ̂².
    update_variances : bool
        Take one Fisher-scoring step of the variance components without each animal
        (module docstring); False holds them at the full-data estimates (exact GLS
        downdates at fixed components).
    estimate_run_variance : bool
        Whether σ² was estimated (else it is held fixed and only τ² is updated).
    return_variances : bool
        Keep each left-out fit's variance components (two more (m, V) arrays) in the
        result; off by default to save memory.
    chunk : int
        Voxels processed together.

    Returns
    -------
    LeaveOneOut
    """
    y, X, animal, c = _checked(y, X, animal, c, chunk, "leave_one_animal_out")
    n_vox = y.shape[1]
    m = int(animal.max()) + 1
    X = np.ascontiguousarray(X, dtype=np.float64)
    animal = np.ascontiguousarray(animal, dtype=np.int64)
    c = np.ascontiguousarray(c, dtype=np.float64)
    effect = np.full((m + 1, n_vox), np.nan)
    var = np.full((m + 1, n_vox), np.nan)
    keep = bool(update_variances and return_variances)
    steps = np.full((2, m, n_vox), np.nan) if keep else None
    for sl in voxel_chunks(n_vox, chunk):
        k = sl.stop - sl.start
        # voxel-major float64 copies of the chunk: the kernel reads each voxel's runs
        # contiguously (float32 becomes float64 exactly, one chunk at a time)
        yc = np.ascontiguousarray(y[:, sl].T, dtype=np.float64)
        if variance is None:
            s2c = np.zeros_like(yc)
        else:
            s2c = np.ascontiguousarray(np.asarray(variance[:, sl]).T, dtype=np.float64)
        e, v = np.empty((m + 1, k)), np.empty((m + 1, k))
        th = np.empty((2, m, k if keep else 0))
        _nb_leave_one_out_many(
            yc,
            s2c,
            X,
            animal,
            c,
            np.ascontiguousarray(var_animal[sl], dtype=np.float64),
            np.ascontiguousarray(var_run[sl], dtype=np.float64),
            bool(update_variances),
            bool(estimate_run_variance),
            keep,
            e,
            v,
            th,
        )
        effect[:, sl], var[:, sl] = e, v
        if steps is not None:
            steps[:, :, sl] = th
    se = var  # in place: the variances become standard errors
    with np.errstate(invalid="ignore"):
        se[~(se > 0)] = np.nan
        np.sqrt(se, out=se)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = effect / se
    return LeaveOneOut(
        effect=effect[1:],
        se=se[1:],
        t=t[1:],
        effect_full=effect[0],
        se_full=se[0],
        t_full=t[0],
        var_animal=None if steps is None else steps[0],
        var_run=None if steps is None else steps[1],
    )


def leave_one_animal_out_model(
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    c: np.ndarray,
    components: dict[str, np.ndarray],
    terms: RandomTerms | None = None,
    *,
    chunk: int = DEFAULT_MODEL_CHUNK,
) -> LeaveOneOut:
    """The fixed-components downdate for any fitted model (random slopes, sessions,
    variance groups).

    Each animal's ``X_aᵀV_a⁻¹X_a`` and ``X_aᵀV_a⁻¹y_a`` come from its own covariance
    block ``V_a`` under the fitted model
    (:func:`grouplevel.model.marginal.animal_gls_pieces`) and are subtracted from the
    sums, at the full-data components (``update_variances=False`` of
    :func:`leave_one_animal_out`, which it equals for the random intercept).
    ``components`` are the fit's components by name (``MixedModelFit.components``;
    ``{"animal": τ̂², "run": σ̂²}`` for a random-intercept fit) and ``terms`` the random
    terms it was fitted with.

    References
    ----------
    Christensen, R., Pearson, L. M., & Johnson, W. (1992). Technometrics 34:38–45.
    Haslett, J., & Dillane, D. (2004). J R Stat Soc B 66:131–143.
    """
    y, X, animal, c = _checked(y, X, animal, c, chunk, "leave_one_animal_out_model")
    n, n_vox = y.shape
    m = int(animal.max()) + 1
    effect = np.full((m + 1, n_vox), np.nan)
    se = np.full((m + 1, n_vox), np.nan)
    for lo in range(0, n_vox, chunk):
        sl = slice(lo, min(n_vox, lo + chunk))
        part = {k: np.asarray(v)[sl] for k, v in components.items()}
        s2 = None if variance is None else np.asarray(variance[:, sl], dtype=float)
        A_a, b_a = animal_gls_pieces(np.asarray(y[:, sl], dtype=float), s2, X, animal, part, terms)
        # an animal whose block could not be inverted makes every sum unusable
        A_a = np.nan_to_num(A_a, nan=np.inf)
        A, b = _leave_out(A_a), _leave_out(np.nan_to_num(b_a))
        sol, ok = _solve(A, np.stack([b, np.broadcast_to(c, b.shape)], axis=-1))
        e = np.einsum("p,cmp->cm", c, sol[..., 0])
        var = np.einsum("p,cmp->cm", c, sol[..., 1])
        with np.errstate(invalid="ignore"):
            s = np.sqrt(np.where(var > 0, var, np.nan))
        effect[:, sl] = np.where(ok, e, np.nan).T
        se[:, sl] = np.where(ok, s, np.nan).T
    with np.errstate(divide="ignore", invalid="ignore"):
        t = effect / se
    return LeaveOneOut(
        effect=effect[1:],
        se=se[1:],
        t=t[1:],
        effect_full=effect[0],
        se_full=se[0],
        t_full=t[0],
    )


def _leave_out(total_and_own: np.ndarray) -> np.ndarray:
    """(c, m, ...) per-animal terms → (c, 1 + m, ...): their sum, then without each."""
    total = total_and_own.sum(axis=1, keepdims=True)
    return np.concatenate([total, total - total_and_own], axis=1)


def _solve(M: np.ndarray, rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Solve symmetric (…, p, p) systems for (…, p, k) right-hand sides where safe."""
    M = 0.5 * (M + np.swapaxes(M, -1, -2))
    ok = _well_conditioned(M)
    sol = np.full(rhs.shape, np.nan)
    sol[ok] = np.linalg.solve(M[ok], rhs[ok])
    return sol, ok


def _well_conditioned(M: np.ndarray) -> np.ndarray:
    """True where a stack of symmetric p × p matrices is safely invertible."""
    eig = np.linalg.eigvalsh(np.where(np.isfinite(M), M, 0.0))
    top = np.abs(eig).max(axis=-1)
    return np.isfinite(M).all(axis=(-1, -2)) & (
        eig.min(axis=-1) > CONDITION_LIMIT * np.maximum(top, 1e-300)
    )


# --------------------------------------------------------------------------------------
# compiled per-voxel kernel of the random-intercept downdate (numba)
# --------------------------------------------------------------------------------------
# One voxel at a time: its per-animal weighted sums (w = 1/(σ² + s²), and w², w³ for the
# variance step), the GLS blocks A_a, b_a (Sherman–Morrison), every left-out solve and
# the one-step update, with p × p and per-animal scratch arrays only. The kernel
# releases the GIL; the callers run it on disjoint chunks of voxels in threads.

# Fisher-scoring pieces kept per animal (and their sums over animals): index of each
_C_T, _C_S, _B_TT, _B_SS, _B_TS = 0, 1, 2, 3, 4  # p × p blocks
_TR_T, _TR_S, _T_TT, _T_SS, _T_TS, _Q_T, _Q_S = 0, 1, 2, 3, 4, 5, 6  # scalars
# p × p scratch matrices of one voxel: index of each
_EYE, _WORK, _AINV, _A_NEW, _LO = 0, 1, 2, 3, 4  # _LO.._LO + 4: the left-out blocks
_AC = 9  # _AC, _AC + 1: A⁻¹C_τ, A⁻¹C_σ
_SCRATCH_MATRICES = 11
# smallest eigenvalue over the largest |eigenvalue| of a matrix taken as invertible
CONDITION_LIMIT = 1e-12
# Jacobi sweeps for the eigenvalues of a p × p matrix: each sweep squares the
# off-diagonal mass, so a handful reach rounding for the small p of a design
_JACOBI_SWEEPS = 50
_FLOAT_MAX = float(np.finfo(np.float64).max)


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_finite(x):
    """``np.nan_to_num`` of one number."""
    if np.isnan(x):
        return 0.0
    if np.isinf(x):
        return _FLOAT_MAX if x > 0 else -_FLOAT_MAX
    return x


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_well_conditioned(M, work):
    """True where a symmetric p × p matrix is finite and its smallest eigenvalue is
    above ``CONDITION_LIMIT`` times its largest |eigenvalue|. One column (a mean's
    design) is decided here; larger matrices by :func:`_nb_jacobi_well_conditioned`,
    a call rather than inlined code (its loops would lengthen the compile at every
    place this is used)."""
    if M.shape[0] == 1:  # the one eigenvalue is the entry
        x = M[0, 0]
        return np.isfinite(x) and x > CONDITION_LIMIT * max(abs(x), 1e-300)
    return _nb_jacobi_well_conditioned(M, work)


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_jacobi_well_conditioned(M, work):
    """:func:`_nb_well_conditioned` of a p × p matrix, p ≥ 2, by cyclic Jacobi
    eigenvalues (Golub & Van Loan 2013, Algorithm 8.5.2)."""
    p = M.shape[0]
    total = 0.0
    for i in range(p):
        for j in range(p):
            if not np.isfinite(M[i, j]):
                return False
            work[i, j] = M[i, j]
            total += M[i, j] * M[i, j]
    for _ in range(_JACOBI_SWEEPS):
        off = 0.0
        for i in range(p):
            for j in range(i + 1, p):
                off += work[i, j] * work[i, j]
        if off <= 1e-36 * total:
            break
        for i in range(p):
            for j in range(i + 1, p):
                _nb_rotate(work, i, j)
    lo, top = work[0, 0], 0.0
    for i in range(p):
        lo = min(lo, work[i, i])
        top = max(top, abs(work[i, i]))
    return lo > CONDITION_LIMIT * max(top, 1e-300)


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_rotate(work, i, j):
    """One Jacobi rotation zeroing ``work[i, j]`` (Golub & Van Loan 2013, Alg. 8.5.1)."""
    if work[i, j] == 0.0:
        return
    tau = (work[j, j] - work[i, i]) / (2.0 * work[i, j])
    if abs(tau) > 1e150:
        t = 0.5 / tau
    else:
        t = 1.0 / (abs(tau) + np.sqrt(1.0 + tau * tau))
        if tau < 0:
            t = -t
    cs = 1.0 / np.sqrt(1.0 + t * t)
    sn = t * cs
    for k in range(work.shape[0]):
        a, b = work[k, i], work[k, j]
        work[k, i] = cs * a - sn * b
        work[k, j] = sn * a + cs * b
    for k in range(work.shape[0]):
        a, b = work[i, k], work[j, k]
        work[i, k] = cs * a - sn * b
        work[j, k] = sn * a + cs * b


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_solve(M, R, W, out):
    """``out = M⁻¹ R`` (M: p × p, R and out: p × r; W: p × p scratch). One column is
    solved here, with the arithmetic of the elimination for p = 1; larger systems by
    :func:`_nb_solve_general`, a call rather than inlined code (shorter compiles)."""
    if M.shape[0] == 1:
        W[0, 0] = M[0, 0]
        for k in range(R.shape[1]):
            out[0, k] = R[0, k] / W[0, 0]
        return
    _nb_solve_general(M, R, W, out)


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_solve_general(M, R, W, out):
    """``out = M⁻¹ R`` by Gaussian elimination with partial pivoting (M: p × p, R and
    out: p × r; W: p × p scratch)."""
    p, r = R.shape
    for i in range(p):
        for k in range(p):
            W[i, k] = M[i, k]
        for k in range(r):
            out[i, k] = R[i, k]
    for j in range(p):
        piv = j
        for i in range(j + 1, p):
            if abs(W[i, j]) > abs(W[piv, j]):
                piv = i
        if piv != j:
            for k in range(p):
                W[j, k], W[piv, k] = W[piv, k], W[j, k]
            for k in range(r):
                out[j, k], out[piv, k] = out[piv, k], out[j, k]
        for i in range(j + 1, p):
            f = W[i, j] / W[j, j]
            for k in range(j, p):
                W[i, k] -= f * W[j, k]
            for k in range(r):
                out[i, k] -= f * out[j, k]
    for j in range(p - 1, -1, -1):
        for k in range(r):
            s = out[j, k]
            for i in range(j + 1, p):
                s -= W[j, i] * out[i, k]
            out[j, k] = s / W[j, j]


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_animal_sums(y, s2, X, animal, tau2, sig2, powers, S, Sy, Syy2, Sx, Sxy, Sxx):
    """Per-animal sums of w^k, w^k y, w^k x, w^k x y, w^k x xᵀ (k = 1..powers) and
    w² y² of one voxel, ``w = 1/(σ² + s²)`` on the runs with data (floored)."""
    n, p = X.shape
    m = S.shape[1]
    for j in range(powers):
        for a in range(m):
            S[j, a] = Sy[j, a] = Syy2[a] = 0.0
            for i in range(p):
                Sx[j, a, i] = Sxy[j, a, i] = 0.0
                for l in range(p):
                    Sxx[j, a, i, l] = 0.0
    total = _nb_finite(tau2) + _nb_finite(sig2)
    floor = RELATIVE_VARIANCE_FLOOR * (total if total > 0 else 1.0)
    sig = _nb_finite(sig2)
    for k in range(n):
        yk = y[k]
        if not (np.isfinite(yk) and np.isfinite(s2[k])):
            continue
        w = 1.0 / max(sig + s2[k], floor)
        a = animal[k]
        _nb_add_power(0, w, yk, X, k, a, S, Sy, Sx, Sxy, Sxx)
        if powers > 1:
            w2 = w * w
            _nb_add_power(1, w2, yk, X, k, a, S, Sy, Sx, Sxy, Sxx)
            Syy2[a] += w2 * yk * yk
            _nb_add_power(2, w2 * w, yk, X, k, a, S, Sy, Sx, Sxy, Sxx)


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_add_power(j, wk, yk, X, k, a, S, Sy, Sx, Sxy, Sxx):
    """Add run ``k`` (of animal ``a``, weight power ``wk``) to the sums of power j + 1."""
    p = X.shape[1]
    wy = wk * yk
    S[j, a] += wk
    Sy[j, a] += wy
    for i in range(p):
        xi = X[k, i]
        Sx[j, a, i] += wk * xi
        Sxy[j, a, i] += wy * xi
        for l in range(p):
            Sxx[j, a, i, l] += wk * (xi * X[k, l])


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_gls(S, Sy, Sx, Sxy, Sxx, t2, c, delta, gam, Aa, ba, A, b, beta, kk, ok, sp, rhs):
    """The GLS blocks of every animal (Sherman–Morrison), their sums with every animal
    and without each (fit 0, fits 1..m), and each fit's β̂ and (XᵀV⁻¹X)⁻¹c."""
    m, p = Sx.shape[1], Sx.shape[2]
    work, sol = sp[_WORK], rhs[1]
    A[0] = 0.0
    b[0] = 0.0
    for a in range(m):
        delta[a] = 1.0 / (1.0 + t2 * S[0, a])
        gam[a] = t2 * delta[a]
        for i in range(p):
            ba[a, i] = Sxy[0, a, i] - gam[a] * Sx[0, a, i] * Sy[0, a]
            b[0, i] += ba[a, i]
            for j in range(p):
                Aa[a, i, j] = Sxx[0, a, i, j] - gam[a] * (Sx[0, a, i] * Sx[0, a, j])
                A[0, i, j] += Aa[a, i, j]
    for a in range(m):
        for i in range(p):
            b[a + 1, i] = b[0, i] - ba[a, i]
            for j in range(p):
                A[a + 1, i, j] = A[0, i, j] - Aa[a, i, j]
    for f in range(m + 1):
        ok[f] = _nb_well_conditioned(A[f], work)
        if not ok[f]:
            for i in range(p):
                beta[f, i] = kk[f, i] = np.nan
            continue
        for i in range(p):
            rhs[0, i, 0] = b[f, i]
            rhs[0, i, 1] = c[i]
        _nb_solve(A[f], rhs[0], work, sol)
        for i in range(p):
            beta[f, i] = sol[i, 0]
            kk[f, i] = sol[i, 1]


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_step_pieces(S, Sx, Sxx, delta, gam, h, blocks, traces):
    """Per animal: (V⁻¹X)ᵀw, the p × p blocks C_τ, C_σ, B_ττ, B_σσ, B_τσ and the
    traces tr V⁻¹V_k and T_kl of the score and information (module docstring); the
    last index of ``blocks`` and ``traces`` along animals holds their sums."""
    m, p = Sx.shape[1], Sx.shape[2]
    traces[:_Q_T, m] = 0.0
    blocks[:, m] = 0.0
    for a in range(m):
        d, g = delta[a], gam[a]
        d2 = d * d
        S1, S2, S3 = S[0, a], S[1, a], S[2, a]
        for i in range(p):
            h[a, i] = Sx[1, a, i] - g * S2 * Sx[0, a, i]
        for i in range(p):
            for j in range(p):
                x11 = Sx[0, a, i] * Sx[0, a, j]
                blocks[_C_T, a, i, j] = d2 * x11
                blocks[_C_S, a, i, j] = (
                    Sxx[1, a, i, j]
                    - g * (Sx[1, a, i] * Sx[0, a, j] + Sx[0, a, i] * Sx[1, a, j])
                    + (g * g * S2) * x11
                )
                blocks[_B_TT, a, i, j] = (d2 * d * S1) * x11
                blocks[_B_SS, a, i, j] = (
                    Sxx[2, a, i, j]
                    - g * (Sx[2, a, i] * Sx[0, a, j] + Sx[0, a, i] * Sx[2, a, j])
                    + (g * g * S3) * x11
                    - g * (h[a, i] * h[a, j])
                )
                blocks[_B_TS, a, i, j] = 0.5 * (
                    d2 * (Sx[0, a, i] * h[a, j]) + d2 * (Sx[0, a, j] * h[a, i])
                )
        traces[_TR_T, a] = d * S1
        traces[_TR_S, a] = S1 - g * S2
        traces[_T_TT, a] = d2 * S1 * S1
        traces[_T_SS, a] = S2 - 2 * g * S3 + g * g * S2 * S2
        traces[_T_TS, a] = d2 * S2
        for k in range(_Q_T):
            traces[k, m] += traces[k, a]
        for k in range(blocks.shape[0]):
            for i in range(p):
                for j in range(p):
                    blocks[k, m, i, j] += blocks[k, a, i, j]


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_residual_pieces(S, Sy, Syy2, Sx, Sxy, Sxx, delta, gam, center, traces, gq):
    """Per animal, at β = ``center``: the score quadratics Q_τ = (1ᵀV⁻¹e)², Q_σ =
    eᵀV⁻²e (into ``traces``) and g_k = XᵀV⁻¹V_kV⁻¹e (into ``gq``, 2 × animals × p),
    from u = Σ w e, v = Σ w² e, z = Σ w² e²; the last index along animals holds sums.

    Q_k is quadratic and g_k linear in β (Hessian 2C_k, slope −C_k), so every left-out
    fit's values follow from these at one center and its own C_k (module docstring)."""
    m, p = Sx.shape[1], Sx.shape[2]
    traces[_Q_T, m] = traces[_Q_S, m] = 0.0
    for i in range(p):
        gq[0, m, i] = gq[1, m, i] = 0.0
    for a in range(m):
        u, v, z = Sy[0, a], Sy[1, a], Syy2[a]
        quad = 0.0
        for i in range(p):
            u -= Sx[0, a, i] * center[i]
            v -= Sx[1, a, i] * center[i]
            z -= 2 * Sxy[1, a, i] * center[i]
            for j in range(p):
                quad += center[i] * Sxx[1, a, i, j] * center[j]
        z += quad
        d, g, S2 = delta[a], gam[a], S[1, a]
        traces[_Q_T, a] = d * d * u * u
        traces[_Q_S, a] = z - 2 * g * u * v + g * g * S2 * u * u
        traces[_Q_T, m] += traces[_Q_T, a]
        traces[_Q_S, m] += traces[_Q_S, a]
        for i in range(p):
            xb = 0.0
            for j in range(p):
                xb += Sxx[1, a, i, j] * center[j]
            gq[0, a, i] = d * d * u * Sx[0, a, i]
            gq[1, a, i] = (
                Sxy[1, a, i]
                - xb
                - g * u * Sx[1, a, i]
                - g * v * Sx[0, a, i]
                + g * g * S2 * u * Sx[0, a, i]
            )
            gq[0, m, i] += gq[0, a, i]
            gq[1, m, i] += gq[1, a, i]


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_left_out_score(f, center, beta, gq, traces, lo, g, delta_beta):
    """Q_τ, Q_σ and g_τ, g_σ (into ``g``) of fit ``f`` at its own β̂, from the sums of
    :func:`_nb_residual_pieces` without its animal and its left-out C_τ, C_σ (``lo``):
    Q_k(β) = Q_k(c) − 2 g_k(c)ᵀ(β − c) + (β − c)ᵀC_k(β − c), g_k(β) = g_k(c) − C_k(β − c)."""
    p = beta.shape[1]
    m, o = gq.shape[1] - 1, f - 1
    for i in range(p):
        delta_beta[i] = beta[f, i] - center[i]
    q_t = q_s = 0.0
    for k in range(2):
        qk = traces[_Q_T + k, m] - traces[_Q_T + k, o]
        for i in range(p):
            gk = gq[k, m, i] - gq[k, o, i]
            cd = 0.0
            for j in range(p):
                cd += lo[k, i, j] * delta_beta[j]
            qk += (cd - 2 * gk) * delta_beta[i]
            g[k, i] = gk - cd
        if k == 0:
            q_t = qk
        else:
            q_s = qk
    return q_t, q_s


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_fisher_step(f, theta0, estimate_sigma, center, beta, A, blocks, traces, gq, g, sp, dbeta):
    """One Fisher-scoring step of (τ², σ²) from ``theta0`` for fit ``f`` (its animal
    left out), at that fit's sums; leaves A⁻¹ in ``sp[_AINV]`` and the left-out
    blocks in ``sp[_LO:]``. Returns the new (τ², σ²), clipped at 0, and whether the
    step was finite with a positive-definite information (else it is not taken)."""
    p = A.shape[1]
    m, o = blocks.shape[1] - 1, f - 1
    eye, Ainv = sp[_EYE], sp[_AINV]
    for i in range(p):
        for j in range(p):
            eye[i, j] = 1.0 if i == j else 0.0
    _nb_solve(A[f], eye, sp[_WORK], Ainv)
    lo, AC = sp[_LO : _LO + 5], sp[_AC : _AC + 2]
    for k in range(5):
        for i in range(p):
            for j in range(p):
                lo[k, i, j] = blocks[k, m, i, j] - blocks[k, o, i, j]
    q_t, q_s = _nb_left_out_score(f, center, beta, gq, traces, lo, g, dbeta)
    tr_ac_t = tr_ac_s = tr_ab_tt = tr_ab_ts = tr_ab_ss = 0.0
    for k in range(2):  # A⁻¹C_k
        for i in range(p):
            for j in range(p):
                s = 0.0
                for q in range(p):
                    s += Ainv[i, q] * lo[k, q, j]
                AC[k, i, j] = s
    tr_acac_tt = tr_acac_ts = tr_acac_ss = 0.0
    for i in range(p):
        tr_ac_t += AC[0, i, i]
        tr_ac_s += AC[1, i, i]
        for j in range(p):
            tr_ab_tt += Ainv[i, j] * lo[_B_TT, j, i]
            tr_ab_ts += Ainv[i, j] * lo[_B_TS, j, i]
            tr_ab_ss += Ainv[i, j] * lo[_B_SS, j, i]
            tr_acac_tt += AC[0, i, j] * AC[0, j, i]
            tr_acac_ts += AC[0, i, j] * AC[1, j, i]
            tr_acac_ss += AC[1, i, j] * AC[1, j, i]
    s_t = 0.5 * (q_t - ((traces[_TR_T, m] - traces[_TR_T, o]) - tr_ac_t))
    s_s = 0.5 * (q_s - ((traces[_TR_S, m] - traces[_TR_S, o]) - tr_ac_s))
    i_tt = 0.5 * ((traces[_T_TT, m] - traces[_T_TT, o]) - 2 * tr_ab_tt + tr_acac_tt)
    i_ts = 0.5 * ((traces[_T_TS, m] - traces[_T_TS, o]) - 2 * tr_ab_ts + tr_acac_ts)
    i_ss = 0.5 * ((traces[_T_SS, m] - traces[_T_SS, o]) - 2 * tr_ab_ss + tr_acac_ss)
    if not estimate_sigma:  # σ² held: step in τ² alone
        s_s, i_ts, i_ss = 0.0, 0.0, 1.0
    det = i_tt * i_ss - i_ts * i_ts
    step_t = (i_ss * s_t - i_ts * s_s) / det
    step_s = (i_tt * s_s - i_ts * s_t) / det
    good = np.isfinite(step_t) and np.isfinite(step_s) and det > 0
    if not good:
        step_t, step_s = 0.0, 0.0
    return max(theta0[0] + step_t, 0.0), max(theta0[1] + step_s, 0.0), good


@lazy_njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _nb_moved(f, c, A, beta, move_t, move_s, g, sp, rhs):
    """The contrast estimate and variance of fit ``f`` moved to first order along the
    step (module docstring): cᵀ(β̂ + dβ), cᵀ(A + dA)⁻¹c, and whether A + dA is safely
    invertible. Needs A⁻¹ and the left-out C_τ, C_σ of :func:`_nb_fisher_step`."""
    p = A.shape[1]
    Ainv, A_new, lo = sp[_AINV], sp[_A_NEW], sp[_LO : _LO + 2]
    effect = 0.0
    for i in range(p):
        db = 0.0
        for q in range(p):
            db += Ainv[i, q] * (g[0, q] * move_t + g[1, q] * move_s)
        effect += c[i] * (beta[f, i] - db)
        for j in range(p):
            A_new[i, j] = A[f, i, j] - (lo[0, i, j] * move_t + lo[1, i, j] * move_s)
    for i in range(p):
        for j in range(i):
            A_new[i, j] = A_new[j, i] = 0.5 * (A_new[i, j] + A_new[j, i])
    if not _nb_well_conditioned(A_new, sp[_WORK]):
        return effect, np.nan, False
    for i in range(p):
        rhs[0, i, 0] = c[i]
    _nb_solve(A_new, rhs[0, :, :1], sp[_WORK], rhs[1, :, :1])
    var = 0.0
    for i in range(p):
        var += c[i] * rhs[1, i, 0]
    return effect, var, True


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_leave_one_out_many(
    y, s2, X, animal, c, tau2, sig2, update, estimate_sigma, keep_theta, effect, var, theta
):
    """Every voxel of a chunk (``y``, ``s2``: voxels × runs): the contrast estimate and
    variance of the fit with all animals and without each (``effect``, ``var``:
    (1 + m) × voxels, NaN where not estimable) and, with ``keep_theta``, each left-out
    fit's variance components (``theta``: 2 × m × voxels)."""
    n_vox = y.shape[0]
    p = X.shape[1]
    m = effect.shape[0] - 1
    S, Sy, Syy2 = np.zeros((3, m)), np.zeros((3, m)), np.zeros(m)
    Sx, Sxy, Sxx = np.zeros((3, m, p)), np.zeros((3, m, p)), np.zeros((3, m, p, p))
    delta, gam, Aa, ba = np.zeros(m), np.zeros(m), np.zeros((m, p, p)), np.zeros((m, p))
    A, b, beta, kk = (
        np.zeros((m + 1, p, p)),
        np.zeros((m + 1, p)),
        np.zeros((m + 1, p)),
        np.zeros((m + 1, p)),
    )
    ok = np.zeros(m + 1, dtype=np.bool_)
    h, blocks, traces = np.zeros((m, p)), np.zeros((5, m + 1, p, p)), np.zeros((7, m + 1))
    gq, center, dbeta = np.zeros((2, m + 1, p)), np.zeros(p), np.zeros(p)
    sp, rhs, g = np.zeros((_SCRATCH_MATRICES, p, p)), np.zeros((2, p, 2)), np.zeros((2, p))
    theta0 = np.zeros(2)
    powers = 3 if update else 1
    for v in range(n_vox):
        _nb_animal_sums(y[v], s2[v], X, animal, tau2[v], sig2[v], powers, S, Sy, Syy2, Sx, Sxy, Sxx)
        t2 = _nb_finite(tau2[v])
        _nb_gls(S, Sy, Sx, Sxy, Sxx, t2, c, delta, gam, Aa, ba, A, b, beta, kk, ok, sp, rhs)
        bad = not np.isfinite(tau2[v])
        if update:
            theta0[0], theta0[1] = t2, _nb_finite(sig2[v])
            _nb_step_pieces(S, Sx, Sxx, delta, gam, h, blocks, traces)
            for i in range(p):  # the full fit's β̂ where it has one (any center is exact)
                center[i] = beta[0, i] if ok[0] else 0.0
            _nb_residual_pieces(S, Sy, Syy2, Sx, Sxy, Sxx, delta, gam, center, traces, gq)
        for f in range(m + 1):
            e, w = 0.0, 0.0
            for i in range(p):
                e += c[i] * beta[f, i]
                w += c[i] * kk[f, i]
            if update and f > 0:
                new_t, new_s = max(theta0[0], 0.0), max(theta0[1], 0.0)
                if ok[f]:  # (else A⁻¹ is NaN and no step is finite)
                    new_t, new_s, good = _nb_fisher_step(
                        f, theta0, estimate_sigma, center, beta, A, blocks, traces, gq, g, sp, dbeta
                    )
                    if good:
                        e_new, w_new, ok_new = _nb_moved(
                            f, c, A, beta, new_t - theta0[0], new_s - theta0[1], g, sp, rhs
                        )
                        if ok_new and w_new > 0:
                            e, w = e_new, w_new
                if keep_theta:
                    theta[0, f - 1, v], theta[1, f - 1, v] = new_t, new_s
            if bad or not ok[f]:
                e, w = np.nan, np.nan
            effect[f, v] = e
            var[f, v] = w
