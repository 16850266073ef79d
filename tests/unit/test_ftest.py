"""F-tests of several contrasts (grouplevel.model.ftest) and their permutation version.

Sources:
- statsmodels OLS ``f_test`` (statsmodels.regression.linear_model) on per-animal values
  with one run per animal (the random-intercept model is then ordinary least squares);
- statsmodels MixedLM (REML) and its ``f_test`` for runs nested in animals;
- scipy.stats ``f_oneway`` (one-way analysis of variance) on animal values;
- the identity F = t² for one row (common practice);
- exhaustive permutation of a 2 + 2 + 2 three-group design against scipy ``f_oneway`` on
  every one of the 6!/(2!2!2!) = 90 distinct relabellings (textbook combinatorics,
  Feller 1968, vol. 1, ch. II);
- Welch BL (1951), Biometrika 38:330 / Winkler et al. (2014), NeuroImage 92:381: the G
  statistic reduces to the ordinary F with one variance group, and to the square of the
  rank-one G (Aspin–Welch v) with one row (formula from memory).
"""

from __future__ import annotations

import itertools
import math
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from grouplevel.errors import ArgumentError
from grouplevel.inference.permutation import (
    animal_level_data,
    g_statistic,
    g_statistic_rank,
    partition_design,
    permutation_test,
    plan_permutations,
)
from grouplevel.model import between_animal_df, fit_reml, test_contrast
from grouplevel.model.ftest import as_contrast_matrix, f_to_z, test_f

# treatment coding of three doses: intercept (dose 0), dose 1 minus 0, dose 2 minus 0
L_DOSE = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])


def _three_groups(per_group: int, n_vox: int, rng, runs: int = 1, shift=(0.0, 0.0, 0.0)):
    m = 3 * per_group
    group = np.repeat(np.arange(3), per_group)
    animal = np.repeat(np.arange(m), runs)
    Xa = np.column_stack([np.ones(m), group == 1, group == 2]).astype(float)
    u = rng.normal(0.0, 1.0, (m, n_vox)) + np.asarray(shift)[group][:, None]
    y = u[animal] + rng.normal(0.0, 0.7, (animal.size, n_vox))
    return group, animal, Xa, Xa[animal], y


def test_f_equals_statsmodels_ols_and_f_oneway_with_one_run_per_animal():
    # one run per animal, no first-level variances: the REML fit is OLS on the animals,
    # so F must equal statsmodels OLS f_test and scipy f_oneway (rtol 1e-6)
    rng = np.random.default_rng(3)
    group, animal, Xa, X, y = _three_groups(5, 6, rng, shift=(0.0, 0.8, -0.4))
    fit = fit_reml(y, None, X, animal)
    df = between_animal_df(X, animal, np.ones_like(y, bool), L_DOSE.sum(axis=0))
    res = test_f(fit, L_DOSE, df)
    assert res.df_num == 2
    np.testing.assert_allclose(res.df, 15 - 3)
    for v in range(y.shape[1]):
        ols = sm.OLS(y[:, v], Xa).fit().f_test(L_DOSE)
        np.testing.assert_allclose(res.f[v], float(np.squeeze(ols.fvalue)), rtol=1e-6)
        np.testing.assert_allclose(res.p[v], float(ols.pvalue), rtol=1e-5)
        oneway = stats.f_oneway(*(y[group == g, v] for g in range(3)))
        np.testing.assert_allclose(res.f[v], oneway.statistic, rtol=1e-6)
    # z has the same upper-tail p (common practice for F maps)
    np.testing.assert_allclose(stats.norm.sf(res.z), res.p, rtol=1e-8)


def test_one_row_f_is_t_squared():
    rng = np.random.default_rng(4)
    group, animal, Xa, X, y = _three_groups(4, 5, rng, runs=3)
    fit = fit_reml(y, None, X, animal)
    c = np.array([0.0, 1.0, -1.0])
    df = between_animal_df(X, animal, np.ones_like(y, bool), c)
    t = test_contrast(fit, c, df)
    f = test_f(fit, c[None, :], df)
    np.testing.assert_allclose(f.f, t.t**2, rtol=1e-10)
    np.testing.assert_allclose(f.p, t.p, rtol=1e-8)  # F(1, d) upper tail = two-sided t


def test_f_equals_statsmodels_mixedlm_f_test():
    # three runs per animal, random intercept; statsmodels MixedLM (REML) f_test uses
    # the same model-based covariance of the fixed effects (rtol 2e-3: optimiser tolerance)
    rng = np.random.default_rng(5)
    group, animal, Xa, X, y = _three_groups(5, 2, rng, runs=3, shift=(0.0, 0.6, 0.2))
    fit = fit_reml(y, None, X, animal)
    res = test_f(fit, L_DOSE, 12.0)
    for v in range(y.shape[1]):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mlm = sm.MixedLM(y[:, v], X, groups=animal).fit(reml=True)
        L = np.column_stack([L_DOSE, np.zeros(2)])  # the variance parameter last
        ref = mlm.f_test(L)
        np.testing.assert_allclose(res.f[v], float(np.squeeze(ref.fvalue)), rtol=2e-3)


