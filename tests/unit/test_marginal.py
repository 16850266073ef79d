"""The fitted model's covariance (grouplevel.model.marginal) and what uses it.

References:
- statsmodels ``MixedLM`` (REML) with a random intercept and slope: its ``cov_re`` and
  ``scale`` define the marginal covariance ``Z cov_re Zᵀ + scale·I`` of each animal's
  runs; our GLS at those components must give its ``fe_params`` and ``bse_fe``, and our
  marginal run variances the diagonal of that covariance;
- a brute-force dense GLS (numpy, the whole n × n covariance written out) for the
  leave-one-animal-out downdate of a model with slopes, sessions and variance groups;
- the closed-form random-intercept downdate (Sherman–Morrison) for the same model
  without the extra levels.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from grouplevel.model.leave_one_out import leave_one_animal_out, leave_one_animal_out_model
from grouplevel.model.marginal import RandomTerms, animal_gls_pieces, marginal_run_variance
from grouplevel.model.mixed import fit_mixed

RNG = np.random.default_rng(20261202)


def _slope_data(m=7, runs=6, n_vox=3):
    animal = np.repeat(np.arange(m), runs)
    cond = np.tile([-0.5, 0.5], m * runs // 2)
    X = np.column_stack([np.ones(m * runs), cond])
    u = RNG.normal(0, 1, (m, 2)) * [1.0, 0.8]
    mean = (1 + u[animal, 0]) + (0.7 + u[animal, 1]) * cond
    y = mean[:, None] + RNG.normal(0, 0.6, (m * runs, n_vox))
    return y, X, animal, cond


def _statsmodels_slope_fit(y, cond, animal):
    frame = pd.DataFrame({"y": y, "cond": cond, "animal": animal})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return smf.mixedlm("y ~ cond", frame, groups="animal", re_formula="~cond").fit(reml=True)


def test_gls_at_statsmodels_components_gives_its_estimates_and_variances():
    # Reference: statsmodels MixedLM (REML), random intercept and slope per animal.
    y, X, animal, cond = _slope_data()
    ref = _statsmodels_slope_fit(y[:, 0], cond, animal)
    cov_re = ref.cov_re.to_numpy()
    components = {
        "animal": np.array([cov_re[0, 0]]),
        "slope[cond]": np.array([cov_re[1, 1]]),
        "cov[cond]": np.array([cov_re[0, 1]]),
        "run": np.array([ref.scale]),
    }
    terms = RandomTerms(slopes=cond[:, None], slope_names=("cond",))
    A, b = animal_gls_pieces(y[:, :1], None, X, animal, components, terms)
    info = A.sum(axis=1)[0]
    beta = np.linalg.solve(info, b.sum(axis=1)[0])
    np.testing.assert_allclose(beta, ref.fe_params.to_numpy(), rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(
        np.sqrt(np.diag(np.linalg.inv(info))), ref.bse_fe.to_numpy(), rtol=1e-5
    )
    # the marginal run variance is the diagonal of Z cov_re Zᵀ + scale
    Z = X  # intercept and the condition code
    expected = np.einsum("ki,ij,kj->k", Z, cov_re, Z) + ref.scale
    got = marginal_run_variance(components, X, animal, terms)[:, 0]
    np.testing.assert_allclose(got, expected, rtol=1e-10)


def test_our_fit_and_the_downdate_agree_with_statsmodels():
    # Reference: statsmodels MixedLM (REML); fit_mixed reaches the same components
    # (tolerance of two REML optimisers) and the model downdate with every animal
    # reproduces fit_mixed's own GLS estimate.
    y, X, animal, cond = _slope_data()
    terms = RandomTerms(slopes=cond[:, None], slope_names=("cond",))
    fit = fit_mixed(y, None, X, animal, slopes=cond[:, None], slope_names=("cond",))
    ref = _statsmodels_slope_fit(y[:, 0], cond, animal)
    assert fit.components["slope[cond]"][0] == pytest.approx(ref.cov_re.iloc[1, 1], rel=1e-3)
    assert fit.components["run"][0] == pytest.approx(ref.scale, rel=1e-3)
    loo = leave_one_animal_out_model(
        y, None, X, animal, np.array([0.0, 1.0]), fit.components, terms
    )
    np.testing.assert_allclose(loo.effect_full, fit.beta[:, 1], rtol=1e-8)
    np.testing.assert_allclose(loo.se_full, np.sqrt(fit.cov_beta[:, 1, 1]), rtol=1e-6)


def _dense_gls(y, s2, X, keep, cov_of_run_pairs):
    """Brute force: the whole covariance of the kept runs, GLS by numpy solves."""
    rows = keep & np.isfinite(y)
    V = cov_of_run_pairs[np.ix_(rows, rows)] + np.diag(s2[rows])
    Xr = X[rows]
    W = np.linalg.inv(V)
    info = Xr.T @ W @ Xr
    beta = np.linalg.solve(info, Xr.T @ W @ y[rows])
    return beta, np.linalg.inv(info)


def test_model_downdate_equals_dense_gls_with_slopes_sessions_groups_and_gaps():
    # Reference: brute-force dense GLS without each animal at the same components.
    m, sessions, runs = 6, 2, 3
    animal = np.repeat(np.arange(m), sessions * runs)
    session = np.repeat(np.arange(m * sessions), runs)
    n = animal.size
    cond = np.tile([0.5, -0.5, 0.5], m * sessions)
    group = np.array([0, 0, 0, 1, 1, 1])
    X = np.column_stack([np.ones(n), group[animal], cond])
    y = RNG.normal(0, 1, n)
    y[[4, 17]] = np.nan  # runs missing at this voxel
    s2 = RNG.uniform(0.1, 0.4, n)
    T = {0: np.array([[1.0, 0.3], [0.3, 0.5]]), 1: np.array([[2.0, -0.2], [-0.2, 0.8]])}
    omega2, sigma2 = 0.4, 0.3
    components = {
        "animal[g0]": np.array([T[0][0, 0]]),
        "cov[cond][g0]": np.array([T[0][0, 1]]),
        "slope[cond][g0]": np.array([T[0][1, 1]]),
        "animal[g1]": np.array([T[1][0, 0]]),
        "cov[cond][g1]": np.array([T[1][0, 1]]),
        "slope[cond][g1]": np.array([T[1][1, 1]]),
        "session": np.array([omega2]),
        "run": np.array([sigma2]),
    }
    terms = RandomTerms(
        slopes=cond[:, None],
        slope_names=("cond",),
        session=session,
        animal_group=group,
        group_names=("g0", "g1"),
    )
    Z = np.column_stack([np.ones(n), cond])
    same_animal = animal[:, None] == animal[None, :]
    Tk = np.stack([T[group[a]] for a in animal])
    cov = np.einsum("ki,kij,lj->kl", Z, Tk, Z) * same_animal
    cov += omega2 * (session[:, None] == session[None, :]) + sigma2 * np.eye(n)
    c = np.array([0.0, 0.0, 1.0])
    loo = leave_one_animal_out_model(y[:, None], s2[:, None], X, animal, c, components, terms)
    beta, cov_beta = _dense_gls(y, s2, X, np.ones(n, dtype=bool), cov)
    assert loo.effect_full[0] == pytest.approx(c @ beta, rel=1e-10)
    assert loo.se_full[0] == pytest.approx(np.sqrt(c @ cov_beta @ c), rel=1e-10)
    for a in range(m):
        beta_a, cov_a = _dense_gls(y, s2, X, animal != a, cov)
        assert loo.effect[a, 0] == pytest.approx(c @ beta_a, rel=1e-9)
        assert loo.se[a, 0] == pytest.approx(np.sqrt(c @ cov_a @ c), rel=1e-9)


def test_model_downdate_of_the_random_intercept_equals_the_closed_form():
    # Reference: the Sherman–Morrison downdate of leave_one_animal_out (random intercept).
    m = 5
    animal = np.repeat(np.arange(m), 3)
    X = np.column_stack([np.ones(animal.size), RNG.normal(0, 1, m)[animal]])
    y = RNG.normal(0, 1, (animal.size, 4))
    y[2, 1] = np.nan
    s2 = RNG.uniform(0.1, 0.5, y.shape)
    tau2, sig2 = RNG.uniform(0.2, 1.0, 4), RNG.uniform(0.1, 0.5, 4)
    c = np.array([1.0, 0.0])
    closed = leave_one_animal_out(y, s2, X, animal, c, tau2, sig2, update_variances=False)
    general = leave_one_animal_out_model(
        y, s2, X, animal, c, {"animal": tau2, "run": sig2}, RandomTerms(), chunk=3
    )
    np.testing.assert_allclose(general.effect, closed.effect, rtol=1e-9)
    np.testing.assert_allclose(general.se, closed.se, rtol=1e-9)
    np.testing.assert_allclose(general.t_full, closed.t_full, rtol=1e-9)


def test_a_component_the_terms_need_but_the_fit_lacks_is_named():
    _, X, animal, cond = _slope_data(m=3, runs=2, n_vox=1)
    terms = RandomTerms(slopes=cond[:, None], slope_names=("cond",))
    with pytest.raises(ValueError, match="no variance component .cov\\[cond\\]"):
        marginal_run_variance({"animal": np.ones(1), "run": np.ones(1)}, X, animal, terms)


def test_question_refits_of_an_extended_design_use_its_model():
    # Reference: statsmodels MixedLM (REML) with a random intercept and condition slope
    # per animal, on the same region values: the hemispheric test's L − R estimate and
    # SE, the mean consistency's group effect and its refit without the first animal.
    from grouplevel.questions.specificity import consistency
    from grouplevel.questions.symmetry import hemisphere_test

    y, X, animal, cond = _slope_data(m=8, runs=4, n_vox=2)
    # the left side carries its own animal intercepts and slopes, so that L − R has
    # variance at both animal levels (away from the boundary, where two optimisers agree)
    extra = RNG.normal(0, 0.8, (8, 2))
    left = y[:, 0] + 1.0 + extra[animal, 0] + extra[animal, 1] * cond
    right = y[:, 1]
    terms = RandomTerms(slopes=cond[:, None], slope_names=("cond",))
    c = np.array([1.0, 0.0])  # the mean over both conditions (cond is centred)
    test = hemisphere_test(left, right, animal, X=X, c=c, terms=terms)
    ref = _statsmodels_slope_fit(left - right, cond, animal)
    assert test.difference == pytest.approx(ref.fe_params["Intercept"], rel=1e-3)
    assert test.se == pytest.approx(ref.bse_fe["Intercept"], rel=2e-3)

    ids = [f"m{a}" for a in range(8)]
    cons = consistency(left, None, X, animal, ids, c, terms=terms)
    ref = _statsmodels_slope_fit(left, cond, animal)
    assert cons.effect == pytest.approx(ref.fe_params["Intercept"], rel=1e-3)
    assert cons.se == pytest.approx(ref.bse_fe["Intercept"], rel=2e-3)
    keep = animal != 0
    ref0 = _statsmodels_slope_fit(left[keep], cond[keep], animal[keep])
    loo0 = cons.animals.set_index("animal").loc["m0", "loo_effect"]
    assert loo0 == pytest.approx(ref0.fe_params["Intercept"], rel=1e-3)
    # its run variance is the slope model's (statsmodels' scale), which the random-
    # intercept model would put elsewhere: the slope variance is not 0 here
    assert cons.var_run == pytest.approx(ref.scale, rel=1e-3)
    plain = consistency(left, None, X, animal, ids, c)
    assert abs(plain.var_run / ref.scale - 1) > 0.01
