"""False-positive rates of the F-test of a within-animal factor with three levels.

Design: 8 animals, each with 2 runs of each of three stimuli (a, b, c) and first-level
variances; every animal has its own b − a and c − a responses, correlated between the two
(between-animal covariance T below), around a group mean of zero: no effect anywhere.
The F-test of both differences at once (``stim-any-difference``) is tested

- by permutation: 100 independent null studies of 16 voxels each, every one tested with
  all 2⁸ = 256 flips of each animal's vector of its two own effects; the share of studies
  with any voxel at FWE p ≤ α must lie within the 95 % binomial (Clopper–Pearson)
  interval around α (scipy.stats.binomtest). A sign-flip test of independent units
  symmetric about zero controls the family-wise error rate exactly (Nichols TE, Holmes
  AP, 2002, Hum Brain Mapp 15:1-25; Winkler AM et al. 2014, NeuroImage 92:381-397).
- parametrically: the Wald F of the random-slopes REML fit on (2, animals − 1) at every
  one of the same 1600 independent null voxels. It is conservative in this design
  (measured 60/1600 = 3.75 % here; 96/3200 = 3.0 % with twice the voxels), so the check is
  that it does not exceed α: α must not lie below the interval of its rate. The rate of
  Hotelling's exact T² test of the animals' own differences (Hotelling 1931, Ann Math
  Stat 2:360) on the same voxels must lie inside the interval (measured 84/1600 =
  5.25 %), which shows that the shortfall is the Wald F's, not the simulation's.

Measured (these seeds): 7/100 null studies with an FWE false positive by permutation
(8/200 with twice the studies); about 8 s in all on the shared 2-core machine.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from grouplevel.inference.vector_flips import animal_effect_vectors, vector_flip_test
from grouplevel.model.ftest import test_f
from grouplevel.model.mixed import fit_mixed

ALPHA = 0.05
M_ANIMALS, RUNS_PER_STIMULUS = 8, 2
N_STUDIES, STUDY_SHAPE = 100, (4, 4, 1)
STUDY_VOXELS = int(np.prod(STUDY_SHAPE))
N_VOXELS = N_STUDIES * STUDY_VOXELS
TAU2, SIGMA2 = 0.5, 0.2
# between-animal covariance of the two own effects (b − a, c − a): they differ between
# animals and are correlated (an animal that responds strongly to b also does to c)
T_SLOPES = np.array([[0.4, 0.15], [0.15, 0.3]])
L_STIM = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])


def _null(rng: np.random.Generator):
    per = 3 * RUNS_PER_STIMULUS
    animal = np.repeat(np.arange(M_ANIMALS), per)
    stim = np.tile(np.arange(3), M_ANIMALS * RUNS_PER_STIMULUS)
    own = np.column_stack([stim == 1, stim == 2]).astype(float)
    X = np.column_stack([np.ones(animal.size), own])
    slopes = rng.multivariate_normal(np.zeros(2), T_SLOPES, size=(M_ANIMALS, N_VOXELS))
    s2 = rng.uniform(0.05, 0.3, (animal.size, N_VOXELS))
    y = (
        rng.normal(0.0, np.sqrt(TAU2), (M_ANIMALS, N_VOXELS))[animal]
        + np.einsum("rk,rvk->rv", own, slopes[animal])
        + rng.normal(0.0, np.sqrt(SIGMA2), (animal.size, N_VOXELS))
        + rng.normal(0.0, 1.0, (animal.size, N_VOXELS)) * np.sqrt(s2)
    )
    return y, s2, X, own, animal


def _interval(count: int, n: int):
    return stats.binomtest(count, n, ALPHA).proportion_ci(0.95)


def _inside(count: int, n: int) -> bool:
    ci = _interval(count, n)
    return ci.low <= ALPHA <= ci.high


def test_within_animal_f_false_positive_rates():
    y, s2, X, own, animal = _null(np.random.default_rng(2027))
    fit = fit_mixed(y, s2, X, animal, slopes=own, slope_names=("b", "c"))
    # parametric: Wald F on (2, animals − 1), the slope df
    res = test_f(fit, L_STIM, float(M_ANIMALS - 1))
    count = int((res.p <= ALPHA).sum())
    assert _interval(count, N_VOXELS).low <= ALPHA, f"parametric: {count}/{N_VOXELS}"
    # permutation: whole-vector flips, one study of 16 voxels at a time
    targets = np.column_stack([[0.0, 0.0], np.eye(2)])  # b − a and c − a on [1, b, c]
    data = animal_effect_vectors(y, s2, own, targets, animal, fit.var_run)
    # the simulation itself: Hotelling's exact test of the animals' own differences
    d = data.effect
    mean = d.mean(axis=1)
    centred = d - mean[:, None]
    cov = np.einsum("vai,vaj->vij", centred, centred) / (M_ANIMALS - 1)
    t2 = M_ANIMALS * np.einsum("vi,vi->v", mean, np.linalg.solve(cov, mean[..., None])[..., 0])
    f_exact = t2 * (M_ANIMALS - 2) / (2 * (M_ANIMALS - 1))
    exact = int((stats.f.sf(f_exact, 2, M_ANIMALS - 2) <= ALPHA).sum())
    assert _inside(exact, N_VOXELS), f"Hotelling: {exact}/{N_VOXELS}"
    mask = np.ones(STUDY_SHAPE, dtype=bool)
    df = np.full(STUDY_VOXELS, M_ANIMALS - 1.0)
    hits = 0
    rng = np.random.default_rng(11)
    for k in range(N_STUDIES):
        sl = slice(k * STUDY_VOXELS, (k + 1) * STUDY_VOXELS)
        study = type(data)(data.effect[sl], data.covariance[sl], data.valid[sl])
        perm = vector_flip_test(
            study, df, mask, n_permutations=256, rng=rng, use_tfce=False, threads=1
        )
        assert perm.scheme.exhaustive
        hits += bool((perm.p_fwe_voxel <= ALPHA).any())
    assert _inside(hits, N_STUDIES), f"permutation: {hits}/{N_STUDIES} studies with an FWE hit"
