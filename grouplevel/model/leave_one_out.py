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
random-intercept block, so the whole update is still one pass over the data. Its
distance from full refits is measured by tests/unit/test_leave_one_out.py and
benchmarks/bench_leave_one_out.py.

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
Sherman, J., & Morrison, W. J. (1950). Annals of Mathematical Statistics 21:124–127.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from grouplevel.model.marginal import RandomTerms, animal_gls_pieces

# voxels downdated together; the largest temporaries are (chunk, runs) and
# (chunk, animals, p, p) float64 arrays (common practice: a few tens of MiB)
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
    n, n_vox = y.shape
    m = int(animal.max()) + 1
    p = X.shape[1]
    G = np.zeros((n, m))
    G[np.arange(n), animal] = 1.0
    GX = (G[:, :, None] * X[:, None, :]).reshape(n, m * p)
    GXX = (G[:, :, None, None] * X[:, None, :, None] * X[:, None, None, :]).reshape(n, -1)
    effect = np.full((m + 1, n_vox), np.nan)
    se = np.full((m + 1, n_vox), np.nan)
    steps = np.full((2, m, n_vox), np.nan) if update_variances and return_variances else None
    for lo in range(0, n_vox, chunk):
        sl = slice(lo, min(n_vox, lo + chunk))
        yc = np.asarray(y[:, sl], dtype=float).T  # (c, n)
        s2 = None if variance is None else np.asarray(variance[:, sl], dtype=float).T
        tau2 = np.asarray(var_animal[sl], dtype=float)
        sig2 = np.asarray(var_run[sl], dtype=float)
        sums = _animal_sums(yc, s2, G, GX, GXX, X.shape[1], tau2, sig2, update_variances)
        e, s, theta = _downdate(sums, c, tau2, sig2, update_variances, estimate_run_variance)
        effect[:, sl] = e.T
        se[:, sl] = s.T
        if steps is not None:
            steps[:, :, sl] = theta.transpose(2, 1, 0)
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


def _animal_sums(y, s2, G, GX, GXX, p, tau2, sig2, higher: bool) -> dict[str, np.ndarray]:
    """Per-animal weighted sums of one chunk (c voxels × m animals), at (τ̂², σ̂²).

    ``w = 1/(σ² + s²)`` on runs with data. The plain sums give the GLS blocks; with
    ``higher`` the sums of w² and w³ needed by the variance-component step are added.
    """
    n_c = y.shape[0]
    m = G.shape[1]
    present = np.isfinite(y)
    if s2 is not None:
        present &= np.isfinite(s2)
        s2 = np.where(present, s2, 0.0)
    else:
        s2 = np.zeros_like(y)
    y = np.where(present, y, 0.0)
    total = np.nan_to_num(tau2) + np.nan_to_num(sig2)
    floor = RELATIVE_VARIANCE_FLOOR * np.where(total > 0, total, 1.0)
    vk = np.maximum(np.nan_to_num(sig2)[:, None] + s2, floor[:, None])
    w = np.where(present, 1.0 / vk, 0.0)
    out = {}
    for name, weight in (("1", w), ("2", w * w), ("3", w * w * w))[: 3 if higher else 1]:
        wy = weight * y
        out["S" + name] = weight @ G  # (c, m): Σ w^k
        out["Sy" + name] = wy @ G  # Σ w^k y
        out["Sx" + name] = (weight @ GX).reshape(n_c, m, p)  # Σ w^k x
        out["Sxy" + name] = (wy @ GX).reshape(n_c, m, p)  # Σ w^k x y
        out["Sxx" + name] = (weight @ GXX).reshape(n_c, m, p, p)  # Σ w^k x xᵀ
        if name == "2":
            out["Syy2"] = (wy * y) @ G  # Σ w² y²
    return out


