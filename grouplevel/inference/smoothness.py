"""Spatial smoothness of a statistic map, estimated from the model residuals.

Random-field results and resel counts need the smoothness of the noise, expressed as the
full width at half maximum (FWHM) of the Gaussian kernel that would turn white noise into
a field with the same spatial autocorrelation. It is estimated from the residual maps of
the group model:

1. Each voxel's residuals are standardised (divided by their root sum of squares), so
   that every voxel contributes with unit variance whatever its noise level (Kiebel et
   al. 1999).
2. Along each array axis, the correlation between neighbouring voxels is averaged over
   all pairs of neighbours that both lie in the mask (pairs that straddle the mask edge
   are left out, so the edge does not bias the estimate).
3. The average is corrected for its small-sample bias (Olkin & Pratt 1958) and turned
   into a FWHM under the Gaussian-autocorrelation assumption: white noise smoothed by a
   Gaussian kernel of FWHM ``f`` voxels has the lag-1 correlation
   ``rho = exp(-2 ln2 / f^2)`` (see :func:`fwhm_from_correlation`).

Working with the lag-1 correlation rather than the squared finite difference read as a
derivative avoids the overestimate the derivative approximation gives for fields only a
couple of voxels smooth; both describe the same Gaussian autocorrelation.

References
----------
Kiebel SJ, Poline JB, Friston KJ, Holmes AP, Worsley KJ (1999). Robust smoothness
estimation in statistical parametric maps using standardized residuals from the general
linear model. NeuroImage 10:756-766.

Worsley KJ, Marrett S, Neelin P, Vandal AC, Friston KJ, Evans AC (1996). A unified
statistical approach for determining significant signals in images of cerebral
activation. Hum Brain Mapp 4:58-73.

Olkin I, Pratt JW (1958). Unbiased estimation of certain correlation coefficients. Ann
Math Stat 29:201-211.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from grouplevel.errors import ArgumentError

#: ln 2, which links a Gaussian's FWHM to its standard deviation: FWHM² = 8 ln2 σ².
LN2 = float(np.log(2.0))


@dataclass(frozen=True)
class Smoothness:
    """Estimated smoothness of the residual field.

    Attributes
    ----------
    fwhm_mm
        ``(3,)`` FWHM in mm along each array axis.
    fwhm_voxels
        ``(3,)`` FWHM in voxels along each array axis (0 along an axis with no
        positive neighbour correlation).
    resels
        Resolution elements in the mask: voxels / product of the FWHMs in voxels
        (Worsley et al. 1996); ``None`` when a FWHM is 0.
    lag1_correlation
        ``(3,)`` bias-corrected mean correlation of neighbouring voxels per axis.
    n_voxels
        In-mask voxels with non-zero residuals that entered the estimate.
    """

    fwhm_mm: np.ndarray
    fwhm_voxels: np.ndarray
    resels: float | None
    lag1_correlation: np.ndarray
    n_voxels: int


def fwhm_from_correlation(rho: np.ndarray) -> np.ndarray:
    """FWHM (in units of the lag) of a Gaussian autocorrelation with lag-1 value ``rho``.

    White noise smoothed by a Gaussian kernel of standard deviation ``s`` has the
    autocorrelation ``exp(-d² / (4 s²))``; with ``FWHM² = 8 ln2 s²`` the lag-1
    correlation is ``rho = exp(-2 ln2 / FWHM²)``, so ``FWHM = sqrt(-2 ln2 / ln rho)``.
    Returns 0 for ``rho <= 0`` and ``inf`` for ``rho >= 1``.

    References
    ----------
    Worsley KJ et al. (1996). Hum Brain Mapp 4:58-73.
    """
    rho = np.asarray(rho, dtype=np.float64)
    out = np.zeros(rho.shape)
    ok = (rho > 0.0) & (rho < 1.0)
    out[ok] = np.sqrt(-2.0 * LN2 / np.log(rho[ok]))
    out[rho >= 1.0] = np.inf
    return out


def estimate_smoothness(
    residuals: np.ndarray,
    mask: np.ndarray,
    voxel_size_mm: np.ndarray,
    dof: float,
) -> Smoothness:
    """Estimate the FWHM of the residual field along each axis.

    Parameters
    ----------
    residuals
        ``(n_maps, X, Y, Z)`` residual maps, or ``(n_maps, n_mask_voxels)`` holding the
        in-mask voxels in C order of ``mask``.
    mask
        ``(X, Y, Z)`` boolean analysis mask.
    voxel_size_mm
        ``(3,)`` voxel edge lengths in mm along the array axes.
    dof
        Residual degrees of freedom (maps minus the rank of the design), > 1.

    Returns
    -------
    Smoothness
        FWHM per axis in mm and voxels, and the resel count.

    Raises
    ------
    ArgumentError
        For shapes that do not match, non-positive voxel sizes, ``dof`` out of range, or
        an axis along which no two neighbouring voxels lie in the mask.

    Notes
    -----
    With ``u_j(x) = e_j(x) / ||e(x)||`` the standardised residuals, the lag-1
    correlation along axis d is ``r_d = mean over pairs (x, x + e_d) in the mask of
    sum_j u_j(x) u_j(x + e_d)``; this is ``1 - (1/2) sum_j (u_j(x + e_d) - u_j(x))²``,
    the finite-difference form of Kiebel et al. (1999). The mean is corrected to
    ``r (1 + (1 - r²) / (2 dof))`` (Olkin & Pratt 1958, first-order term) and converted
    by :func:`fwhm_from_correlation`.

    References
    ----------
    Kiebel SJ, Poline JB, Friston KJ, Holmes AP, Worsley KJ (1999). NeuroImage 10:756-766.

    Worsley KJ et al. (1996). Hum Brain Mapp 4:58-73.

    Olkin I, Pratt JW (1958). Ann Math Stat 29:201-211.
    """
    name = "estimate_smoothness"
    mask = np.asarray(mask)
    if mask.ndim != 3:
        raise ArgumentError(f"{name}: the mask must be a 3-D grid; got shape {mask.shape}.")
    mask = mask.astype(bool)
    residuals = np.asarray(residuals, dtype=np.float64)
    if residuals.ndim == 2:
        if residuals.shape[1] != int(mask.sum()):
            raise ArgumentError(
                f"{name}: residuals have {residuals.shape[1]} voxels per map but the mask "
                f"has {int(mask.sum())}; pass (maps, in-mask voxels) for this mask or "
                "(maps, X, Y, Z) maps."
            )
        grid = np.zeros((residuals.shape[0],) + mask.shape)
        grid[:, mask] = residuals
        residuals = grid
    elif residuals.ndim != 4 or residuals.shape[1:] != mask.shape:
        raise ArgumentError(
            f"{name}: residuals of shape {residuals.shape} do not match the mask "
            f"{mask.shape}; pass (maps, X, Y, Z) or (maps, in-mask voxels)."
        )
    voxel_size = np.asarray(voxel_size_mm, dtype=np.float64).reshape(-1)
    if voxel_size.shape != (3,) or not np.all(np.isfinite(voxel_size) & (voxel_size > 0)):
        raise ArgumentError(
            f"{name}: voxel size must be three positive lengths in mm; got {voxel_size_mm}."
        )
    n_maps = residuals.shape[0]
    dof = float(dof)
    if not (1.0 < dof <= n_maps):
        raise ArgumentError(
            f"{name}: residual degrees of freedom {dof} must be > 1 and at most the "
            f"number of maps ({n_maps})."
        )

    finite = np.all(np.isfinite(residuals), axis=0)
    if not finite.all():
        residuals = np.where(finite, residuals, 0.0)
    norm = np.sqrt(np.einsum("i...,i...->...", residuals, residuals))
    valid = mask & finite & (norm > 0.0)
    standardised = np.zeros_like(residuals)
    np.divide(residuals, norm, out=standardised, where=valid[np.newaxis])

    rho = np.empty(3)
    for axis in range(3):
        lo = [slice(None)] * 3
        hi = [slice(None)] * 3
        lo[axis] = slice(None, -1)
        hi[axis] = slice(1, None)
        lo_t, hi_t = tuple(lo), tuple(hi)
        pairs = valid[lo_t] & valid[hi_t]
        n_pairs = int(pairs.sum())
        if n_pairs == 0:
            raise ArgumentError(
                f"{name}: no two neighbouring in-mask voxels along array axis {axis}; "
                "the mask is too thin to estimate smoothness along it."
            )
        products = np.einsum(
            "i...,i...->...",
            standardised[(slice(None),) + lo_t],
            standardised[(slice(None),) + hi_t],
        )
        r = float(products[pairs].mean())
        rho[axis] = r * (1.0 + (1.0 - r * r) / (2.0 * dof))

    fwhm_voxels = fwhm_from_correlation(rho)
    fwhm_mm = fwhm_voxels * voxel_size
    n_voxels = int(valid.sum())
    positive = np.all(fwhm_voxels > 0) and np.all(np.isfinite(fwhm_voxels))
    resels = float(n_voxels / np.prod(fwhm_voxels)) if positive else None
    return Smoothness(
        fwhm_mm=fwhm_mm,
        fwhm_voxels=fwhm_voxels,
        resels=resels,
        lag1_correlation=rho,
        n_voxels=n_voxels,
    )
