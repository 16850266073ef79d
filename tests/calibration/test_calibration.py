"""Family-wise error calibration of the permutation inference on null studies.

Null studies (no effect anywhere) of 8 animals × 3 runs with first-level variances and
smooth noise (FWHM 2 voxels) are tested with all 2^8 = 256 sign flips, two-sided. Under
the null hypothesis a sign-flipping test of the maximum statistic controls the family-wise
error rate exactly (Nichols TE, Holmes AP, 2002, Hum Brain Mapp 15:1-25; Winkler AM et al.
2014, NeuroImage 92:381-397): the share of studies with at least one significant voxel,
cluster or TFCE score at α = 0.05 must lie within the 95% binomial (Clopper–Pearson)
interval around it (scipy.stats.binomtest).

With 256 exhaustive two-sided flips the identity and the all-flipped map give the same
maxima, so the attainable p-values are multiples of 2/256 and the exact rate of
``p ≤ 0.05`` is 6/128 = 0.0469 for a continuous statistic; cluster extents are integers
whose ties make that test a little conservative.

For speed the studies are small (10 × 10 × 6 voxels, about 75 resels) and all of them
are fitted in one call of ``fit_reml``, as columns (voxels) of one runs × voxels array;
each study is then tested on its own with ``permutation_test``. Both choices leave the
calibration check unchanged:

- ``fit_reml`` fits every voxel on its own (the estimates at one voxel depend on that
  voxel's column only), so the fit of study k read from the joint fit is the fit of study
  k alone; the test asserts this for the first study;
- the exactness of the sign-flipping test (its FWE rate) does not depend on the number
  of voxels or resels; every study still gives one independent null test per method,
  N_STUDIES in all, and the binomial interval check is the same.

Measured (N_STUDIES = 120, seed 2026, this design): studies with a false positive: voxel
5/120 (4.2 %), cluster extent 7/120 (5.8 %), cluster mass 7/120 (5.8 %), TFCE 5/120
(4.2 %); about 18 s of wall time in all on an idle 2-core machine (300 studies gave
10, 13, 19 and 15 of 300 and took 2.5 times as long). The exact (Clopper–Pearson) 95%
interval at 120 studies contains 0.05 for 2 to 11 false-positive studies.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage, stats

from grouplevel.inference.permutation import animal_level_data, permutation_test
from grouplevel.model import between_animal_df, fit_reml

ALPHA = 0.05
N_STUDIES = 120
N_ANIMALS = 8
RUNS_PER_ANIMAL = 3
GRID = (10, 10, 6)
N_VOXELS = int(np.prod(GRID))
# FWHM = σ · sqrt(8 ln 2) for a Gaussian kernel (textbook identity)
FWHM_VOXELS = 2.0
SIGMA_VOXELS = FWHM_VOXELS / np.sqrt(8.0 * np.log(2.0))
CLUSTER_FORMING_P = 0.01
TAU2, SIGMA2 = 0.5, 0.3


def _unit_smooth(rng: np.random.Generator, n: int) -> np.ndarray:
    """n smooth Gaussian fields with unit voxelwise variance (periodic boundary), each
    flattened to N_VOXELS values."""
    white = rng.standard_normal((n, *GRID))
    smooth = ndimage.gaussian_filter(white, sigma=(0, *[SIGMA_VOXELS] * 3), mode="wrap")
    delta = np.zeros(GRID)
    delta[0, 0, 0] = 1.0
    kernel = ndimage.gaussian_filter(delta, sigma=SIGMA_VOXELS, mode="wrap")
    return (smooth / np.sqrt((kernel**2).sum())).reshape(n, N_VOXELS)


def _null_studies(rng: np.random.Generator, n_studies: int):
    """n_studies independent null studies side by side: runs × (studies · voxels) arrays,
    study k in columns k · N_VOXELS to (k + 1) · N_VOXELS - 1."""
    animal = np.repeat(np.arange(N_ANIMALS), RUNS_PER_ANIMAL)
    n = animal.size
    u = np.sqrt(TAU2) * _unit_smooth(rng, n_studies * N_ANIMALS)
    u = u.reshape(n_studies, N_ANIMALS, N_VOXELS)
    s2 = rng.uniform(0.1, 0.4, (n_studies, n, 1)) * np.ones(N_VOXELS)
    e = np.sqrt(SIGMA2 + s2) * _unit_smooth(rng, n_studies * n).reshape(n_studies, n, -1)
    y = u[:, animal] + e  # (studies, runs, voxels)

    def side_by_side(a: np.ndarray) -> np.ndarray:
        return np.ascontiguousarray(a.transpose(1, 0, 2).reshape(n, n_studies * N_VOXELS))

    return side_by_side(y), side_by_side(s2), np.ones((n, 1)), animal


def _false_positives(y, s2, X, animal, var_run, var_animal, rng) -> np.ndarray:
    """Whether each method (voxel, extent, mass, TFCE) finds anything in one null study."""
    df = between_animal_df(X, animal, np.isfinite(y), [1.0])
    data = animal_level_data(y, s2, X, animal, var_run, var_animal)
    res = permutation_test(
        data,
        np.array([1.0]),
        df,
        np.ones(GRID, dtype=bool),
        n_permutations=2**N_ANIMALS,
        rng=rng,
        cluster_forming_p=CLUSTER_FORMING_P,
    )
    assert res.scheme.exhaustive and res.scheme.n == 2**N_ANIMALS
    return np.array(
        [
            (res.p_fwe_voxel <= ALPHA).any(),
            (res.p_fwe_cluster_extent <= ALPHA).any(),
            (res.p_fwe_cluster_mass <= ALPHA).any(),
            (res.p_fwe_tfce <= ALPHA).any(),
        ]
    )


@pytest.mark.slow
def test_family_wise_error_rate_is_calibrated():
    rng = np.random.default_rng(2026)
    y, s2, X, animal = _null_studies(rng, N_STUDIES)
    fit = fit_reml(y, s2, X, animal)
    # the joint fit holds each study's own fit (voxels are fitted independently)
    first = slice(0, N_VOXELS)
    alone = fit_reml(y[:, first], s2[:, first], X, animal)
    np.testing.assert_allclose(fit.var_animal[first], alone.var_animal, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(fit.var_run[first], alone.var_run, rtol=1e-10, atol=1e-12)
    hits = np.array(
        [
            _false_positives(
                y[:, cols],
                s2[:, cols],
                X,
                animal,
                fit.var_run[cols],
                fit.var_animal[cols],
                rng,
            )
            for cols in (slice(k * N_VOXELS, (k + 1) * N_VOXELS) for k in range(N_STUDIES))
        ]
    )
    counts = hits.sum(axis=0)
    for method, k in zip(("voxel", "cluster extent", "cluster mass", "TFCE"), counts, strict=True):
        # the Clopper–Pearson 95% interval of the observed rate must contain α
        ci = stats.binomtest(int(k), N_STUDIES, ALPHA).proportion_ci(0.95, method="exact")
        assert ci.low <= ALPHA <= ci.high, (method, int(k), N_STUDIES)