def _outer(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return a[..., :, None] * b[..., None, :]


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


def _downdate(sums, c, tau2, sig2, update: bool, estimate_run_variance: bool):
    """(c, 1 + m) contrast estimates and SEs (all animals, then without each), and the
    (c, m, 2) variance components of each left-out fit (NaN when not updated)."""
    S, Sy, Sx, Sxy, Sxx = sums["S1"], sums["Sy1"], sums["Sx1"], sums["Sxy1"], sums["Sxx1"]
    n_c, m, p = Sx.shape
    t2 = np.nan_to_num(tau2)[:, None]
    delta = 1.0 / (1.0 + t2 * S)  # (c, m)
    gam = t2 * delta  # τ²/(1 + τ² Σ w)
    A_a = Sxx - gam[..., None, None] * _outer(Sx, Sx)
    b_a = Sxy - gam[..., None] * Sx * Sy[..., None]
    A, b = _leave_out(A_a), _leave_out(b_a)  # (c, 1 + m, p, p), (c, 1 + m, p)
    cc = np.broadcast_to(c, b.shape)
    sol, ok = _solve(A, np.stack([b, cc], axis=-1))
    beta, k = sol[..., 0], sol[..., 1]
    effect = np.einsum("p,cmp->cm", c, beta)
    var = np.einsum("p,cmp->cm", c, k)
    theta = np.full((n_c, m, 2), np.nan)
    if update:
        effect_new, var_new, theta, moved = _variance_step(
            sums, delta, gam, A, A_a, beta, c, tau2, sig2, estimate_run_variance
        )
        effect = np.where(moved, effect_new, effect)
        var = np.where(moved, var_new, var)
    with np.errstate(invalid="ignore"):
        se = np.sqrt(np.where(var > 0, var, np.nan))
    bad = ~ok | ~np.isfinite(tau2)[:, None]
    return np.where(bad, np.nan, effect), np.where(bad, np.nan, se), theta


def _variance_step(sums, delta, gam, A, A_a, beta, c, tau2, sig2, estimate_run_variance):
    """One Fisher-scoring step of (τ², σ²) without each animal, and β̂, Cov(β̂) moved
    to first order along it (module docstring). Returns the left-out contrast
    estimates and variances (c, 1 + m), the components (c, m, 2) and where the step
    was taken (c, 1 + m; never for the first column, all animals)."""
    S1, S2, S3 = sums["S1"], sums["S2"], sums["S3"]
    Sx1, Sx2, Sx3 = sums["Sx1"], sums["Sx2"], sums["Sx3"]
    Sy1, Sy2 = sums["Sy1"], sums["Sy2"]
    Sxy2, Sxx2, Sxx3, Syy2 = sums["Sxy2"], sums["Sxx2"], sums["Sxx3"], sums["Syy2"]
    n_c, m, p = Sx1.shape
    d2 = delta * delta
    g_ = gam[..., None]
    # per animal (c, m, ...): the pieces of score and information (module docstring)
    h = Sx2 - g_ * S2[..., None] * Sx1  # (V⁻¹X)ᵀw
    C_t = d2[..., None, None] * _outer(Sx1, Sx1)  # XᵀV⁻¹ 11ᵀ V⁻¹X
    C_s = (
        Sxx2
        - g_[..., None] * (_outer(Sx2, Sx1) + _outer(Sx1, Sx2))
        + (gam * gam * S2)[..., None, None] * _outer(Sx1, Sx1)
    )  # XᵀV⁻²X
    tr_t = delta * S1  # tr(V⁻¹ 11ᵀ)
    tr_s = S1 - gam * S2  # tr(V⁻¹)
    T_tt = d2 * S1 * S1
    T_ss = S2 - 2 * gam * S3 + gam * gam * S2 * S2
    T_ts = d2 * S2
    B_tt = (d2 * delta * S1)[..., None, None] * _outer(Sx1, Sx1)
    B_ss = (
        Sxx3
        - g_[..., None] * (_outer(Sx3, Sx1) + _outer(Sx1, Sx3))
        + (gam * gam * S3)[..., None, None] * _outer(Sx1, Sx1)
        - g_[..., None] * _outer(h, h)
    )  # XᵀV⁻³X
    B_ts = d2[..., None, None] * _outer(Sx1, h)  # XᵀV⁻¹11ᵀV⁻²X
    B_ts = 0.5 * (B_ts + np.swapaxes(B_ts, -1, -2))
    # left-out sums (c, 1 + m, ...)
    C = np.stack([_leave_out(C_t), _leave_out(C_s)], axis=2)  # (c, 1+m, 2, p, p)
    trV = np.stack([_leave_out(tr_t), _leave_out(tr_s)], axis=-1)  # (c, 1+m, 2)
    T = np.stack(
        [
            np.stack([_leave_out(T_tt), _leave_out(T_ts)], axis=-1),
            np.stack([_leave_out(T_ts), _leave_out(T_ss)], axis=-1),
        ],
        axis=-2,
    )  # (c, 1+m, 2, 2)
    B = np.stack(
        [
            np.stack([_leave_out(B_tt), _leave_out(B_ts)], axis=2),
            np.stack([_leave_out(B_ts), _leave_out(B_ss)], axis=2),
        ],
        axis=2,
    )  # (c, 1+m, 2, 2, p, p)
    # residual quadratics at each left-out β̂: u = Σ w e, v = Σ w² e, z = Σ w² e²
    # for every left-out fit (index a) and animal (index b): (c, 1+m, m)
    u = Sy1[:, None, :] - np.einsum("cbp,cap->cab", Sx1, beta)
    v = Sy2[:, None, :] - np.einsum("cbp,cap->cab", Sx2, beta)
    z = (
        Syy2[:, None, :]
        - 2 * np.einsum("cbp,cap->cab", Sxy2, beta)
        + np.einsum("cap,cbpq,caq->cab", beta, Sxx2, beta)
    )
    keep = np.ones((1, m + 1, m))
    keep[0, np.arange(1, m + 1), np.arange(m)] = 0.0  # animal a is out of fit a
    dl, gl = delta[:, None, :], gam[:, None, :]
    Q_t = (keep * dl * dl * u * u).sum(axis=-1)
    Q_s = (keep * (z - 2 * gl * u * v + gl * gl * S2[:, None, :] * u * u)).sum(axis=-1)
    # XᵀV⁻¹V_kV⁻¹e summed over the animals of each fit: (c, 1+m, p)
    g_t = np.einsum("cab,cbp->cap", keep * dl * dl * u, Sx1)
    g_s = (
        np.einsum("cab,cbp->cap", keep, Sxy2)
        - np.einsum("cab,cbpq,caq->cap", keep, Sxx2, beta)
        - np.einsum("cab,cbp->cap", keep * gl * u, Sx2)
        - np.einsum("cab,cbp->cap", keep * gl * v, Sx1)
        + np.einsum("cab,cbp->cap", keep * gl * gl * S2[:, None, :] * u, Sx1)
    )
    g = np.stack([g_t, g_s], axis=2)  # (c, 1+m, 2, p)
    # A⁻¹C_k, A⁻¹B_kl and A⁻¹g_k
    Ainv = np.full(A.shape, np.nan)
    invertible = _well_conditioned(A)
    Ainv[invertible] = np.linalg.inv(A[invertible])
    AC = np.einsum("capq,cakqr->cakpr", Ainv, C)
    tr_AC = np.einsum("cakpp->cak", AC)
    tr_AB = np.einsum("capq,caklqp->cakl", Ainv, B)
    tr_ACAC = np.einsum("cakpq,calqp->cakl", AC, AC)
    score = 0.5 * (np.stack([Q_t, Q_s], axis=-1) - (trV - tr_AC))
    info = 0.5 * (T - 2 * tr_AB + tr_ACAC)
    if not estimate_run_variance:  # σ² held: step in τ² alone
        score[..., 1] = 0.0
        info[..., 0, 1] = info[..., 1, 0] = 0.0
        info[..., 1, 1] = 1.0
    theta0 = np.stack([np.nan_to_num(tau2), np.nan_to_num(sig2)], axis=-1)[:, None, :]
    det = info[..., 0, 0] * info[..., 1, 1] - info[..., 0, 1] ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        step_t = (info[..., 1, 1] * score[..., 0] - info[..., 0, 1] * score[..., 1]) / det
        step_s = (info[..., 0, 0] * score[..., 1] - info[..., 0, 1] * score[..., 0]) / det
    step = np.stack([step_t, step_s], axis=-1)
    good = np.isfinite(step).all(axis=-1) & (det > 0)
    theta = np.maximum(theta0 + np.where(good[..., None], step, 0.0), 0.0)
    move = theta - theta0  # the step actually taken (clipped at 0)
    # β̂ and A after the step, to first order: dβ = −A⁻¹ Σ_k g_k dθ_k; dA = −Σ_k C_k dθ_k
    dbeta = -np.einsum("capq,cakq,cak->cap", Ainv, g, move)
    A_new = A - np.einsum("cakpq,cak->capq", C, move)
    cc = np.broadcast_to(c, beta.shape)
    k, ok = _solve(A_new, cc[..., None])
    effect = np.einsum("p,cap->ca", c, beta + dbeta)
    var = np.einsum("p,cap->ca", c, k[..., 0])
    moved = good & ok & (var > 0)
    moved[:, 0] = False  # the full fit keeps its own REML estimate
    return effect, var, theta[:, 1:, :], moved


def _well_conditioned(M: np.ndarray) -> np.ndarray:
    """True where a stack of symmetric p × p matrices is safely invertible."""
    eig = np.linalg.eigvalsh(np.where(np.isfinite(M), M, 0.0))
    top = np.abs(eig).max(axis=-1)
    return np.isfinite(M).all(axis=(-1, -2)) & (eig.min(axis=-1) > 1e-12 * np.maximum(top, 1e-300))
