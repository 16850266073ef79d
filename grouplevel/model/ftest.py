"""F-tests of several contrasts at once: ``Lβ = 0`` for a (q, p) matrix ``L``.

The Wald statistic at the REML estimates,

    F = (Lβ̂)ᵀ (L Φ̂ Lᵀ)⁻¹ (Lβ̂) / q,     Φ̂ = Cov(β̂) = (XᵀV̂⁻¹X)⁻¹,

is referred to an F distribution with ``q`` numerator degrees of freedom and the
denominator degrees of freedom of the level the rows test (the between-animal or slope
rule of :mod:`grouplevel.model.contrasts`, the same as a t contrast of those columns).
With q = 1 it is the square of the contrast's t. The F-test is two-sided by nature (a
difference in any direction raises F), so its p is the upper tail, and its z is the
standard normal value with the same one-sided (upper-tail) p, which lets FDR, clusters
and TFCE treat it as they treat the z of a t contrast tested on its positive side.

References
----------
Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS. Springer,
§2.4.2 (Wald F-tests of fixed-effects terms; section from memory).

Kenward, M. G., & Roger, J. H. (1997). Small sample inference for fixed effects from
restricted maximum likelihood. Biometrics 53:983–997 (the Wald F of ``Lβ`` and its
denominator degrees of freedom in mixed models).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from grouplevel.distributions import chi2_logsf, f_logsf, f_sf
from grouplevel.errors import ArgumentError

# Rows of L count as independent when the smallest singular value of L, relative to the
# largest, exceeds this (common practice for rank decisions in double precision).
RANK_TOLERANCE = 1e-10


@dataclass(frozen=True)
class FTestResult:
    """An F-test at every voxel.

    Attributes
    ----------
    f : ndarray, shape (V,)
        The Wald F statistic.
    df_num : int
        Numerator degrees of freedom q (rows of L).
    df : ndarray, shape (V,)
        Denominator degrees of freedom.
    p : ndarray, shape (V,)
        Upper-tail p of F on (q, df).
    z : ndarray, shape (V,)
        Standard normal value with the same upper-tail p.

    NaN where the voxel was not fitted or its degrees of freedom are not positive.
    """

    f: np.ndarray
    df_num: int
    df: np.ndarray
    p: np.ndarray
    z: np.ndarray


def as_contrast_matrix(L, p: int) -> np.ndarray:
    """Check a (q, p) matrix of contrast rows: finite, one weight per column, full rank.

    Raises
    ------
    ArgumentError
        When a row has the wrong length, a weight is not finite, or the rows are linearly
        dependent (their F-test would have fewer than q degrees of freedom).
    """
    L = np.atleast_2d(np.asarray(L, dtype=np.float64))
    if L.ndim != 2 or L.shape[1] != p or L.shape[0] < 1:
        raise ArgumentError(
            f"an F-test needs rows of {p} weights (one per design column); got shape {L.shape}"
        )
    if not np.all(np.isfinite(L)):
        raise ArgumentError("F-test weights must be finite")
    if contrast_rank(L) < L.shape[0]:
        raise ArgumentError(
            f"the {L.shape[0]} rows of the F-test are linearly dependent (rank "
            f"{contrast_rank(L)}); drop the rows that are combinations of the others"
        )
    return L


def contrast_rank(L: np.ndarray) -> int:
    """Numerical rank of a matrix of contrast rows."""
    s = np.linalg.svd(np.atleast_2d(L), compute_uv=False)
    if not s.size or s[0] == 0:
        return 0
    return int(np.sum(s > RANK_TOLERANCE * s[0]))


def f_to_z(f: np.ndarray, df_num: float, df: np.ndarray | float) -> np.ndarray:
    """Standard normal value with the same upper-tail p as ``f`` on (df_num, df).

    ``z = −Φ⁻¹(S_F(f))`` from the survival function (scipy.special.fdtrc, fast enough to
    run once per permutation); where that underflows to 0 (p below about 1e-308), from
    its logarithm (scipy.special.ndtri_exp), so z stays finite for very large F.
    Infinite ``df`` uses the chi-square limit ``q·F ~ χ²_q``.

    Returns
    -------
    ndarray
        NaN where ``f`` or ``df`` is NaN or ``df ≤ 0``.
    """
    f = np.asarray(f, dtype=np.float64)
    df = np.broadcast_to(np.asarray(df, dtype=np.float64), f.shape)
    out = np.full(f.shape, np.nan)
    finite = np.isfinite(df) & (df > 0) & ~np.isnan(f)
    if np.any(finite):
        fv, dv = np.maximum(f[finite], 0.0), df[finite]
        p = special.fdtrc(df_num, dv, fv)
        z = -special.ndtri(p)
        tiny = p <= 0.0
        if np.any(tiny):
            z[tiny] = -special.ndtri_exp(f_logsf(fv[tiny], df_num, dv[tiny]))
        out[finite] = z
    inf_df = np.isposinf(df) & ~np.isnan(f)
    if np.any(inf_df):
        logsf = chi2_logsf(np.maximum(f[inf_df], 0.0) * df_num, df_num)
        out[inf_df] = -special.ndtri_exp(logsf)
    return out


def wald_f(beta: np.ndarray, cov_beta: np.ndarray, L: np.ndarray) -> np.ndarray:
    """``(Lβ)ᵀ (L Φ Lᵀ)⁻¹ (Lβ) / q`` at every voxel (batched q × q solves).

    Parameters
    ----------
    beta : ndarray, shape (V, p)
    cov_beta : ndarray, shape (V, p, p)
    L : ndarray, shape (q, p)

    Returns
    -------
    ndarray, shape (V,)
        NaN where β is not finite or ``L Φ Lᵀ`` is not positive definite.
    """
    q = L.shape[0]
    effect = beta @ L.T  # (V, q)
    cov = np.einsum("ip,vpr,jr->vij", L, cov_beta, L)  # (V, q, q)
    ok = np.all(np.isfinite(effect), axis=1) & np.all(np.isfinite(cov), axis=(1, 2))
    out = np.full(beta.shape[0], np.nan)
    if not np.any(ok):
        return out
    cov_ok, eff_ok = cov[ok], effect[ok]
    # positive definite ⇔ Cholesky succeeds; check by eigenvalues to stay batched
    eig = np.linalg.eigvalsh(cov_ok)
    pd_ok = eig[:, 0] > RANK_TOLERANCE * np.maximum(eig[:, -1], np.finfo(float).tiny)
    solved = np.zeros_like(eff_ok)
    if np.any(pd_ok):
        solved[pd_ok] = np.linalg.solve(cov_ok[pd_ok], eff_ok[pd_ok][..., None])[..., 0]
    values = np.einsum("vi,vi->v", eff_ok, solved) / q
    out[np.flatnonzero(ok)] = np.where(pd_ok, values, np.nan)
    return out


def test_f(fit, L, df) -> FTestResult:
    """Wald F, p and z of ``Lβ = 0`` at every voxel of a REML fit.

    Parameters
    ----------
    fit
        A fit with ``beta`` (V, p) and ``cov_beta`` (V, p, p)
        (:class:`~grouplevel.model.reml.MixedFit` or
        :class:`~grouplevel.model.mixed.MixedModelFit`).
    L : array_like, shape (q, p)
        The contrast rows tested jointly, linearly independent.
    df : array_like, shape (V,), or float
        Denominator degrees of freedom (the t contrasts' rule for the level tested).

    Returns
    -------
    FTestResult

    References
    ----------
    Kenward, M. G., & Roger, J. H. (1997). Biometrics 53:983–997.
    """
    L = as_contrast_matrix(L, fit.beta.shape[1])
    n_vox = fit.beta.shape[0]
    df = np.broadcast_to(np.asarray(df, dtype=np.float64), (n_vox,)).copy()
    f = wald_f(fit.beta, fit.cov_beta, L)
    bad = ~(df > 0)
    df[bad] = np.nan
    f = np.where(bad, np.nan, f)
    p = np.full(n_vox, np.nan)
    ok = ~np.isnan(f)
    p[ok] = f_sf(f[ok], L.shape[0], df[ok])
    return FTestResult(f=f, df_num=int(L.shape[0]), df=df, p=p, z=f_to_z(f, L.shape[0], df))


# The name begins with "test" because it tests a hypothesis; keep pytest from collecting
# it when a test module imports it.
test_f.__test__ = False  # type: ignore[attr-defined]
