"""False-positive rates of the F-test of a three-dose design on null data.

Design: 12 animals, 4 per dose (none, low, high), 3 runs each with first-level
variances; no effect anywhere. The F-test of both dose differences at once
(``dose-any-difference``) is tested

- parametrically: the Wald F on (2, animals − 3) at every voxel of one fit of 4000
  independent null voxels; the share with p ≤ α must lie within the 95% binomial
  (Clopper–Pearson) interval around α (scipy.stats.binomtest);
- by permutation: 100 independent null studies of 16 voxels each, every one tested with
  99 random whole-animal permutations (Freedman–Lane with the intercept as nuisance);
  the share of studies with any voxel at FWE p ≤ α must lie within the same kind of
  interval. A permutation test of exchangeable units controls the family-wise error
  rate exactly (Nichols TE, Holmes AP, 2002, Hum Brain Mapp 15:1-25; Winkler AM et al.
  2014, NeuroImage 92:381-397).

Measured (these seeds): parametric 198/4000 null voxels with p ≤ 0.05 (4.95 %); FWE
5/100 null studies with a false positive; about 12 s in all on the shared 2-core machine.

All studies are fitted in one call of ``fit_reml`` (voxels are fitted independently,
see tests/calibration/test_calibration.py), then tested one by one.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from grouplevel.inference.permutation import animal_level_data, permutation_test
from grouplevel.model import between_animal_df, fit_reml
from grouplevel.model.ftest import test_f

ALPHA = 0.05
PER_DOSE, RUNS = 4, 3
N_PARAMETRIC = 4000
N_STUDIES, STUDY_SHAPE = 100, (4, 4, 1)
STUDY_VOXELS = int(np.prod(STUDY_SHAPE))
N_PERMUTATIONS = 99
TAU2, SIGMA2 = 0.5, 0.3
L_DOSE = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])


def _null(rng: np.random.Generator, n_vox: int):
    m = 3 * PER_DOSE
    dose = np.repeat(np.arange(3), PER_DOSE)
    animal = np.repeat(np.arange(m), RUNS)
    X = np.column_stack([np.ones(m), dose == 1, dose == 2]).astype(float)[animal]
    s2 = rng.uniform(0.05, 0.3, (animal.size, n_vox))
    y = (
        rng.normal(0.0, np.sqrt(TAU2), (m, n_vox))[animal]
        + rng.normal(0.0, np.sqrt(SIGMA2), (animal.size, n_vox))
        + rng.normal(0.0, 1.0, (animal.size, n_vox)) * np.sqrt(s2)
    )
    return y, s2, X, animal


def _inside(count: int, n: int) -> bool:
    ci = stats.binomtest(count, n, ALPHA).proportion_ci(0.95)
    return ci.low <= ALPHA <= ci.high


def test_parametric_f_false_positive_rate():
    y, s2, X, animal = _null(np.random.default_rng(2026), N_PARAMETRIC)
    fit = fit_reml(y, s2, X, animal)
    df = between_animal_df(X, animal, np.ones_like(y, bool), L_DOSE.sum(axis=0))
    res = test_f(fit, L_DOSE, df)
    assert np.all(res.df == 3 * PER_DOSE - 3)
    count = int((res.p <= ALPHA).sum())
    assert _inside(count, N_PARAMETRIC), f"{count}/{N_PARAMETRIC} false positives"


def test_permutation_f_fwe_false_positive_rate():
    y, s2, X, animal = _null(np.random.default_rng(7), N_STUDIES * STUDY_VOXELS)
    fit = fit_reml(y, s2, X, animal)
    mask = np.ones(STUDY_SHAPE, dtype=bool)
    df = np.full(STUDY_VOXELS, 3.0 * PER_DOSE - 3)
    hits = 0
    rng = np.random.default_rng(11)
    for k in range(N_STUDIES):
        sl = slice(k * STUDY_VOXELS, (k + 1) * STUDY_VOXELS)
        data = animal_level_data(
            y[:, sl], s2[:, sl], X, animal, fit.var_run[sl], fit.var_animal[sl]
        )
        res = permutation_test(
            data,
            L_DOSE,
            df,
            mask,
            n_permutations=N_PERMUTATIONS + 1,
            rng=rng,
            sided="positive",
            use_tfce=False,
            threads=1,
            f_test=True,
        )
        hits += bool((res.p_fwe_voxel <= ALPHA).any())
    assert _inside(hits, N_STUDIES), f"{hits}/{N_STUDIES} studies with a false positive"
