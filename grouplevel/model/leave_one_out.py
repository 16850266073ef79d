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
covariance block instead (:mod:`grouplevel.model.marginal`).

The variance components stay at their full-data estimates. A refit without the animal
would re-estimate them too; the difference is the price of the shortcut, and it is small
when no single animal dominates τ̂² (measured on the example study: see docs/model.md).
This is the "fixed variance components" case-deletion of Christensen, Pearson & Johnson
(1992) and Haslett & Dillane (2004).

References
----------
Christensen, R., Pearson, L. M., & Johnson, W. (1992). Case-deletion diagnostics for
mixed models. Technometrics 34:38–45.
Haslett, J., & Dillane, D. (2004). Application of 'delete = replace' to deletion
diagnostics for variance component estimation in the linear mixed model. Journal of the
Royal Statistical Society B 66:131–143.
Sherman, J., & Morrison, W. J. (1950). Annals of Mathematical Statistics 21:124–127.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from grouplevel.model.marginal import RandomTerms, animal_gls_pieces

# voxels downdated together; the largest temporaries are (chunk, runs) and
# (chunk, animals, p, p) float64 arrays (common practice: a few tens of MiB)
DEFAULT_CHUNK = 4096
# voxels per chunk of the model-based downdate, whose per-animal covariance blocks are
# (chunk, animals, runs, runs) float64 arrays (common practice: a few tens of MiB)
DEFAULT_MODEL_CHUNK = 1024
# run variances below this fraction of the voxel's total variance are raised to it, so
# that a run with σ̂² = 0 and no first-level variance keeps a finite weight
RELATIVE_VARIANCE_FLOOR = 1e-10


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
    """

    effect: np.ndarray
    se: np.ndarray
    t: np.ndarray
    effect_full: np.ndarray
    se_full: np.ndarray
    t_full: np.ndarray


def leave_one_animal_out(
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    c: np.ndarray,
    var_animal: np.ndarray,
    var_run: np.ndarray,
    *,
    chunk: int = DEFAULT_CHUNK,
) -> LeaveOneOut:
    """Downdate the GLS contrast estimate for every animal left out, at fixed τ̂², σ̂².

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
    chunk : int
        Voxels processed together.

    Returns
    -------
    LeaveOneOut
    """
    y = np.asarray(y)
    X = np.asarray(X, dtype=float)
    animal = np.asarray(animal, dtype=np.intp)
    c = np.asarray(c, dtype=float).ravel()
    n, n_vox = y.shape
    if X.shape[0] != n or animal.shape != (n,) or c.shape != (X.shape[1],):
        raise ValueError(
            f"leave_one_animal_out: y has {n} runs, X {X.shape}, animal {animal.shape}, "
            f"c {c.shape}; they must agree"
        )
    if chunk < 1:
        raise ValueError(f"leave_one_animal_out: chunk must be at least 1, got {chunk}")
    m = int(animal.max()) + 1
    p = X.shape[1]
    G = np.zeros((n, m))
    G[np.arange(n), animal] = 1.0
    GX = (G[:, :, None] * X[:, None, :]).reshape(n, m * p)
    GXX = (G[:, :, None, None] * X[:, None, :, None] * X[:, None, None, :]).reshape(n, -1)
    effect = np.full((m + 1, n_vox), np.nan)
    se = np.full((m + 1, n_vox), np.nan)
    for lo in range(0, n_vox, chunk):
        sl = slice(lo, min(n_vox, lo + chunk))
        yc = np.asarray(y[:, sl], dtype=float).T  # (c, n)
        s2 = None if variance is None else np.asarray(variance[:, sl], dtype=float).T
        tau2 = np.asarray(var_animal[sl], dtype=float)
        sig2 = np.asarray(var_run[sl], dtype=float)
        e, s = _downdate_chunk(yc, s2, G, GX, GXX, X, c, tau2, sig2)
        effect[:, sl] = e.T
        se[:, sl] = s.T
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
    """:func:`leave_one_animal_out` for any fitted model, at its fixed components.

    The same case deletion as :func:`leave_one_animal_out`, for the model of
    :func:`grouplevel.model.mixed.fit_mixed` (random slopes, sessions, variance
    groups): each animal's ``X_aᵀV_a⁻¹X_a`` and ``X_aᵀV_a⁻¹y_a`` come from its own
    covariance block ``V_a`` (:func:`grouplevel.model.marginal.animal_gls_pieces`) and
    are subtracted from the sums. ``components`` are the fit's components by name
    (``MixedModelFit.components``; ``{"animal": τ̂², "run": σ̂²}`` for a random-intercept
    fit) and ``terms`` the random terms it was fitted with.

    References
    ----------
    Christensen, R., Pearson, L. M., & Johnson, W. (1992). Technometrics 34:38–45.
    Haslett, J., & Dillane, D. (2004). J R Stat Soc B 66:131–143.
    """
    y = np.asarray(y)
    X = np.asarray(X, dtype=float)
    animal = np.asarray(animal, dtype=np.intp)
    c = np.asarray(c, dtype=float).ravel()
    n, n_vox = y.shape
    if X.shape[0] != n or animal.shape != (n,) or c.shape != (X.shape[1],):
        raise ValueError(
            f"leave_one_animal_out_model: y has {n} runs, X {X.shape}, animal "
            f"{animal.shape}, c {c.shape}; they must agree"
        )
    if chunk < 1:
        raise ValueError(f"leave_one_animal_out_model: chunk must be at least 1, got {chunk}")
    m = int(animal.max()) + 1
    effect = np.full((m + 1, n_vox), np.nan)
    se = np.full((m + 1, n_vox), np.nan)
    for lo in range(0, n_vox, chunk):
        sl = slice(lo, min(n_vox, lo + chunk))
        part = {k: np.asarray(v)[sl] for k, v in components.items()}
        s2 = None if variance is None else np.asarray(variance[:, sl], dtype=float)
        A_a, b_a = animal_gls_pieces(np.asarray(y[:, sl], dtype=float), s2, X, animal, part, terms)
        e, s = _solve_downdates(A_a, b_a, c)
        effect[:, sl] = e.T
        se[:, sl] = s.T
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


def _downdate_chunk(y, s2, G, GX, GXX, X, c, tau2, sig2):
    """(c, 1 + m) contrast estimates and standard errors: all animals, then without each."""
    n_c = y.shape[0]
    m = G.shape[1]
    p = X.shape[1]
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
    wy = w * y
    S = w @ G  # (c, m)
    Sy = wy @ G
    Sx = (w @ GX).reshape(n_c, m, p)
    Sxy = (wy @ GX).reshape(n_c, m, p)
    Sxx = (w @ GXX).reshape(n_c, m, p, p)
    t2 = np.nan_to_num(tau2)[:, None]
    gam = t2 / (1.0 + t2 * S)  # (c, m)
    A_a = Sxx - gam[:, :, None, None] * Sx[:, :, :, None] * Sx[:, :, None, :]
    b_a = Sxy - gam[:, :, None] * Sx * Sy[:, :, None]
    effect, se = _solve_downdates(A_a, b_a, c)
    bad = ~np.isfinite(tau2)[:, None]
    return np.where(bad, np.nan, effect), np.where(bad, np.nan, se)


def _solve_downdates(A_a: np.ndarray, b_a: np.ndarray, c: np.ndarray):
    """(c, 1 + m) estimates and SEs of cᵀβ from each animal's ``X_aᵀV_a⁻¹X_a`` (c, m, p, p)
    and ``X_aᵀV_a⁻¹y_a`` (c, m, p): with every animal, then without each one."""
    A_a = np.nan_to_num(A_a, nan=np.inf)
    b_a = np.nan_to_num(b_a)
    A = A_a.sum(axis=1, keepdims=True)
    b = b_a.sum(axis=1, keepdims=True)
    # (c, 1 + m, p, p): every animal, then without each one
    M = np.concatenate([A, A - A_a], axis=1)
    rhs = np.concatenate([b, b - b_a], axis=1)
    M = 0.5 * (M + np.swapaxes(M, -1, -2))
    # solve M [β, k] = [rhs, c]: the estimate and M⁻¹c (for cᵀM⁻¹c) in one call
    cc = np.broadcast_to(c, rhs.shape)
    both = np.stack([rhs, cc], axis=-1)  # (c, m, p, 2)
    ok = _well_conditioned(M)
    sol = np.full(both.shape, np.nan)
    sol[ok] = np.linalg.solve(M[ok], both[ok])
    effect = np.einsum("p,cmp->cm", c, sol[..., 0])
    var = np.einsum("p,cmp->cm", c, sol[..., 1])
    with np.errstate(invalid="ignore"):
        se = np.sqrt(np.where(var > 0, var, np.nan))
    return np.where(ok, effect, np.nan), np.where(ok, se, np.nan)


def _well_conditioned(M: np.ndarray) -> np.ndarray:
    """True where a stack of symmetric p × p matrices is safely invertible."""
    eig = np.linalg.eigvalsh(np.where(np.isfinite(M), M, 0.0))
    top = np.abs(eig).max(axis=-1)
    return np.isfinite(M).all(axis=(-1, -2)) & (eig.min(axis=-1) > 1e-12 * np.maximum(top, 1e-300))
