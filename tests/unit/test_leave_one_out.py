"""Leave-one-animal-out maps by downdating the GLS solution at fixed variance components.

Outside reference: statsmodels ``GLS`` (Seabold & Perktold 2010) given the dense
covariance V of the runs that remain — block-diagonal over animals, τ̂² on each block
plus σ̂² + s_k² on the diagonal — must give the same estimate and standard error
(≤ 1e-8 relative) as the downdate.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from grouplevel.model import fit_reml, test_contrast
from grouplevel.model.leave_one_out import leave_one_animal_out
from grouplevel.specificity import loo_group_maps


def _data(seed=4, m=6, runs=3, n_vox=30, missing=0.1):
    rng = np.random.default_rng(seed)
    animal = np.repeat(np.arange(m), runs)
    n = animal.size
    group = (np.arange(m) % 2).astype(float)[animal]
    X = np.column_stack([np.ones(n), group])
    y = 0.4 + rng.normal(0, 0.5, (m, n_vox))[animal] + rng.normal(0, 0.4, (n, n_vox))
    s2 = rng.uniform(0.05, 0.2, (n, n_vox))
    y[rng.random((n, n_vox)) < missing] = np.nan
    return y, s2, X, animal


def _gls(y, s2, X, animal, tau2, sig2, c):
    """statsmodels GLS on the present runs, with the dense covariance at (τ², σ²)."""
    ok = np.isfinite(y) & np.isfinite(s2)
    yy, XX, aa, ss = y[ok], X[ok], animal[ok], s2[ok]
    V = np.diag(sig2 + ss) + tau2 * (aa[:, None] == aa[None, :])
    res = sm.GLS(yy, XX, sigma=V).fit()
    return float(c @ res.params), float(np.sqrt(c @ res.normalized_cov_params @ c))


@pytest.mark.parametrize("c", [np.array([1.0, 0.0]), np.array([0.0, 1.0]), np.array([1.0, 0.5])])
def test_downdate_equals_gls_without_the_animal(c):
    y, s2, X, animal = _data()
    fit = fit_reml(y, s2, X, animal)
    down = leave_one_animal_out(
        y, s2, X, animal, c, fit.var_animal, fit.var_run, chunk=7, update_variances=False
    )
    # all animals: the GLS estimate at the REML components, i.e. the fit itself
    full = test_contrast(fit, c, 4.0)
    np.testing.assert_allclose(down.effect_full, full.effect, rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(down.se_full, full.se, rtol=1e-8)
    for a in range(6):
        keep = animal != a
        for v in (0, 11, 29):
            e, se = _gls(
                y[keep, v],
                s2[keep, v],
                X[keep],
                animal[keep],
                fit.var_animal[v],
                fit.var_run[v],
                c,
            )
            assert down.effect[a, v] == pytest.approx(e, rel=1e-8, abs=1e-12)
            assert down.se[a, v] == pytest.approx(se, rel=1e-8)
            assert down.t[a, v] == pytest.approx(e / se, rel=1e-8)


def test_downdate_without_first_level_variances():
    y, _, X, animal = _data(seed=8, missing=0.0)
    X = X[:, :1]
    c = np.array([1.0])
    fit = fit_reml(y, None, X, animal)
    down = leave_one_animal_out(
        y, None, X, animal, c, fit.var_animal, fit.var_run, update_variances=False
    )
    zeros = np.zeros_like(y)
    for a in (0, 5):
        keep = animal != a
        e, se = _gls(
            y[keep, 3],
            zeros[keep, 3],
            X[keep],
            animal[keep],
            fit.var_animal[3],
            fit.var_run[3],
            c,
        )
        assert down.effect[a, 3] == pytest.approx(e, rel=1e-8)
        assert down.se[a, 3] == pytest.approx(se, rel=1e-8)


def test_a_design_without_rank_gives_nan():
    # leaving out the only animal of a group leaves the group column without data
    y, s2, X, animal = _data(m=3, missing=0.0)
    X[:, 1] = (animal == 2).astype(float)
    fit = fit_reml(y, s2, X, animal)
    down = leave_one_animal_out(y, s2, X, animal, np.array([0.0, 1.0]), fit.var_animal, fit.var_run)
    assert np.isnan(down.effect[2]).all() and np.isfinite(down.effect[0]).all()


@pytest.mark.parametrize("seed", [21, 22])
def test_downdate_close_to_refits(seed):
    # The shortcut keeps τ̂², σ̂² at their full-data values; refits re-estimate them, so
    # the two differ by design. Stated tolerances (measured on these simulated studies
    # of 6 animals × 3 runs: effect differences ≤ 0.03 for effects of about 0.5, t-map
    # correlations within 0.14): leave-one-out effect maps within 10% of the largest
    # |effect|; each leave-one-out t map's correlation with the full map within 0.2.
    y, s2, X, animal = _data(seed=seed, missing=0.0, n_vox=200)
    X = X[:, :1]
    refit = loo_group_maps(y, s2, X, animal, [1.0])
    fit = fit_reml(y, s2, X, animal)
    down = loo_group_maps(y, s2, X, animal, [1.0], var_animal=fit.var_animal, var_run=fit.var_run)
    np.testing.assert_allclose(down.t_full, refit.t_full, rtol=1e-8)
    scale = np.nanmax(np.abs(refit.effect))
    assert np.nanmax(np.abs(down.effect - refit.effect)) < 0.1 * scale
    np.testing.assert_allclose(down.correlation, refit.correlation, atol=0.2)


def _dense_fisher_step(y, s2, X, animal, tau2, sig2, estimate_run_variance=True):
    """One REML Fisher-scoring step of (τ², σ²) with dense matrices.

    Reference: the REML score ½[yᵀPV_kPy − tr(PV_k)] and expected information
    ½ tr(PV_kPV_l) of Harville (1977, JASA 72:320), with P = V⁻¹ − V⁻¹X(XᵀV⁻¹X)⁻¹XᵀV⁻¹,
    written out with numpy matrices (no shared code with grouplevel).
    """
    n = len(y)
    Vt = (animal[:, None] == animal[None, :]).astype(float)
    Vs = np.eye(n)
    Vi = np.linalg.inv(tau2 * Vt + np.diag(sig2 + s2))
    P = Vi - Vi @ X @ np.linalg.solve(X.T @ Vi @ X, X.T @ Vi)
    Ks = [Vt, Vs]
    U = np.array([0.5 * (y @ P @ K @ P @ y - np.trace(P @ K)) for K in Ks])
    info = np.array([[0.5 * np.trace(P @ K @ P @ L) for L in Ks] for K in Ks])
    if not estimate_run_variance:
        U[1], info[0, 1], info[1, 0], info[1, 1] = 0.0, 0.0, 0.0, 1.0
    return np.maximum(np.array([tau2, sig2]) + np.linalg.solve(info, U), 0.0)


@pytest.mark.parametrize("estimate_run_variance", [True, False])
def test_one_step_equals_the_textbook_fisher_step(estimate_run_variance):
    y, s2, X, animal = _data(seed=5, m=6, runs=4, n_vox=12, missing=0.1)
    fit = fit_reml(y, s2, X, animal, estimate_run_variance=estimate_run_variance)
    c = np.array([1.0, 0.0])
    down = leave_one_animal_out(
        y,
        s2,
        X,
        animal,
        c,
        fit.var_animal,
        fit.var_run,
        estimate_run_variance=estimate_run_variance,
        return_variances=True,
    )
    for v in range(12):
        for a in range(6):
            rows = (animal != a) & np.isfinite(y[:, v])
            tau2, sig2 = _dense_fisher_step(
                y[rows, v],
                s2[rows, v],
                X[rows],
                animal[rows],
                fit.var_animal[v],
                fit.var_run[v],
                estimate_run_variance,
            )
            assert down.var_animal[a, v] == pytest.approx(tau2, rel=1e-8, abs=1e-12)
            assert down.var_run[a, v] == pytest.approx(sig2, rel=1e-8, abs=1e-12)


def test_one_step_is_closer_to_refits_than_fixed_components():
    # Reference: full REML refits without each animal (fit_reml, which matches
    # statsmodels MixedLM and lme4 to 1e-6: tests/unit/test_reml.py). Stated tolerances,
    # measured on simulated 6-animal × 3-run studies (seeds 21–23: median |Δt| 0.13–0.14
    # with fixed components, 0.034–0.038 after the one step; effects within 0.027 of
    # refits for effects of about 0.4): median |Δt| below 0.06 and below half the fixed
    # components' median; effects within 10% of the largest |effect|. The largest |Δt|
    # stay where a refit's τ̂² lands on 0, which one step does not reach.
    y, s2, X, animal = _data(seed=21, missing=0.0, n_vox=300)
    X, c = X[:, :1], np.array([1.0])
    fit = fit_reml(y, s2, X, animal)
    fixed = leave_one_animal_out(
        y, s2, X, animal, c, fit.var_animal, fit.var_run, update_variances=False
    )
    step = leave_one_animal_out(y, s2, X, animal, c, fit.var_animal, fit.var_run)
    dt_fixed, dt_step, de_step, scale = [], [], [], 0.0
    for a in range(6):
        keep = animal != a
        codes = np.unique(animal[keep], return_inverse=True)[1]
        ref = test_contrast(fit_reml(y[keep], s2[keep], X[keep], codes), c, 4.0)
        dt_fixed.append(np.abs(fixed.t[a] - ref.t))
        dt_step.append(np.abs(step.t[a] - ref.t))
        de_step.append(np.abs(step.effect[a] - ref.effect))
        scale = max(scale, float(np.nanmax(np.abs(ref.effect))))
    med_fixed, med_step = np.nanmedian(dt_fixed), np.nanmedian(dt_step)
    assert med_step < 0.06
    assert med_step < 0.5 * med_fixed
    assert np.nanmax(de_step) < 0.1 * scale


def _dense_moved_estimate(y, s2, X, animal, tau2, sig2, c, new_theta):
    """cᵀβ̂ and its standard error moved to first order from (τ², σ²) to ``new_theta``.

    Reference: the derivatives of the GLS estimate and of its precision in the variance
    components, ∂β̂/∂θ_k = −A⁻¹XᵀV⁻¹V_kV⁻¹(y − Xβ̂) and ∂A/∂θ_k = −XᵀV⁻¹V_kV⁻¹X with
    A = XᵀV⁻¹X (from ∂V⁻¹/∂θ_k = −V⁻¹V_kV⁻¹; Harville 1977, JASA 72:320), written out
    with dense numpy matrices (no shared code with grouplevel).
    """
    Vt = (animal[:, None] == animal[None, :]).astype(float)
    Vi = np.linalg.inv(tau2 * Vt + np.diag(sig2 + s2))
    A = X.T @ Vi @ X
    beta = np.linalg.solve(A, X.T @ Vi @ y)
    e = y - X @ beta
    move = np.asarray(new_theta) - np.array([tau2, sig2])
    dbeta, dA = np.zeros_like(beta), np.zeros_like(A)
    for K, d in zip((Vt, np.eye(len(y))), move, strict=True):
        dbeta -= np.linalg.solve(A, X.T @ Vi @ K @ Vi @ e) * d
        dA -= X.T @ Vi @ K @ Vi @ X * d
    return float(c @ (beta + dbeta)), float(np.sqrt(c @ np.linalg.solve(A + dA, c)))


def test_one_step_estimate_equals_the_dense_first_order_update():
    y, s2, X, animal = _data(seed=6, m=6, runs=4, n_vox=10, missing=0.1)
    fit = fit_reml(y, s2, X, animal)
    c = np.array([1.0, 0.5])
    down = leave_one_animal_out(
        y, s2, X, animal, c, fit.var_animal, fit.var_run, return_variances=True
    )
    checked = 0
    for v in range(10):
        for a in range(6):
            rows = (animal != a) & np.isfinite(y[:, v])
            theta = (down.var_animal[a, v], down.var_run[a, v])
            e, se = _dense_moved_estimate(
                y[rows, v], s2[rows, v], X[rows], animal[rows],
                fit.var_animal[v], fit.var_run[v], c, theta,
            )  # fmt: skip
            assert down.effect[a, v] == pytest.approx(e, rel=1e-8, abs=1e-12)
            assert down.se[a, v] == pytest.approx(se, rel=1e-8)
            checked += 1
    assert checked == 60