def test_dependent_rows_are_refused():
    with pytest.raises(ArgumentError, match="linearly dependent"):
        as_contrast_matrix([[0, 1, 0], [0, 2, 0]], 3)
    with pytest.raises(ArgumentError, match="3 weights"):
        as_contrast_matrix([[0, 1]], 3)


def test_f_to_z_extreme_values_stay_finite():
    z = f_to_z(np.array([1e6, 0.0, np.nan]), 2, np.array([10.0, 10.0, 10.0]))
    assert np.isfinite(z[0]) and z[0] > 8
    # F = 0 has upper-tail p = 1: z = −∞ is not useful; it is very negative and finite?
    assert z[1] < -5 or np.isneginf(z[1])
    assert np.isnan(z[2])
    # chi-square limit with infinite df: q·F ~ χ²_q (value from scipy.stats.chi2)
    np.testing.assert_allclose(
        stats.norm.sf(f_to_z(np.array([3.0]), 2, np.inf)), stats.chi2.sf(6.0, 2), rtol=1e-10
    )


def test_g_rank_reduces_to_ordinary_f_and_to_g_squared():
    rng = np.random.default_rng(6)
    m = 12
    group = np.repeat(np.arange(3), 4)
    X = np.column_stack([np.ones(m), group == 1, group == 2]).astype(float)
    Y = rng.normal(size=(4, m))
    one = np.zeros(m, dtype=np.int64)
    g_one = g_statistic_rank(Y, X, L_DOSE, one)
    for v in range(4):
        ols = sm.OLS(Y[v], X).fit().f_test(L_DOSE)
        np.testing.assert_allclose(g_one[v], float(np.squeeze(ols.fvalue)), rtol=1e-8)
    c = np.array([0.0, 1.0, -1.0])
    np.testing.assert_allclose(
        g_statistic_rank(Y, X, c[None], group), g_statistic(Y, X, c, group) ** 2, rtol=1e-8
    )


def _dose_animals(y_animals: np.ndarray, Xa: np.ndarray):
    """One run per animal: the animal-level data of an unpermuted fit."""
    animal = np.arange(Xa.shape[0])
    fit = fit_reml(y_animals, None, Xa, animal)
    return animal_level_data(y_animals, None, Xa, animal, fit.var_run, fit.var_animal)


def test_exhaustive_permutation_matches_brute_force_f_oneway():
    # 2 + 2 + 2 animals: 90 distinct relabellings, 3! of which give F back (the group
    # labels swapped), so the smallest attainable p is 6/90
    rng = np.random.default_rng(7)
    group = np.repeat(np.arange(3), 2)
    Xa = np.column_stack([np.ones(6), group == 1, group == 2]).astype(float)
    y = rng.normal(size=(6, 4)) + np.array([0.0, 0.0, 2.5])[group][:, None] * [1, 0, 0, 0]
    data = _dose_animals(y, Xa)
    mask = np.ones((2, 2, 1), dtype=bool)
    res = permutation_test(
        data,
        L_DOSE,
        np.full(4, 3.0),
        mask,
        n_permutations=1000,
        rng=np.random.default_rng(0),
        sided="positive",
        use_tfce=False,
        threads=1,
        f_test=True,
    )
    assert res.scheme.exhaustive and res.scheme.n == 90
    assert res.scheme.n_equivalent == 6
    assert res.scheme.smallest_p == pytest.approx(6 / 90)
    # brute force: scipy f_oneway over every distinct assignment of the labels
    labels = set(itertools.permutations(group.tolist()))
    assert len(labels) == math.factorial(6) // 8
    f_all = np.array(
        [
            [
                stats.f_oneway(*(y[np.array(lab) == g, v] for g in range(3))).statistic
                for v in range(4)
            ]
            for lab in sorted(labels)
        ]
    )
    f_obs = np.array(
        [stats.f_oneway(*(y[group == g, v] for g in range(3))).statistic for v in range(4)]
    )
    max_null = f_all.max(axis=1)
    expected = np.array([(max_null >= f * (1 - 1e-9)).mean() for f in f_obs])
    np.testing.assert_allclose(res.p_fwe_voxel, expected, atol=1e-12)
    assert res.p_fwe_voxel.min() >= 6 / 90 - 1e-12


