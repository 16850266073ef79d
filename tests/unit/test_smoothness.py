"""Smoothness estimates on white noise smoothed by a Gaussian kernel of known FWHM.

Reference: white noise convolved with a Gaussian kernel of FWHM f has a Gaussian
autocorrelation whose smoothness is f (Worsley et al. 1996, Hum Brain Mapp 4:58); the
estimator standardises residuals as in Kiebel et al. (1999), NeuroImage 10:756.
Tolerance: estimated FWHM within 10% of the kernel's (scipy.ndimage.gaussian_filter,
sigma = FWHM / sqrt(8 ln 2)).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from grouplevel.errors import UserError
from grouplevel.inference import estimate_smoothness
from grouplevel.inference.smoothness import fwhm_from_correlation

FWHM_PER_SIGMA = np.sqrt(8 * np.log(2))  # Gaussian FWHM = sqrt(8 ln 2) sigma
N_MAPS = 30
SHAPE = (40, 40, 40)


def smoothed_residuals(fwhm_voxels, seed):
    """Residuals of a one-sample model (dof = N_MAPS - 1) of smoothed white noise."""
    rng = np.random.default_rng(seed)
    sigma = np.asarray(fwhm_voxels, dtype=float) / FWHM_PER_SIGMA
    maps = np.stack(
        [ndimage.gaussian_filter(rng.standard_normal(SHAPE), sigma) for _ in range(N_MAPS)]
    )
    # Unequal noise levels across voxels must not matter after standardisation.
    maps *= 1.0 + np.linspace(0.0, 2.0, SHAPE[0])[:, None, None]
    return maps - maps.mean(axis=0)


def ball_mask(radius):
    centre = (np.array(SHAPE) - 1) / 2
    grid = np.indices(SHAPE) - centre[:, None, None, None]
    return (grid**2).sum(axis=0) <= radius**2


@pytest.mark.parametrize("fwhm", [(2.0, 2.0, 2.0), (3.0, 3.0, 3.0), (2.0, 3.0, 4.0)])
def test_known_kernel_is_recovered_within_ten_percent(fwhm):
    # Reference: kernel FWHM of the smoothing (Worsley et al. 1996); 10% tolerance.
    residuals = smoothed_residuals(fwhm, seed=int(sum(fwhm) * 10))
    voxel = np.array([0.2, 0.25, 0.5])  # anisotropic voxels, mm
    whole = estimate_smoothness(residuals, np.ones(SHAPE, bool), voxel, dof=N_MAPS - 1)
    np.testing.assert_allclose(whole.fwhm_voxels, fwhm, rtol=0.10)
    np.testing.assert_allclose(whole.fwhm_mm, np.asarray(fwhm) * voxel, rtol=0.10)
    # With a ball-shaped mask: pairs across the mask edge are left out, same accuracy.
    mask = ball_mask(17)
    inside = estimate_smoothness(residuals, mask, voxel, dof=N_MAPS - 1)
    np.testing.assert_allclose(inside.fwhm_voxels, fwhm, rtol=0.10)
    # Resels: mask voxels over the product of FWHMs in voxels (Worsley et al. 1996).
    assert inside.n_voxels == mask.sum()
    np.testing.assert_allclose(inside.resels, mask.sum() / np.prod(inside.fwhm_voxels))
    # The (maps, in-mask voxels) form gives the same answer.
    flat = estimate_smoothness(residuals[:, mask], mask, voxel, dof=N_MAPS - 1)
    np.testing.assert_allclose(flat.fwhm_mm, inside.fwhm_mm, rtol=1e-12)


def test_few_maps_still_unbiased():
    # Reference: kernel FWHM 3 voxels (Worsley et al. 1996) from only 6 maps (dof 5), within
    # 5%. Without the small-sample correction of the mean correlation (Olkin & Pratt 1958,
    # Ann Math Stat 29:201) the estimate falls about 9% short here.
    rng = np.random.default_rng(21)
    sigma = 3.0 / FWHM_PER_SIGMA
    maps = np.stack([ndimage.gaussian_filter(rng.standard_normal(SHAPE), sigma) for _ in range(6)])
    residuals = maps - maps.mean(axis=0)
    result = estimate_smoothness(residuals, np.ones(SHAPE, bool), (1.0, 1.0, 1.0), dof=5)
    np.testing.assert_allclose(result.fwhm_voxels, 3.0, rtol=0.05)


def test_half_mm_kernel_on_0_3_mm_voxels_is_below_two_voxels():
    # Common practice: a 0.5 mm FWHM kernel on 0.3 mm voxels is below two voxels
    # (0.5 / 0.3 = 1.67); the estimate says so and is within 10% of 0.5 mm.
    fwhm_voxels = 0.5 / 0.3
    residuals = smoothed_residuals((fwhm_voxels,) * 3, seed=11)
    result = estimate_smoothness(residuals, ball_mask(18), (0.3, 0.3, 0.3), dof=N_MAPS - 1)
    assert np.all(result.fwhm_voxels < 2.0)
    np.testing.assert_allclose(result.fwhm_mm, 0.5, rtol=0.10)


def test_fwhm_from_correlation_inverts_the_gaussian():
    # Gaussian autocorrelation exp(-d^2 / (4 s^2)) with FWHM^2 = 8 ln2 s^2 (Worsley et al.
    # 1996): lag-1 correlation of a 3-voxel kernel is exp(-2 ln 2 / 9) = 0.8573.
    rho = np.exp(-2 * np.log(2) / 9.0)
    assert rho == pytest.approx(0.8573, abs=1e-4)
    np.testing.assert_allclose(fwhm_from_correlation(np.array([rho])), [3.0], rtol=1e-12)
    np.testing.assert_array_equal(
        fwhm_from_correlation(np.array([-0.1, 0.0, 1.0])), [0.0, 0.0, np.inf]
    )


def test_bad_input_gives_clear_errors():
    residuals = np.zeros((5, 4, 4, 4))
    mask = np.ones((4, 4, 4), bool)
    with pytest.raises(UserError, match="do not match"):
        estimate_smoothness(residuals, np.ones((4, 4, 5), bool), (1, 1, 1), 4)
    with pytest.raises(UserError, match="in-mask voxels"):
        estimate_smoothness(np.zeros((5, 10)), mask, (1, 1, 1), 4)
    with pytest.raises(UserError, match="voxel size"):
        estimate_smoothness(residuals, mask, (1, 0, 1), 4)
    with pytest.raises(UserError, match="degrees of freedom"):
        estimate_smoothness(residuals, mask, (1, 1, 1), 6)
    thin = np.zeros((4, 4, 4), bool)
    thin[:, :, 1] = True
    rng = np.random.default_rng(0)
    with pytest.raises(UserError, match="axis 2"):
        estimate_smoothness(rng.standard_normal((5, 4, 4, 4)), thin, (1, 1, 1), 4)
