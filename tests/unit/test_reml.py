"""Checks of the vectorised REML fitter against outside references.

References used below: statsmodels ``MixedLM`` (REML); a dense REML criterion maximised
by scipy.optimize (Harville 1977, JASA 72:320); the Rail data (Pinheiro & Bates 2000);
the Dyestuff data (Davies 1947); the BCG meta-analysis (Colditz et al. 1994, JAMA
271:698; REML values of Viechtbauer 2010, J Stat Softw 36(3)); ANOVA estimators for
balanced data (Searle, Casella & McCulloch 1992, Variance Components).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize
from statsmodels.regression.mixed_linear_model import MixedLM

from grouplevel.errors import UserError
from grouplevel.model import MixedFit, fit_reml
from tests import reference_data as rd

# --------------------------------------------------------------------------------------
# helpers: simulated data and a dense textbook REML
# --------------------------------------------------------------------------------------


def simulate(rng, runs_per_animal, n_vox, X=None, beta=None, first_level=False, tau=1.0):
    """Runs × voxels data from the model with random τ², σ² per voxel."""
    runs_per_animal = np.asarray(runs_per_animal)
    animal = np.repeat(np.arange(runs_per_animal.size), runs_per_animal)
    n = animal.size
    if X is None:
        X = np.ones((n, 1))
    if beta is None:
        beta = np.linspace(1.0, 2.0, X.shape[1])
    tau2 = rng.uniform(0.3, 2.0, n_vox) * tau
    sig2 = rng.uniform(0.3, 2.0, n_vox)
    s2 = rng.uniform(0.1, 1.5, (n, n_vox)) if first_level else np.zeros((n, n_vox))
    u = rng.normal(size=(runs_per_animal.size, n_vox)) * np.sqrt(tau2)
    e = rng.normal(size=(n, n_vox)) * np.sqrt(sig2 + s2)
    y = (X @ beta)[:, None] + u[animal] + e
    return y, (s2 if first_level else None), X, animal


def dense_reml(theta, y, s2, X, animal):
    """Textbook REML log-likelihood with dense matrices (Harville 1977, JASA 72:320).

    ℓ = −½ [log|V| + log|XᵀV⁻¹X| + rᵀV⁻¹r + (n − p) log 2π], V = τ² ZZᵀ + diag(σ² + s²).
    Returns ℓ, the GLS β and (XᵀV⁻¹X)⁻¹.
    """
    Z = (animal[:, None] == np.unique(animal)[None, :]).astype(float)
    V = theta[0] * Z @ Z.T + np.diag(theta[1] + s2)
    Vi = np.linalg.inv(V)
    M = X.T @ Vi @ X
    b = np.linalg.solve(M, X.T @ Vi @ y)
    r = y - X @ b
    n, p = X.shape
    ll = -0.5 * (
        np.linalg.slogdet(V)[1] + np.linalg.slogdet(M)[1] + r @ Vi @ r + (n - p) * np.log(2 * np.pi)
    )
    return ll, b, np.linalg.inv(M)


def dense_reml_fit(y, s2, X, animal, estimate_run_variance=True):
    """Maximise the dense REML criterion with scipy (L-BFGS-B, θ ≥ 0)."""
    scale = np.var(y)
    bounds = [(0.0, None), (0.0, None) if estimate_run_variance else (0.0, 0.0)]
    best = None
    for start in ([0.5, 0.5], [0.05, 1.0], [1.0, 0.05]):  # several starts, keep the best
        x0 = np.array(start) * scale
        if not estimate_run_variance:
            x0[1] = 0.0
        res = optimize.minimize(
            lambda t: -dense_reml(t * scale, y, s2, X, animal)[0],
            x0 / scale,
            method="L-BFGS-B",
            bounds=bounds,
            options={"ftol": 1e-15, "gtol": 1e-11, "maxiter": 2000},
        )
        if best is None or res.fun < best.fun:
            best = res
    return best.x * scale, -best.fun


def statsmodels_fit(y, X, animal):
    """statsmodels MixedLM REML fit of one voxel (random intercept per animal)."""
    df = pd.DataFrame(X[:, 1:], columns=[f"x{j}" for j in range(1, X.shape[1])])
    df["y"] = y
    df["animal"] = animal
    rhs = " + ".join(["1"] + [f"x{j}" for j in range(1, X.shape[1])])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = MixedLM.from_formula(f"y ~ {rhs}", df, groups="animal").fit(reml=True)
    return res


def rel(a, b):
    return np.max(np.abs(np.asarray(a) - np.asarray(b)) / np.maximum(np.abs(b), 1e-300))


# --------------------------------------------------------------------------------------
# 1. statsmodels MixedLM, without first-level variances
# --------------------------------------------------------------------------------------

DESIGNS = {
    "balanced": [4] * 8,
    "unbalanced": [2, 5, 3, 4, 6, 2, 3, 5, 4],
    "covariate": [3, 4, 5, 3, 4, 2, 5, 4, 3, 4],
}


@pytest.mark.parametrize("design", sorted(DESIGNS))
def test_matches_statsmodels_mixedlm(design):
    rng = np.random.default_rng(20260101 + len(design))
    runs = DESIGNS[design]
    animal = np.repeat(np.arange(len(runs)), runs)
    n = animal.size
    X = np.ones((n, 1))
    if design == "covariate":  # animal-level group + run-level covariate
        group = (np.arange(len(runs)) % 2).astype(float)[animal]
        X = np.column_stack([np.ones(n), group, rng.normal(size=n)])
    y, _, X, animal = simulate(rng, runs, 6, X=X)
    fit = fit_reml(y, None, X, animal)
    assert fit.converged.all()
    c = np.zeros(X.shape[1])
    c[-1] = 1.0
    checked = 0
    for v in range(y.shape[1]):
        res = statsmodels_fit(y[:, v], X, animal)
        tau2_sm = float(res.cov_re.iloc[0, 0])
        # statsmodels sometimes stops early at or near the boundary τ² = 0 (its optimiser
        # works on a Cholesky factor whose gradient vanishes there); such voxels are not
        # comparable to 1e-4 and are left out. The simulated τ² ≥ 0.3 makes this rare.
        if not res.converged or tau2_sm < 1e-3 * res.scale:
            continue
        checked += 1
        # statsmodels MixedLM, REML (Seabold & Perktold 2010, statsmodels)
        assert rel(fit.beta[v], res.fe_params.to_numpy()) <= 1e-4
        assert rel(fit.var_animal[v], tau2_sm) <= 1e-4
        assert rel(fit.var_run[v], res.scale) <= 1e-4
        # model-based SE of cᵀβ: √(cᵀ(XᵀV̂⁻¹X)⁻¹c) with a dense V from statsmodels' estimates
        Z = (animal[:, None] == np.arange(len(runs))[None, :]).astype(float)
        V = tau2_sm * Z @ Z.T + res.scale * np.eye(n)
        se_dense = np.sqrt(c @ np.linalg.inv(X.T @ np.linalg.solve(V, X)) @ c)
        assert rel(np.sqrt(c @ fit.cov_beta[v] @ c), se_dense) <= 1e-4
    assert checked >= 4


# --------------------------------------------------------------------------------------
# 2. with first-level variances: dense REML maximised by scipy
# --------------------------------------------------------------------------------------


def test_first_level_variances_match_dense_scipy_reml():
    rng = np.random.default_rng(7)
    runs = [3, 2, 4, 3, 5, 2, 3]
    n = sum(runs)
    animal = np.repeat(np.arange(len(runs)), runs)
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    y, s2, X, animal = simulate(rng, runs, 5, X=X, first_level=True)
    fit = fit_reml(y, s2, X, animal)
    assert fit.converged.all()
    for v in range(y.shape[1]):
        theta_ref, ll_ref = dense_reml_fit(y[:, v], s2[:, v], X, animal)
        # Harville (1977) REML criterion, dense, at our estimate: same log-likelihood
        ll_here, b_here, cov_here = dense_reml(
            [fit.var_animal[v], fit.var_run[v]], y[:, v], s2[:, v], X, animal
        )
        assert abs(ll_here - fit.loglik[v]) <= 1e-9 * (1 + abs(ll_here))
        np.testing.assert_allclose(fit.beta[v], b_here, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(fit.cov_beta[v], cov_here, rtol=1e-10, atol=1e-14)
        # and the maximum: scipy cannot find a better point, the estimates agree
        assert fit.loglik[v] >= ll_ref - 1e-9
        assert abs(ll_ref - fit.loglik[v]) <= 1e-7
        theta = np.array([fit.var_animal[v], fit.var_run[v]])
        np.testing.assert_allclose(theta, theta_ref, rtol=1e-4, atol=1e-5 * np.var(y[:, v]))


def test_information_matches_dense_formulas():
    """Expected information ½tr(PV_iPV_j) and ∂(XᵀV⁻¹X)⁻¹/∂θ_j, dense (Harville 1977)."""
    rng = np.random.default_rng(11)
    runs = [2, 4, 3, 5, 3]
    n = sum(runs)
    animal = np.repeat(np.arange(len(runs)), runs)
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    y, s2, X, animal = simulate(rng, runs, 3, X=X, first_level=True, tau=3.0)
    fit = fit_reml(y, s2, X, animal)
    Z = (animal[:, None] == np.arange(len(runs))[None, :]).astype(float)
    for v in range(y.shape[1]):
        th = [fit.var_animal[v], fit.var_run[v]]
        assert th[0] > 0 and th[1] > 0  # interior: both components kept
        V = th[0] * Z @ Z.T + np.diag(th[1] + s2[:, v])
        Vi = np.linalg.inv(V)
        C = np.linalg.inv(X.T @ Vi @ X)
        P = Vi - Vi @ X @ C @ X.T @ Vi
        dV = [Z @ Z.T, np.eye(n)]
        F = np.array([[0.5 * np.trace(P @ a @ P @ b) for b in dV] for a in dV])
        np.testing.assert_allclose(fit.cov_theta[v], np.linalg.inv(F), rtol=1e-8)
        for j in range(2):
            dC = C @ X.T @ Vi @ dV[j] @ Vi @ X @ C
            np.testing.assert_allclose(fit.dcov_beta[v, j], dC, rtol=1e-8, atol=1e-14)


# --------------------------------------------------------------------------------------
# 3. published worked examples
# --------------------------------------------------------------------------------------


def _balanced(table):
    y = np.asarray(table, dtype=float)
    m, r = y.shape
    return y.ravel()[:, None], np.repeat(np.arange(m), r), m, r


def _anova(table):
    """One-way random-effects ANOVA estimators (Searle, Casella & McCulloch 1992, §3.5)."""
    y = np.asarray(table, dtype=float)
    m, r = y.shape
    msw = np.sum((y - y.mean(axis=1, keepdims=True)) ** 2) / (m * (r - 1))
    msb = r * np.sum((y.mean(axis=1) - y.mean()) ** 2) / (m - 1)
    return (msb - msw) / r, msw, msb


@pytest.mark.parametrize("backend", ["compiled", "numpy"])
def test_rail_data(backend):
    y, animal, m, r = _balanced(rd.RAIL_TRAVEL)
    fit = fit_reml(y, None, np.ones((m * r, 1)), animal, backend=backend)
    # Pinheiro & Bates (2000), Rail data, REML (values from memory)
    assert np.sqrt(fit.var_animal[0]) == pytest.approx(rd.RAIL_SD_RAIL, abs=6e-4)
    assert np.sqrt(fit.var_run[0]) == pytest.approx(rd.RAIL_SD_RESIDUAL, abs=6e-5)
    assert fit.beta[0, 0] == pytest.approx(rd.RAIL_INTERCEPT, abs=1e-9)
    assert np.sqrt(fit.cov_beta[0, 0, 0]) == pytest.approx(rd.RAIL_INTERCEPT_SE, abs=6e-3)
    # balanced: equal to the ANOVA estimates (Searle, Casella & McCulloch 1992)
    tau2, sig2, msb = _anova(rd.RAIL_TRAVEL)
    assert fit.var_animal[0] == pytest.approx(tau2, rel=1e-9)
    assert fit.var_run[0] == pytest.approx(sig2, rel=1e-9)
    assert fit.cov_beta[0, 0, 0] == pytest.approx(msb / (m * r), rel=1e-9)
    assert fit.n_runs[0] == 18 and fit.n_animals[0] == 6


@pytest.mark.parametrize("backend", ["compiled", "numpy"])
def test_dyestuff_data(backend):
    y, animal, m, r = _balanced(rd.DYESTUFF_YIELD)
    fit = fit_reml(y, None, np.ones((m * r, 1)), animal, backend=backend)
    # Davies (1947) Dyestuff, REML as in standard texts (values from memory)
    assert fit.var_animal[0] == pytest.approx(rd.DYESTUFF_VAR_BATCH, abs=0.1)
    assert fit.var_run[0] == pytest.approx(rd.DYESTUFF_VAR_RESIDUAL, abs=0.1)
    assert fit.beta[0, 0] == pytest.approx(rd.DYESTUFF_INTERCEPT, abs=1e-9)
    assert np.sqrt(fit.cov_beta[0, 0, 0]) == pytest.approx(rd.DYESTUFF_INTERCEPT_SE_REML, abs=6e-3)
    tau2, sig2, _ = _anova(rd.DYESTUFF_YIELD)
    assert fit.var_animal[0] == pytest.approx(tau2, rel=1e-9)
    assert fit.var_run[0] == pytest.approx(sig2, rel=1e-9)


# --------------------------------------------------------------------------------------
# 4. known first-level variances: the BCG meta-analysis
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("backend", ["compiled", "numpy"])
def test_bcg_meta_analysis(backend):
    effects, variances = rd.bcg_log_risk_ratio()
    k = len(effects)
    fit = fit_reml(
        np.array(effects)[:, None],
        np.array(variances)[:, None],
        np.ones((k, 1)),
        np.arange(k),
        estimate_run_variance=False,
        backend=backend,
    )
    # Viechtbauer (2010) J Stat Softw 36(3), REML on Colditz et al. (1994) (from memory)
    assert fit.converged[0]
    assert fit.var_animal[0] == pytest.approx(rd.BCG_TAU2, abs=6e-5)
    assert fit.beta[0, 0] == pytest.approx(rd.BCG_MU, abs=6e-5)
    assert np.sqrt(fit.cov_beta[0, 0, 0]) == pytest.approx(rd.BCG_MU_SE, abs=6e-5)
    assert fit.var_run[0] == 0.0
    # and the dense REML maximised by scipy (Harville 1977) agrees
    theta_ref, _ = dense_reml_fit(
        np.array(effects), np.array(variances), np.ones((k, 1)), np.arange(k), False
    )
    assert fit.var_animal[0] == pytest.approx(theta_ref[0], rel=1e-5)


# --------------------------------------------------------------------------------------
# 5. balanced data: REML equals ANOVA where the ANOVA estimates are non-negative
# --------------------------------------------------------------------------------------


def test_balanced_reml_equals_anova_many_voxels():
    rng = np.random.default_rng(5)
    m, r, n_vox = 7, 3, 400
    y, _, X, animal = simulate(rng, [r] * m, n_vox)
    fit = fit_reml(y, None, X, animal)
    tables = y.T.reshape(n_vox, m, r)
    msw = np.sum((tables - tables.mean(axis=2, keepdims=True)) ** 2, axis=(1, 2)) / (m * (r - 1))
    means = tables.mean(axis=2)
    msb = r * np.sum((means - means.mean(axis=1, keepdims=True)) ** 2, axis=1) / (m - 1)
    tau2 = (msb - msw) / r
    pos = tau2 > 0
    assert pos.sum() > 200 and (~pos).sum() > 5
    # Searle, Casella & McCulloch (1992): REML = ANOVA for balanced data when ≥ 0
    np.testing.assert_allclose(fit.var_animal[pos], tau2[pos], rtol=1e-7)
    np.testing.assert_allclose(fit.var_run[pos], msw[pos], rtol=1e-7)
    # negative ANOVA τ²: REML puts τ² on the boundary, σ² = total SS / (n − 1)
    assert np.all(fit.var_animal[~pos] == 0.0)
    total = np.var(tables.reshape(n_vox, -1), axis=1, ddof=1)
    np.testing.assert_allclose(fit.var_run[~pos], total[~pos], rtol=1e-7)
    assert fit.converged.all()


# --------------------------------------------------------------------------------------
# 6. missing data
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("backend", ["compiled", "numpy"])
def test_missing_runs_equal_fit_on_present_runs(backend):
    rng = np.random.default_rng(3)
    runs = [3, 4, 3, 2, 4, 3]
    n = sum(runs)
    animal = np.repeat(np.arange(len(runs)), runs)
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    y, s2, X, animal = simulate(rng, runs, 4, X=X, first_level=True)
    y_miss = y.copy()
    y_miss[[0, 5], 0] = np.nan  # two runs missing at voxel 0
    y_miss[animal == 2, 1] = np.nan  # animal 2 has no data at voxel 1
    s2_miss = s2.copy()
    s2_miss[7, 2] = np.nan  # a missing variance also removes the run
    fit = fit_reml(y_miss, s2_miss, X, animal, backend=backend)
    np.testing.assert_array_equal(fit.n_runs, [n - 2, n - 3, n - 1, n])
    np.testing.assert_array_equal(fit.n_animals, [6, 5, 6, 6])
    for v, keep in enumerate(
        [~np.isin(np.arange(n), [0, 5]), animal != 2, np.arange(n) != 7, np.ones(n, bool)]
    ):
        codes = np.unique(animal[keep], return_inverse=True)[1]
        alone = fit_reml(y[keep, v], s2[keep, v], X[keep], codes, backend=backend)
        np.testing.assert_allclose(fit.beta[v], alone.beta[0], rtol=1e-9)
        np.testing.assert_allclose(fit.var_animal[v], alone.var_animal[0], rtol=1e-9, atol=1e-14)
        np.testing.assert_allclose(fit.var_run[v], alone.var_run[0], rtol=1e-9, atol=1e-14)
        np.testing.assert_allclose(fit.loglik[v], alone.loglik[0], rtol=1e-10)
        # outside reference: dense REML on the present runs only (Harville 1977)
        ll, b, _ = dense_reml(
            [fit.var_animal[v], fit.var_run[v]], y[keep, v], s2[keep, v], X[keep], animal[keep]
        )
        assert fit.loglik[v] == pytest.approx(ll, rel=1e-10)
        theta_ref, ll_ref = dense_reml_fit(y[keep, v], s2[keep, v], X[keep], animal[keep])
        assert fit.loglik[v] >= ll_ref - 1e-9


def test_unfittable_voxels_are_flagged_not_silent():
    rng = np.random.default_rng(4)
    runs = [3, 3, 3, 3]
    y, _, X, animal = simulate(rng, runs, 4)
    X = np.column_stack([np.ones(12), (animal >= 2).astype(float)])
    y[:, 0] = 5.0  # no variation and no first-level variances
    y[animal >= 2, 1] = np.nan  # group column all zero on the runs with data: rank deficient
    y[1:, 2] = np.nan  # one run only
    fit = fit_reml(y, None, X, animal)
    assert not fit.converged[:3].any() and fit.converged[3]
    assert np.all(np.isnan(fit.beta[:3])) and np.all(np.isnan(fit.var_animal[:3]))
    assert np.all(np.isfinite(fit.beta[3]))
    np.testing.assert_array_equal(fit.n_runs, [12, 6, 1, 12])
    np.testing.assert_array_equal(fit.n_animals, [4, 2, 1, 4])


# --------------------------------------------------------------------------------------
# 7. boundary and invariances
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("backend", ["compiled", "numpy"])
def test_no_between_animal_variance_gives_zero(backend):
    rng = np.random.default_rng(9)
    runs = [4, 3, 5, 4, 3, 4]
    n = sum(runs)
    animal = np.repeat(np.arange(len(runs)), runs)
    s2 = rng.uniform(0.2, 1.0, (n, 3))
    y = rng.normal(size=(n, 3)) * np.sqrt(1.0 + s2)
    # remove every animal's mean deviation: the animal means are all equal, so the data
    # carry no between-animal variance beyond what the within-animal noise implies
    for a in range(len(runs)):
        y[animal == a] -= y[animal == a].mean(axis=0)
    y += 2.0
    fit = fit_reml(y, s2, np.ones((n, 1)), animal, backend=backend)
    assert np.all(fit.var_animal == 0.0)
    assert fit.converged.all()
    for v in range(3):
        theta_ref, ll_ref = dense_reml_fit(y[:, v], s2[:, v], np.ones((n, 1)), animal)
        assert theta_ref[0] <= 1e-6  # scipy finds the boundary too (Harville 1977 criterion)
        assert fit.var_run[v] == pytest.approx(theta_ref[1], rel=1e-4)
        assert fit.loglik[v] >= ll_ref - 1e-9
    # boundary component dropped from the information: zero row and column
    assert np.all(fit.cov_theta[:, 0, :] == 0.0) and np.all(fit.cov_theta[:, :, 0] == 0.0)


@pytest.mark.parametrize("backend", ["compiled", "numpy"])
def test_compiled_kernel_matches_numpy_reference(backend):
    rng = np.random.default_rng(12)
    runs = [2, 4, 3, 5, 3, 4, 1, 3]
    n = sum(runs)
    animal = np.repeat(np.arange(len(runs)), runs)
    X = np.column_stack([np.ones(n), (np.arange(len(runs)) % 2)[animal], rng.normal(size=n)])
    y, s2, X, animal = simulate(rng, runs, 300, X=X, first_level=True, tau=0.3)
    y[rng.random(y.shape) < 0.1] = np.nan
    ref = fit_reml(y, s2, X, animal, backend="numpy", chunk_size=97)
    fit = fit_reml(y, s2, X, animal, backend=backend, chunk_size=64)
    for name in ("beta", "cov_beta", "var_animal", "var_run", "cov_theta", "dcov_beta", "loglik"):
        np.testing.assert_allclose(
            getattr(fit, name), getattr(ref, name), rtol=1e-8, atol=1e-12, err_msg=name
        )
    np.testing.assert_array_equal(fit.converged, ref.converged)
    np.testing.assert_array_equal(fit.n_iter, ref.n_iter)
    assert ref.converged.all() and ref.n_iter.max() <= 20


@settings(max_examples=15, deadline=None)
@given(
    seed=st.integers(0, 2**31 - 1),
    factor=st.floats(1e-3, 1e3),
)
def test_invariances(seed, factor):
    """Reordering animals changes nothing; −y negates β; c·y scales β by c, θ by c²."""
    rng = np.random.default_rng(seed)
    runs = rng.integers(1, 5, size=6)
    runs[:2] = np.maximum(runs[:2], 2)
    n = int(runs.sum())
    animal = np.repeat(np.arange(runs.size), runs)
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    y, s2, X, animal = simulate(rng, runs, 3, X=X, first_level=True)
    base = fit_reml(y, s2, X, animal)
    # reorder animals (new codes) and runs
    perm_animals = rng.permutation(runs.size)
    order = rng.permutation(n)
    moved = fit_reml(y[order], s2[order], X[order], perm_animals[animal][order])
    np.testing.assert_allclose(moved.beta, base.beta, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(moved.var_animal, base.var_animal, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(moved.var_run, base.var_run, rtol=1e-6, atol=1e-9)
    neg = fit_reml(-y, s2, X, animal)
    np.testing.assert_allclose(neg.beta, -base.beta, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(neg.var_animal, base.var_animal, rtol=1e-6, atol=1e-9)
    scaled = fit_reml(factor * y, factor**2 * s2, X, animal)
    np.testing.assert_allclose(scaled.beta, factor * base.beta, rtol=1e-6, atol=1e-9 * factor)
    atol = 1e-8 * factor**2
    np.testing.assert_allclose(scaled.var_animal, factor**2 * base.var_animal, rtol=1e-5, atol=atol)
    np.testing.assert_allclose(scaled.var_run, factor**2 * base.var_run, rtol=1e-5, atol=atol)
    np.testing.assert_allclose(scaled.cov_beta, factor**2 * base.cov_beta, rtol=1e-5)


# --------------------------------------------------------------------------------------
# input errors
# --------------------------------------------------------------------------------------


def test_bad_inputs_raise_user_errors():
    y = np.zeros((6, 2))
    X = np.ones((6, 1))
    animal = np.repeat(np.arange(3), 2)
    with pytest.raises(UserError, match="one row per run"):
        fit_reml(y, None, np.ones((5, 1)), animal)
    with pytest.raises(UserError, match="one animal code per run"):
        fit_reml(y, None, X, animal[:5])
    with pytest.raises(UserError, match="integers"):
        fit_reml(y, None, X, np.array(list("aabbcc")))
    with pytest.raises(UserError, match="negative"):
        fit_reml(y, -np.ones((6, 2)), X, animal)
    with pytest.raises(UserError, match="one variance map per effect map"):
        fit_reml(y, np.ones((6, 3)), X, animal)
    with pytest.raises(UserError, match="no first-level variances"):
        fit_reml(y, None, X, animal, estimate_run_variance=False)
    with pytest.raises(UserError, match="variance of run 0 is 0"):
        fit_reml(y, np.zeros((6, 2)), X, animal, estimate_run_variance=False)
    with pytest.raises(UserError, match="NaN or infinite"):
        fit_reml(y, None, np.full((6, 1), np.nan), animal)
    with pytest.raises(UserError, match="backend"):
        fit_reml(y, None, X, animal, backend="gpu")


def test_result_is_frozen():
    y, _, X, animal = simulate(np.random.default_rng(0), [2, 2, 2], 1)
    fit = fit_reml(y, None, X, animal)
    assert isinstance(fit, MixedFit)
    with pytest.raises(AttributeError):
        fit.beta = None