def test_f_mean_rows_use_sign_flips_and_count_symmetries():
    # rows on the group means themselves (are any of the three means non-zero?): a
    # common shift moves them, so whole animals are sign-flipped. Flipping both animals
    # of one group flips that group's mean and leaves its residuals' squares alone, so
    # each of the 2^3 whole-group flips gives F back: the smallest p of the 2^6 flips is
    # 8/64 (counted by hand)
    group = np.repeat(np.arange(3), 2)
    Xa = np.column_stack([np.ones(6), group == 1, group == 2]).astype(float)
    L = np.array([[1.0, 0, 0], [1, 1, 0], [1, 0, 1]])
    x_i, Z = partition_design(Xa, L)
    scheme = plan_permutations(x_i, Z, 1000, np.random.default_rng(0), "positive", True)
    assert scheme.kind == "sign flips" and scheme.n == 64
    assert scheme.n_equivalent == 8
    assert scheme.smallest_p == pytest.approx(8 / 64)


def test_default_ftests_one_per_factor_with_more_than_two_levels():
    # treatment coding (formulaic, common practice): the rows are the differences from
    # the reference, one coefficient each
    import pandas as pd

    from grouplevel.intake.design import build_design

    runs = pd.DataFrame(
        {
            "animal": [f"a{i}" for i in range(12)],
            "dose": ["none", "low", "high"] * 4,
            "sex": ["f", "m"] * 6,
        }
    )
    d = build_design(runs, "1 + dose + sex", reference={"dose": "none"})
    (ft,) = d.default_ftests  # sex has two levels: its t contrast is the test
    assert ft.name == "dose-any-difference"
    assert ft.rows == ("dose-high-minus-none", "dose-low-minus-none")
    expected = np.zeros((2, len(d.columns)))
    expected[0, d.columns.index("dose[T.high]")] = 1.0
    expected[1, d.columns.index("dose[T.low]")] = 1.0
    np.testing.assert_allclose(ft.weights, expected, atol=1e-12)
    assert build_design(runs, "1 + sex").default_ftests == ()


def test_f_does_not_depend_on_the_reference_level():
    # "any difference between the levels" is one hypothesis whatever level is the
    # reference (common practice: the F of a factor is invariant to its coding)
    rng = np.random.default_rng(8)
    group, animal, Xa, X, y = _three_groups(4, 5, rng, runs=2, shift=(0.0, 0.5, 1.0))
    other = np.column_stack([np.ones(12), group == 0, group == 2]).astype(float)[animal]
    a = test_f(fit_reml(y, None, X, animal), L_DOSE, 9.0)
    b = test_f(fit_reml(y, None, other, animal), L_DOSE, 9.0)
    np.testing.assert_allclose(a.f, b.f, rtol=1e-6)


def test_permutation_f_with_variance_groups_uses_the_rank_two_g_statistic():
    # the observed statistic of the permutation engine is the G statistic of the
    # animal-level data (as z at equal upper-tail p), and only sign flips are used
    rng = np.random.default_rng(9)
    group = np.repeat(np.arange(3), 4)
    Xa = np.column_stack([np.ones(12), group == 1, group == 2]).astype(float)
    y = rng.normal(size=(12, 6)) * np.array([1.0, 1.0, 3.0])[group][:, None]
    data = _dose_animals(y, Xa)
    df = np.full(6, 9.0)
    res = permutation_test(
        data,
        L_DOSE,
        df,
        np.ones((3, 2, 1), dtype=bool),
        n_permutations=20,
        rng=np.random.default_rng(0),
        sided="positive",
        use_tfce=False,
        threads=1,
        variance_groups=group,
        f_test=True,
    )
    assert res.scheme.kind == "sign flips"
    expected = f_to_z(g_statistic_rank(data.mean, Xa, L_DOSE, group), 2, df)
    np.testing.assert_allclose(res.statistic, expected, rtol=1e-8)


def test_refit_from_a_zero_start_reaches_the_reml_optimum():
    # regression: with tiny sampling variances (one run per animal, τ² and σ² folded)
    # and the refit started at τ² = 0 (an unpermuted estimate on the boundary), Newton
    # steps crept up at the scale of the sampling variances and stopped far from the
    # optimum. The REML τ² is then the OLS residual variance, and t the OLS t of the
    # first coefficient (statsmodels OLS, rtol 1e-6).
    from grouplevel.inference import _refit_kernel as kernel

    rng = np.random.default_rng(12)
    group = np.repeat(np.arange(3), 2)
    X = np.column_stack([group == 2, np.ones(6), group == 1]).astype(float)
    y = rng.normal(size=(3, 6))
    prec = np.full((3, 6), 1e10)
    out = np.empty(3)
    kernel.refit_t_permuted(
        np.zeros((3, 0)),
        np.zeros((6, 0)),
        y,
        prec,
        np.ones(6),
        np.arange(6),
        X,
        np.zeros(3),
        np.zeros((0, kernel.SUMS)),
        out,
        kernel.REFIT_MAX_ITER,
        kernel.REFIT_TOL,
    )
    for v in range(3):
        np.testing.assert_allclose(out[v], sm.OLS(y[v], X).fit().tvalues[0], rtol=1e-6)
