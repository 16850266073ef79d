"""Checks of contrast tests, degrees-of-freedom rules and the t → z conversion.

References: scipy.stats (t and normal distributions); degrees of freedom worked out by
hand from the containment rule (Pinheiro & Bates 2000, Mixed-Effects Models in S and
S-PLUS, §2.4.2, section from memory); Satterthwaite (1946), Biometrics Bulletin 2:110,
whose df for a balanced one-way mean is m − 1 (known result, common practice); a
dense finite-difference Satterthwaite computation (Giesbrecht & Burns 1985, Biometrics
41:477).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from grouplevel.errors import UserError
from grouplevel.model import (
    animal_level_columns,
    between_animal_df,
    fit_reml,
    satterthwaite_df,
    t_to_z,
    test_contrast,
)


def test_t_to_z_agrees_with_scipy_and_stays_finite():
    t = np.array([-40.0, -8.0, -2.5, -0.3, 0.0, 0.7, 1.96, 4.0, 12.0, 35.0])
    for df in (1.0, 3.0, 7.5, 30.0, 400.0):
        z = t_to_z(t, df)
        # scipy: z = norm.isf(t.sf(t)) (equal one-sided, hence two-sided, p)
        ref = stats.norm.isf(stats.t.sf(t, df))
        finite = np.isfinite(ref)
        assert finite.sum() >= 8
        # where t < 0 the reference takes isf of a value near 1 and loses digits (at
        # t = −8 on 400 df only 4 are left), so compare it where t ≥ 0 and check the
        # symmetry z(−t) = −z(t) for the rest
        pos = finite & (t >= 0)
        np.testing.assert_allclose(z[pos], ref[pos], rtol=1e-10, atol=1e-14)
        np.testing.assert_allclose(t_to_z(-t, df), -z, rtol=1e-14, atol=0)
        near = finite & (t > -3)
        np.testing.assert_allclose(z[near], ref[near], rtol=1e-9, atol=1e-14)
    big = t_to_z(np.array([1e3, -1e3, 1e6]), np.array([5.0, 5.0, 2.0]))
    assert np.all(np.isfinite(big))
    assert big[1] == -big[0]
    # t on 2 df has a closed-form tail, S(t) = 1 / (s (s + t)) with s = √(t² + 2)
    # (textbook result; common practice), finite at t = 1e6 where 1 − cdf would round
    s = np.sqrt(1e12 + 2.0)
    assert big[2] == pytest.approx(stats.norm.isf(1.0 / (s * (s + 1e6))), rel=1e-9)
    # log-space tail of t on 5 df at 1e3: log sf from scipy, then the normal quantile
    assert stats.norm.logsf(big[0]) == pytest.approx(stats.t.logsf(1e3, 5), rel=1e-9)
    # infinite df: z = t; non-positive or NaN df: NaN
    np.testing.assert_array_equal(t_to_z(t, np.inf), t)
    assert np.all(np.isnan(t_to_z(t, 0.0)))
    assert np.isnan(t_to_z(np.array([np.nan]), 4.0)[0])


def _one_sample(rng, m=8, r=3, n_vox=50):
    animal = np.repeat(np.arange(m), r)
    u = rng.normal(size=(m, n_vox)) * 1.5
    y = 0.4 + u[animal] + rng.normal(size=(m * r, n_vox))
    return y, np.ones((m * r, 1)), animal


def test_contrast_statistics_against_scipy():
    rng = np.random.default_rng(1)
    y, X, animal = _one_sample(rng)
    fit = fit_reml(y, None, X, animal)
    df = between_animal_df(X, animal, np.isfinite(y), [1.0])
    res = test_contrast(fit, [1.0], df)
    np.testing.assert_array_equal(res.df, 7.0)  # 8 animals − 1 (by hand)
    np.testing.assert_allclose(res.effect, fit.beta[:, 0])
    np.testing.assert_allclose(res.se, np.sqrt(fit.cov_beta[:, 0, 0]))
    np.testing.assert_allclose(res.t, res.effect / res.se)
    # scipy.stats: two-sided p of t on 7 df, and z with the same two-sided p
    np.testing.assert_allclose(res.p, 2 * stats.t.sf(np.abs(res.t), 7), rtol=1e-10)
    np.testing.assert_allclose(2 * stats.norm.sf(np.abs(res.z)), res.p, rtol=1e-8)
    assert np.all(np.sign(res.z) == np.sign(res.t))
    # balanced one-way, no first-level variances: REML mean test = one-sample t test on
    # the animal means (scipy.stats.ttest_1samp; common practice)
    means = y.reshape(8, 3, -1).mean(axis=1)
    ref = stats.ttest_1samp(means, 0.0, axis=0)
    pos = fit.var_animal > 0
    assert pos.sum() >= 40
    np.testing.assert_allclose(res.t[pos], ref.statistic[pos], rtol=1e-7)
    np.testing.assert_allclose(res.p[pos], ref.pvalue[pos], rtol=1e-6)


def test_contrast_bad_inputs():
    rng = np.random.default_rng(2)
    y, X, animal = _one_sample(rng, n_vox=2)
    fit = fit_reml(y, None, X, animal)
    with pytest.raises(UserError, match="one weight per design column"):
        test_contrast(fit, [1.0, 0.0], 7.0)
    with pytest.raises(UserError, match="not all zero"):
        test_contrast(fit, [0.0], 7.0)
    res = test_contrast(fit, [1.0], np.array([0.0, 3.0]))
    assert np.isnan(res.t[0]) and np.isnan(res.p[0]) and np.isnan(res.z[0])
    assert np.isfinite(res.p[1])


def test_between_animal_df_by_hand():
    # 10 animals, 3 runs each; columns: intercept, group (animal-level), run covariate
    m, r = 10, 3
    animal = np.repeat(np.arange(m), r)
    n = m * r
    group = (np.arange(m) >= 5).astype(float)[animal]
    cov = np.tile([-1.0, 0.0, 1.0], m) + 0.1 * np.arange(n) / n
    X = np.column_stack([np.ones(n), group, cov])
    np.testing.assert_array_equal(animal_level_columns(X, animal), [True, True, False])
    present = np.ones((n, 4), bool)
    present[animal == 0, 1] = False  # voxel 1: animal 0 missing entirely
    present[[3, 4], 2] = False  # voxel 2: two runs of animal 1 missing
    present[animal >= 5, 3] = False  # voxel 3: one group only
    # group difference (animal-level): animals with data − rank([1, group]) (by hand)
    np.testing.assert_array_equal(between_animal_df(X, animal, present, [0, 1, 0]), [8, 7, 8, 4])
    # run-level covariate: runs − animals − (rank X − rank animal part) (by hand)
    np.testing.assert_array_equal(between_animal_df(X, animal, present, [0, 0, 1]), [19, 17, 17, 9])
    # a contrast mixing both kinds is judged as run-level
    np.testing.assert_array_equal(between_animal_df(X, animal, present, [0, 1, 1]), [19, 17, 17, 9])
    with pytest.raises(UserError, match="must agree"):
        between_animal_df(X, animal, present[:-1], [1, 0, 0])


def test_satterthwaite_balanced_one_way_is_m_minus_1():
    rng = np.random.default_rng(3)
    y, X, animal = _one_sample(rng, m=6, r=4, n_vox=60)
    fit = fit_reml(y, None, X, animal)
    df = satterthwaite_df(fit, [1.0])
    pos = fit.var_animal > 0
    assert pos.sum() >= 40
    # Satterthwaite (1946): balanced one-way mean has m − 1 df (common practice)
    np.testing.assert_allclose(df[pos], 5.0, rtol=1e-7)


def test_satterthwaite_matches_dense_finite_differences():
    """Unbalanced design with first-level variances: df from a dense computation.

    g_j = cᵀ ∂(XᵀV⁻¹X)⁻¹/∂θ_j c by central differences of a dense inverse, and the
    expected information ½ tr(P V_i P V_j) (Giesbrecht & Burns 1985, Biometrics 41:477).
    """
    rng = np.random.default_rng(4)
    runs = [2, 4, 3, 5, 3, 2, 4]
    animal = np.repeat(np.arange(len(runs)), runs)
    n = animal.size
    X = np.column_stack([np.ones(n), (np.arange(len(runs)) % 2)[animal], rng.normal(size=n)])
    s2 = rng.uniform(0.2, 1.0, (n, 3))
    u = rng.normal(size=(len(runs), 3)) * 2.0
    y = X @ np.array([1.0, 0.5, 0.2])[:, None] + u[animal] + rng.normal(size=(n, 3)) * 1.3
    fit = fit_reml(y, s2, X, animal)
    Z = (animal[:, None] == np.arange(len(runs))[None, :]).astype(float)
    for c in ([0.0, 1.0, 0.0], [0.0, 0.0, 1.0]):
        df = satterthwaite_df(fit, c)
        c = np.array(c)
        for v in range(3):
            th = np.array([fit.var_animal[v], fit.var_run[v]])
            assert np.all(th > 0)

            def phi(t, v=v, c=c):
                V = t[0] * Z @ Z.T + np.diag(t[1] + s2[:, v])
                return c @ np.linalg.inv(X.T @ np.linalg.solve(V, X)) @ c

            h = 1e-5 * th
            g = np.array(
                [
                    (phi(th + h[j] * np.eye(2)[j]) - phi(th - h[j] * np.eye(2)[j])) / (2 * h[j])
                    for j in range(2)
                ]
            )
            V = th[0] * Z @ Z.T + np.diag(th[1] + s2[:, v])
            Vi = np.linalg.inv(V)
            P = Vi - Vi @ X @ np.linalg.inv(X.T @ Vi @ X) @ X.T @ Vi
            dV = [Z @ Z.T, np.eye(n)]
            F = np.array([[0.5 * np.trace(P @ a @ P @ b) for b in dV] for a in dV])
            ref = 2 * phi(th) ** 2 / (g @ np.linalg.solve(F, g))
            assert df[v] == pytest.approx(ref, rel=1e-5)


def test_satterthwaite_all_components_on_boundary_is_infinite():
    # known variances, no between-animal variance: cᵀΦc is known exactly, so df = ∞
    rng = np.random.default_rng(6)
    k = 12
    s2 = rng.uniform(0.5, 1.0, (k, 1))
    y = np.full((k, 1), 0.3)
    y[: k // 2] += 0.05
    y[k // 2 :] -= 0.05  # far less spread than the first-level variances imply
    fit = fit_reml(y, s2, np.ones((k, 1)), np.arange(k), estimate_run_variance=False)
    assert fit.var_animal[0] == 0.0
    assert np.isposinf(satterthwaite_df(fit, [1.0])[0])
    res = test_contrast(fit, [1.0], satterthwaite_df(fit, [1.0]))
    assert res.z[0] == pytest.approx(res.t[0])  # infinite df: z = t
    assert res.p[0] == pytest.approx(2 * stats.norm.sf(abs(res.t[0])), rel=1e-12)


# --------------------------------------------------------------------------------------
# session_df: the sessions-within-animals stratum of a balanced nested design
# --------------------------------------------------------------------------------------


def _sessions_design(m=5, sessions=4, runs=2):
    animal = np.repeat(np.arange(m), sessions * runs)
    session = np.repeat(np.arange(m * sessions), runs)
    drug = np.tile(np.repeat(np.arange(sessions) % 2, runs), m).astype(float)
    X = np.column_stack([np.ones(animal.size), drug])
    return X, animal, session


def test_session_df_is_the_nested_anova_stratum():
    from grouplevel.model.contrasts import session_df

    X, animal, session = _sessions_design()
    present = np.ones((X.shape[0], 3), dtype=bool)
    # nested ANOVA (common practice): sessions within animals m(S − 1) = 15, minus the
    # one drug column: 14
    np.testing.assert_array_equal(session_df(X, animal, session, present, [0, 1]), 14)
    # voxel 1 lacks one whole session, voxel 2 one animal's vehicle sessions: 15 − 1 − 1
    # sessions → 13; the animal then has no drug contrast but still counts its sessions
    present[session == 0, 1] = False
    present[(animal == 1) & (X[:, 1] == 0), 2] = False
    df = session_df(X, animal, session, present, [0, 1])
    assert df[1] == 19 - 5 - 1
    assert df[2] == 18 - 5 - 1


def test_session_df_refuses_run_level_and_animal_level_contrasts():
    from grouplevel.errors import ArgumentError
    from grouplevel.model.contrasts import session_df

    X, animal, session = _sessions_design()
    present = np.ones((X.shape[0], 1), dtype=bool)
    with pytest.raises(ArgumentError, match="constant within sessions"):
        session_df(X, animal, session, present, [1, 0])
    run_level = np.column_stack([X, np.tile([0.0, 1.0], X.shape[0] // 2)])
    with pytest.raises(ArgumentError, match="constant within sessions"):
        session_df(run_level, animal, session, present, [0, 0, 1])
