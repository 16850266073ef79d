"""Checks of the generalised mixed model (random slopes, nested sessions, animal groups).

Outside references used below, each named beside its check:
- statsmodels ``MixedLM`` (REML; Seabold & Perktold 2010) for random slopes
  (``re_formula="1 + drug"``) and sessions nested in animals (``vc_formula``);
- the textbook REML criterion ℓ = −½[log|V| + log|XᵀV⁻¹X| + rᵀV⁻¹r + (n − p) log 2π]
  (Harville 1977, JASA 72:320) written densely here and maximised with scipy.optimize;
- scipy.stats: the binomial interval of a false-positive rate (``binomtest``), the paired
  t-test on per-animal condition differences (``ttest_1samp``) and Welch's test on animal
  means (``ttest_ind(equal_var=False)``; Welch 1947, Biometrika 34:28).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats
from statsmodels.regression.mixed_linear_model import MixedLM

from grouplevel.model import (
    MixedModelFit,
    fit_mixed,
    fit_reml,
    group_welch_df,
    mixed_satterthwaite_df,
    test_contrast,
)
from grouplevel.model.contrasts import slope_df

ALPHA = 0.05  # the conventional test level (common practice)

# --------------------------------------------------------------------------------------
# helpers: simulated designs and a dense textbook REML
# --------------------------------------------------------------------------------------


def rel(a, b):
    a, b = np.asarray(a, float), np.asarray(b, float)
    return float(np.max(np.abs(a - b) / np.maximum(np.abs(b), 1e-300)))


def dense_cov(Ts, omega2, sigma2, Z, animal, group, session, s2):
    """V = Σ_a Z_a T_g(a) Z_aᵀ + ω² [same session] + diag(σ² + s²), dense."""
    V = np.diag(sigma2 + s2)
    for a in np.unique(animal):
        rows = np.nonzero(animal == a)[0]
        V[np.ix_(rows, rows)] += Z[rows] @ Ts[group[a]] @ Z[rows].T
    if session is not None:
        V += omega2 * (session[:, None] == session[None, :])
    return V


def dense_reml(V, y, X):
    """Harville (1977) REML log-likelihood, GLS β and (XᵀV⁻¹X)⁻¹, dense."""
    Vi = np.linalg.inv(V)
    M = X.T @ Vi @ X
    b = np.linalg.solve(M, X.T @ Vi @ y)
    r = y - X @ b
    n, p = X.shape
    ll = -0.5 * (
        np.linalg.slogdet(V)[1] + np.linalg.slogdet(M)[1] + r @ Vi @ r + (n - p) * np.log(2 * np.pi)
    )
    return ll, b, np.linalg.inv(M)


class Design:
    """A model's structure for the dense reference: Z = (1, slopes), groups, sessions."""

    def __init__(self, X, animal, slopes=None, session=None, group=None, run_var=True):
        self.X, self.animal = X, animal
        n = animal.size
        sl = np.zeros((n, 0)) if slopes is None else np.asarray(slopes, float).reshape(n, -1)
        self.Z = np.column_stack([np.ones(n), sl])
        self.r = self.Z.shape[1]
        m = animal.max() + 1
        self.group = np.zeros(m, dtype=int) if group is None else np.asarray(group)
        self.n_groups = self.group.max() + 1
        self.session, self.run_var = session, run_var

    def unpack(self, x):
        """Free-sign Cholesky factors → (Ts, ω², σ²) (θ always admissible)."""
        k = self.r * (self.r + 1) // 2
        Ts = []
        for g in range(self.n_groups):
            L = np.zeros((self.r, self.r))
            L[np.tril_indices(self.r)] = x[g * k : (g + 1) * k]
            Ts.append(L @ L.T)
        i = self.n_groups * k
        omega2 = 0.0
        if self.session is not None:
            omega2, i = x[i] ** 2, i + 1
        sigma2 = x[i] ** 2 if self.run_var else 0.0
        return Ts, omega2, sigma2

    def loglik(self, Ts, omega2, sigma2, y, s2):
        V = dense_cov(Ts, omega2, sigma2, self.Z, self.animal, self.group, self.session, s2)
        return dense_reml(V, y, self.X)

    def maximise(self, y, s2, starts=4, seed=0):
        """Maximise the dense REML criterion with scipy (BFGS, several starts)."""
        rng = np.random.default_rng(seed)
        k = self.r * (self.r + 1) // 2
        n_par = self.n_groups * k + (self.session is not None) + self.run_var
        scale = np.sqrt(np.var(y))
        best = None
        for _ in range(starts):
            x0 = rng.uniform(0.3, 1.0, n_par) * scale

            def neg(x):
                ll = self.loglik(*self.unpack(x), y, s2)[0]
                return -ll if np.isfinite(ll) else 1e300

            res = optimize.minimize(neg, x0, method="BFGS", options={"gtol": 1e-10})
            if best is None or res.fun < best.fun:
                best = res
        return self.unpack(best.x), -best.fun

    def ours(self, fit: MixedModelFit, v, slope_names=(), group_names=()):
        """Our estimates at voxel v in the same (Ts, ω², σ²) form."""
        labels = ["animal"] + [f"slope[{s}]" for s in slope_names]
        Ts = []
        for g in range(self.n_groups):
            sfx = f"[{group_names[g]}]" if group_names else ""
            T = np.zeros((self.r, self.r))
            for a in range(self.r):
                T[a, a] = fit.components[labels[a] + sfx][v]
                for b in range(a):
                    name = (
                        f"cov[{slope_names[a - 1]}]"
                        if b == 0
                        else f"cov[{slope_names[b - 1]},{slope_names[a - 1]}]"
                    )
                    T[a, b] = T[b, a] = fit.components[name + sfx][v]
            Ts.append(T)
        omega2 = fit.components["session"][v] if self.session is not None else 0.0
        return Ts, omega2, fit.var_run[v]


def slope_study(rng, n_vox, m=10, runs=6, T=((1.0, 0.3), (0.3, 0.6)), noise=0.7, s2=None):
    """Animals × runs with a within-animal 0/1 drug code and a random slope."""
    animal = np.repeat(np.arange(m), runs)
    drug = np.tile(np.repeat([0.0, 1.0], runs // 2), m)
    X = np.column_stack([np.ones(animal.size), drug])
    L = np.linalg.cholesky(np.asarray(T))
    u = np.einsum("ij,mjv->miv", L, rng.normal(size=(m, 2, n_vox)))
    y = 1.0 + 0.5 * drug[:, None] + u[animal, 0] + drug[:, None] * u[animal, 1]
    var = noise**2 + (0.0 if s2 is None else s2)
    y = y + rng.normal(size=y.shape) * np.sqrt(var)
    return y, X, animal, drug


def statsmodels_fit(formula, df, **kwargs):
    model = MixedLM.from_formula(formula, df, groups="animal", **kwargs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # tight BFGS so that its optimum is comparable to 1e-4 (its default stops earlier)
        return model.fit(reml=True, method=["bfgs"], gtol=1e-12, maxiter=5000)


# --------------------------------------------------------------------------------------
# 1. statsmodels MixedLM, without first-level variances
# --------------------------------------------------------------------------------------


def test_random_slopes_match_statsmodels():
    rng = np.random.default_rng(3)
    y, X, animal, drug = slope_study(rng, 6)
    fit = fit_mixed(y, None, X, animal, slopes=drug, slope_names=["drug"])
    assert fit.converged.all()
    assert fit.component_names == ("animal", "cov[drug]", "slope[drug]", "run")
    for v in range(y.shape[1]):
        df = pd.DataFrame({"y": y[:, v], "drug": drug, "animal": animal})
        res = statsmodels_fit("y ~ drug", df, re_formula="1 + drug")
        cr = res.cov_re.to_numpy()
        # statsmodels MixedLM (REML): β, T, σ², SE to 1e-4 relative; the covariance
        # relative to √(T₀₀T₁₁), its natural scale
        assert rel(fit.beta[v], res.fe_params.to_numpy()) <= 1e-4
        assert rel(fit.components["animal"][v], cr[0, 0]) <= 1e-4
        assert rel(fit.components["slope[drug]"][v], cr[1, 1]) <= 1e-4
        cov_scale = np.sqrt(cr[0, 0] * cr[1, 1])
        assert abs(fit.components["cov[drug]"][v] - cr[0, 1]) <= 1e-4 * cov_scale
        assert rel(fit.var_run[v], res.scale) <= 1e-4
        assert rel(np.sqrt(np.diag(fit.cov_beta[v])), res.bse_fe.to_numpy()) <= 1e-4
        # the same REML log-likelihood (constants included), ours not lower
        assert fit.loglik[v] >= res.llf - 1e-8
        assert abs(fit.loglik[v] - res.llf) <= 1e-6 * abs(res.llf)


def test_nested_sessions_match_statsmodels():
    rng = np.random.default_rng(8)
    m, sessions, runs, n_vox = 8, 3, 3, 6
    animal = np.repeat(np.arange(m), sessions * runs)
    session = np.repeat(np.arange(m * sessions), runs)
    n = animal.size
    x = rng.normal(size=n)
    X = np.column_stack([np.ones(n), x])
    u = rng.normal(size=(m, n_vox))
    w = rng.normal(size=(m * sessions, n_vox)) * 0.8
    y = 1.0 + 0.3 * x[:, None] + u[animal] + w[session] + rng.normal(size=(n, n_vox)) * 0.6
    fit = fit_mixed(y, None, X, animal, session=session)
    assert fit.converged.all()
    assert fit.component_names == ("animal", "session", "run")
    for v in range(n_vox):
        df = pd.DataFrame({"y": y[:, v], "x": x, "animal": animal, "session": session})
        res = statsmodels_fit("y ~ x", df, re_formula="1", vc_formula={"session": "0 + C(session)"})
        # statsmodels MixedLM (REML) with a variance component for sessions in animals
        assert rel(fit.beta[v], res.fe_params.to_numpy()) <= 1e-4
        assert rel(fit.var_animal[v], res.cov_re.to_numpy()[0, 0]) <= 1e-4
        assert rel(fit.components["session"][v], res.vcomp[0]) <= 1e-4
        assert rel(fit.var_run[v], res.scale) <= 1e-4
        # model-based SE √diag((XᵀV⁻¹X)⁻¹) with a dense V from statsmodels' estimates
        # (its own bse_fe inverts the joint observed Hessian of β and the variance
        # parameters, which differs from the model-based SE by up to ~1% here)
        Z = np.ones((n, 1))
        T = [res.cov_re.to_numpy()]
        V = dense_cov(T, res.vcomp[0], res.scale, Z, animal, [0] * m, session, np.zeros(n))
        se_dense = np.sqrt(np.diag(dense_reml(V, y[:, v], X)[2]))
        assert rel(np.sqrt(np.diag(fit.cov_beta[v])), se_dense) <= 1e-4
        assert fit.loglik[v] >= res.llf - 1e-8
        assert abs(fit.loglik[v] - res.llf) <= 1e-6 * abs(res.llf)


# --------------------------------------------------------------------------------------
# 2. with first-level variances: the dense textbook REML maximised by scipy
# --------------------------------------------------------------------------------------


def _check_against_dense(design, fit, y, s2, v, slope_names=(), group_names=(), rtol=1e-4):
    Ts, omega2, sigma2 = design.ours(fit, v, slope_names, group_names)
    s2v = np.zeros(y.shape[0]) if s2 is None else s2[:, v]
    # Harville (1977) REML criterion, dense, at our estimate: same ℓ, β and (XᵀV⁻¹X)⁻¹
    ll, b, cov = design.loglik(Ts, omega2, sigma2, y[:, v], s2v)
    assert abs(ll - fit.loglik[v]) <= 1e-9 * (1 + abs(ll))
    np.testing.assert_allclose(fit.beta[v], b, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(fit.cov_beta[v], cov, rtol=1e-9, atol=1e-14)
    # the maximum: scipy finds no better point, and the same estimates
    (Ts_ref, omega2_ref, sigma2_ref), ll_ref = design.maximise(y[:, v], s2v)
    assert fit.loglik[v] >= ll_ref - 1e-8
    assert abs(fit.loglik[v] - ll_ref) <= 1e-7 * (1 + abs(ll_ref))
    scale = np.var(y[:, v])
    for T, T_ref in zip(Ts, Ts_ref, strict=True):
        np.testing.assert_allclose(T, T_ref, rtol=rtol, atol=rtol * scale)
    assert omega2 == pytest.approx(omega2_ref, rel=rtol, abs=rtol * scale)
    assert sigma2 == pytest.approx(sigma2_ref, rel=rtol, abs=rtol * scale)


def _session_slope_study(rng, n_vox, m=6, sessions=2, runs=4):
    animal = np.repeat(np.arange(m), sessions * runs)
    session = np.repeat(np.arange(m * sessions), runs)
    n = animal.size
    cond = np.tile([-0.5, 0.5], n // 2)
    X = np.column_stack([np.ones(n), cond])
    s2 = rng.uniform(0.1, 0.6, (n, n_vox))
    u0 = rng.normal(size=(m, n_vox))
    u1 = rng.normal(size=(m, n_vox)) * 1.2
    w = rng.normal(size=(m * sessions, n_vox)) * 0.7
    e = rng.normal(size=(n, n_vox)) * np.sqrt(0.3 + s2)
    y = 0.5 + u0[animal] + cond[:, None] * u1[animal] + w[session] + e
    return y, s2, X, animal, session, cond


def test_slopes_sessions_and_first_level_variances_match_dense_reml():
    rng = np.random.default_rng(21)
    y, s2, X, animal, session, cond = _session_slope_study(rng, 3)
    fit = fit_mixed(y, s2, X, animal, slopes=cond, slope_names=["cond"], session=session)
    assert fit.converged.all()
    design = Design(X, animal, slopes=cond, session=session)
    for v in range(y.shape[1]):
        _check_against_dense(design, fit, y, s2, v, slope_names=("cond",))


def test_per_group_variances_match_dense_reml():
    rng = np.random.default_rng(4)
    group = np.array([0] * 5 + [1] * 6)
    runs = 4
    animal = np.repeat(np.arange(group.size), runs)
    n = animal.size
    X = np.column_stack([np.ones(n), group[animal]])
    n_vox = 3
    sd = np.where(group == 0, 1.6, 0.6)
    s2 = rng.uniform(0.1, 0.5, (n, n_vox))
    u = rng.normal(size=(group.size, n_vox)) * sd[:, None]
    y = u[animal] + rng.normal(size=(n, n_vox)) * np.sqrt(0.4 + s2)
    names = ("sham", "lesion")
    fit = fit_mixed(y, s2, X, animal, animal_group=group, group_names=names)
    assert fit.converged.all()
    assert fit.component_names == ("animal[sham]", "animal[lesion]", "run")
    design = Design(X, animal, group=group)
    for v in range(n_vox):
        _check_against_dense(design, fit, y, s2, v, group_names=names)


def test_missing_runs_are_exactly_left_out():
    rng = np.random.default_rng(12)
    y, s2, X, animal, session, cond = _session_slope_study(rng, 4)
    y[[1, 6, 17], 0] = np.nan  # runs missing at voxel 0
    s2[[3, 30], 1] = np.nan  # variance missing at voxel 1
    y[8:16, 2] = np.nan  # a whole animal missing at voxel 2
    kw = {"slopes": cond, "slope_names": ["cond"], "session": session}
    fit = fit_mixed(y, s2, X, animal, **kw)
    assert fit.converged.all()
    for v in range(3):
        keep = np.isfinite(y[:, v]) & np.isfinite(s2[:, v])
        codes = np.unique(animal[keep], return_inverse=True)[1]
        alone = fit_mixed(
            y[keep, v],
            s2[keep, v],
            X[keep],
            codes,
            slopes=cond[keep],
            slope_names=["cond"],
            session=session[keep],
        )
        # the fit of the present runs alone (dense check of that fit below)
        assert fit.n_runs[v] == keep.sum()
        assert fit.loglik[v] == pytest.approx(alone.loglik[0], rel=1e-9)
        np.testing.assert_allclose(fit.beta[v], alone.beta[0], rtol=1e-6, atol=1e-9)
        for name in fit.component_names:
            assert fit.components[name][v] == pytest.approx(
                alone.components[name][0], rel=1e-5, abs=1e-7
            )
        design = Design(X[keep], codes, slopes=cond[keep], session=session[keep])
        Ts, omega2, sigma2 = design.ours(fit, v, ("cond",))
        ll, _, _ = design.loglik(Ts, omega2, sigma2, y[keep, v], s2[keep, v])
        assert ll == pytest.approx(fit.loglik[v], rel=1e-9)  # Harville (1977), dense
    assert fit.n_animals[2] == 5


# --------------------------------------------------------------------------------------
# 3. the random-intercept special case equals fit_reml
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("with_variance", [False, True])
def test_random_intercept_case_equals_fit_reml(with_variance):
    rng = np.random.default_rng(30 + with_variance)
    runs = [3, 4, 2, 5, 3, 4, 3]
    animal = np.repeat(np.arange(len(runs)), runs)
    n, n_vox = animal.size, 200
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    u = rng.normal(size=(len(runs), n_vox)) * 0.8
    s2 = rng.uniform(0.1, 1.0, (n, n_vox)) if with_variance else None
    noise = 0.5 + (0.0 if s2 is None else s2)
    y = (X @ [1.0, 0.5])[:, None] + u[animal] + rng.normal(size=(n, n_vox)) * np.sqrt(noise)
    y[2, :40] = np.nan
    ref = fit_reml(y, s2, X, animal)
    fit = fit_mixed(y, s2, X, animal)
    assert fit.converged.all() and ref.converged.all()
    # grouplevel.model.fit_reml, itself checked against statsmodels, R and published data
    assert rel(fit.beta, ref.beta) <= 1e-6
    assert rel(fit.cov_beta, ref.cov_beta) <= 1e-6
    assert rel(fit.loglik, ref.loglik) <= 1e-9
    interior = ref.var_animal > 1e-3 * ref.var_run
    assert rel(fit.var_animal[interior], ref.var_animal[interior]) <= 1e-6
    assert np.all(np.abs(fit.var_animal[~interior] - ref.var_animal[~interior]) <= 1e-8)
    inside = ref.var_run > 1e-3 * ref.var_animal
    assert rel(fit.var_run[inside], ref.var_run[inside]) <= 1e-6
    assert np.all(np.abs(fit.var_run[~inside] - ref.var_run[~inside]) <= 1e-8)


# --------------------------------------------------------------------------------------
# 4. boundaries: zero variances and positive semi-definite T
# --------------------------------------------------------------------------------------


def test_variance_estimated_at_zero():
    rng = np.random.default_rng(40)
    m, runs, n_vox = 8, 4, 300
    animal = np.repeat(np.arange(m), runs)
    session = np.repeat(np.arange(m * 2), runs // 2)
    n = animal.size
    X = np.ones((n, 1))
    # no animal and no session effect: their REML estimates are often exactly at 0
    y = rng.normal(size=(n, n_vox))
    fit = fit_mixed(y, None, X, animal, session=session)
    assert fit.converged.all()
    tiny = 1e-8 * fit.var_run
    at_zero = (fit.var_animal <= tiny) & (fit.components["session"] <= tiny)
    assert 10 <= at_zero.sum() < n_vox
    assert np.all(fit.var_animal >= 0) and np.all(fit.components["session"] >= 0)
    design = Design(X, animal, session=session)
    for v in np.nonzero(at_zero)[0][:3]:
        # Harville (1977) criterion maximised by scipy: no better point, same estimates
        (Ts, omega2, sigma2), ll_ref = design.maximise(y[:, v], np.zeros(n))
        assert fit.loglik[v] >= ll_ref - 1e-8
        assert Ts[0][0, 0] <= 1e-4 and omega2 <= 1e-4
        assert fit.var_run[v] == pytest.approx(sigma2, rel=1e-4)


def test_animal_covariance_is_positive_semi_definite():
    rng = np.random.default_rng(41)
    m, runs, n_vox = 6, 6, 400
    animal = np.repeat(np.arange(m), runs)
    n = animal.size
    s = np.column_stack([np.tile([-0.5, 0.5], n // 2), np.tile([-1.0, 0.0, 1.0], n // 3)])
    X = np.column_stack([np.ones(n), s])
    # small slope variances next to the run noise: T is often estimated singular
    u = rng.normal(size=(m, 3, n_vox)) * np.array([1.0, 0.3, 0.3])[None, :, None]
    y = u[animal, 0] + s[:, :1] * u[animal, 1] + s[:, 1:] * u[animal, 2]
    y = y + rng.normal(size=(n, n_vox))
    names = ("a", "b")
    fit = fit_mixed(y, None, X, animal, slopes=s, slope_names=names)
    # with two slopes and T often of rank one, a few voxels stall on a ridge of the
    # likelihood and are flagged (measured 8 of 400); our own bound
    assert fit.converged.mean() >= 0.97
    design = Design(X, animal, slopes=s)
    T = np.stack([design.ours(fit, v, names)[0][0] for v in range(n_vox)])
    lam = np.linalg.eigvalsh(T)
    # positive semi-definite (common practice: to rounding, relative to the largest)
    assert np.all(lam[:, 0] >= -1e-10 * np.maximum(lam[:, -1], 1e-300))
    singular = lam[:, 0] <= 1e-6 * lam[:, -1]
    assert singular.sum() >= 20  # the boundary is actually reached
    for v in np.nonzero(singular & fit.converged)[0][:4]:
        # Harville (1977) criterion maximised by scipy over all PSD T: no better point
        _, ll_ref = design.maximise(y[:, v], np.zeros(n), starts=3)
        assert fit.loglik[v] >= ll_ref - 1e-6


# --------------------------------------------------------------------------------------
# 5. Satterthwaite pieces against dense formulas
# --------------------------------------------------------------------------------------


def test_information_pieces_match_dense_formulas():
    rng = np.random.default_rng(50)
    y, s2, X, animal, session, cond = _session_slope_study(rng, 2)
    fit = fit_mixed(y, s2, X, animal, slopes=cond, slope_names=["cond"], session=session)
    design = Design(X, animal, slopes=cond, session=session)
    n = animal.size
    for v in range(2):
        Ts, omega2, sigma2 = design.ours(fit, v, ("cond",))
        theta0 = np.array([Ts[0][0, 0], Ts[0][1, 0], Ts[0][1, 1], omega2, sigma2])

        def phi(theta, v=v):
            T = np.array([[theta[0], theta[1]], [theta[1], theta[2]]])
            return design.loglik([T], theta[3], theta[4], y[:, v], s2[:, v])[2]

        # ∂(XᵀV⁻¹X)⁻¹/∂θ_j by central differences of the dense matrix (Harville 1977)
        h = 1e-6
        for j in range(5):
            e = np.zeros(5)
            e[j] = h
            num = (phi(theta0 + e) - phi(theta0 - e)) / (2 * h)
            np.testing.assert_allclose(fit.dcov_beta_components[v, j], num, rtol=1e-5, atol=1e-9)
        # expected information ½ tr(P G_i P G_j), dense; its inverse is cov_components
        G = []
        Z = design.Z
        for a, b in ((0, 0), (1, 0), (1, 1)):
            E = np.zeros((2, 2))
            E[a, b] = E[b, a] = 1.0
            G.append(dense_cov([E], 0.0, 0.0, Z, animal, design.group, None, np.zeros(n)))
        G.append((session[:, None] == session[None, :]).astype(float))
        G.append(np.eye(n))
        T = Ts[0]
        V = dense_cov([T], omega2, sigma2, Z, animal, design.group, session, s2[:, v])
        Vi = np.linalg.inv(V)
        P = Vi - Vi @ X @ np.linalg.solve(X.T @ Vi @ X, X.T @ Vi)
        F = np.array([[0.5 * np.trace(P @ Gi @ P @ Gj) for Gj in G] for Gi in G])
        np.testing.assert_allclose(fit.cov_components[v], np.linalg.inv(F), rtol=1e-6)


# --------------------------------------------------------------------------------------
# 6. null calibration: every voxel an independent null study
# --------------------------------------------------------------------------------------


def _rate_and_interval(p):
    k = int(np.sum(p < ALPHA))
    ci = stats.binomtest(k, p.size).proportion_ci(confidence_level=0.95)
    return k / p.size, ci


@pytest.mark.parametrize(("slope_sd", "noise"), [(1.5, 0.4), (1.0, 0.7)])
def test_within_animal_effect_with_random_slope_is_calibrated(slope_sd, noise):
    # 6 animals × 4 runs, 2 conditions; the condition effect differs between animals
    rng = np.random.default_rng(60)
    m, n_vox = 6, 3000
    animal = np.repeat(np.arange(m), 4)
    cond = np.tile([-0.5, -0.5, 0.5, 0.5], m)
    n = animal.size
    X = np.column_stack([np.ones(n), cond])
    u0 = rng.normal(size=(m, n_vox))
    u1 = rng.normal(size=(m, n_vox)) * slope_sd
    s2 = rng.uniform(0.5, 1.5, (n, n_vox)) * noise**2 / 2
    y = u0[animal] + cond[:, None] * u1[animal]
    y = y + rng.normal(size=(n, n_vox)) * np.sqrt(noise**2 / 2 + s2)
    fit = fit_mixed(y, s2, X, animal, slopes=cond, slope_names=["cond"])
    assert fit.converged.mean() >= 0.995
    # the maps' rule (grouplevel.model.contrasts.slope_df): animals informative on the
    # slope − rank of the slope's animal-level design (the intercept)
    df = slope_df(X, animal, np.isfinite(y), 1, np.ones((m, 1)))
    assert np.all(df == m - 1)
    res = test_contrast(fit, [0, 1], df)
    rate, ci = _rate_and_interval(res.p[fit.converged])
    if slope_sd > noise * 2:
        # scipy.stats.binomtest: α = 0.05 lies in the 95% interval of the observed rate
        assert ci.low <= ALPHA <= ci.high, (rate, ci)
    else:
        # slope variance comparable to the run noise: T often on its boundary, which
        # makes the test conservative (measured about 0.04), never anti-conservative
        assert ci.low <= ALPHA, (rate, ci)
        assert rate >= 0.025
    # the paired t-test on per-animal differences (scipy.stats.ttest_1samp) on the same
    # voxels rejects at a comparable rate (common practice: the classic analysis of a
    # balanced within-animal design)
    d = np.stack(
        [
            y[(animal == a) & (cond > 0)].mean(0) - y[(animal == a) & (cond < 0)].mean(0)
            for a in range(m)
        ]
    )
    paired = np.mean(stats.ttest_1samp(d, 0.0).pvalue < ALPHA)
    assert abs(rate - paired) <= 0.02
    # without the random slope the same test is anti-conservative (the known defect)
    plain = fit_reml(y, s2, X, animal)
    from grouplevel.model import between_animal_df

    wrong = test_contrast(plain, [0, 1], between_animal_df(X, animal, np.isfinite(y), [0, 1]))
    assert np.mean(wrong.p < ALPHA) > 0.08


def test_group_difference_with_per_group_variances_is_calibrated():
    # 4 vs 8 animals × 3 runs; the smaller group twice as variable between animals
    rng = np.random.default_rng(61)
    group = np.array([0] * 4 + [1] * 8)
    m, runs, n_vox = group.size, 3, 4000
    animal = np.repeat(np.arange(m), runs)
    n = animal.size
    X = np.column_stack([np.ones(n), group[animal] - 0.5])
    sd = np.where(group == 0, np.sqrt(2.0), 1.0)
    y = (rng.normal(size=(m, n_vox)) * sd[:, None])[animal]
    y = y + rng.normal(size=(n, n_vox)) * 0.7
    fit = fit_mixed(y, None, X, animal, animal_group=group, group_names=["small", "large"])
    assert fit.converged.all()
    df = group_welch_df(fit, [0, 1], X, animal, group)
    res = test_contrast(fit, [0, 1], df)
    rate, ci = _rate_and_interval(res.p)
    # scipy.stats.binomtest: α = 0.05 lies in the 95% interval of the observed rate
    assert ci.low <= ALPHA <= ci.high, (rate, ci)
    # Welch's test on the animal means (scipy.stats.ttest_ind, equal_var=False) — the
    # classic answer for this balanced design — rejects at the same rate
    means = np.stack([y[animal == a].mean(axis=0) for a in range(m)])
    welch = stats.ttest_ind(means[group == 0], means[group == 1], equal_var=False)
    assert abs(rate - np.mean(welch.pvalue < ALPHA)) <= 0.005
    # the pooled-variance model with df = animals − 2 is anti-conservative here
    pooled = test_contrast(fit_reml(y, None, X, animal), [0, 1], m - 2)
    assert np.mean(pooled.p < ALPHA) > ci.high


def test_within_animal_effect_with_nested_sessions_is_calibrated():
    # 6 animals × 4 sessions (2 drug, 2 vehicle) × 2 runs, session and slope variance
    rng = np.random.default_rng(62)
    m, n_vox = 6, 2500
    animal = np.repeat(np.arange(m), 8)
    session = np.repeat(np.arange(m * 4), 2)
    drug = np.tile([-0.5, -0.5, 0.5, 0.5, -0.5, -0.5, 0.5, 0.5], m)
    n = animal.size
    X = np.column_stack([np.ones(n), drug])
    u0 = rng.normal(size=(m, n_vox))
    u1 = rng.normal(size=(m, n_vox)) * 1.5
    w = rng.normal(size=(m * 4, n_vox)) * 0.5
    y = u0[animal] + drug[:, None] * u1[animal] + w[session]
    y = y + rng.normal(size=(n, n_vox)) * 0.5
    fit = fit_mixed(y, None, X, animal, slopes=drug, slope_names=["drug"], session=session)
    assert fit.converged.mean() >= 0.995
    df = slope_df(X, animal, np.isfinite(y), 1, np.ones((m, 1)))
    res = test_contrast(fit, [0, 1], df)
    rate, ci = _rate_and_interval(res.p[fit.converged])
    # scipy.stats.binomtest: α = 0.05 lies in the 95% interval of the observed rate
    assert ci.low <= ALPHA <= ci.high, (rate, ci)


# --------------------------------------------------------------------------------------
# 7. the result and bad arguments
# --------------------------------------------------------------------------------------


def test_result_works_with_test_contrast_and_refuses_the_old_satterthwaite():
    rng = np.random.default_rng(70)
    y, X, animal, drug = slope_study(rng, 20)
    fit = fit_mixed(y, None, X, animal, slopes=drug, slope_names=["drug"])
    res = test_contrast(fit, [0, 1], 9)
    np.testing.assert_allclose(res.effect, fit.beta[:, 1])
    np.testing.assert_allclose(res.se, np.sqrt(fit.cov_beta[:, 1, 1]))
    from grouplevel.model import satterthwaite_df

    with pytest.raises(ValueError, match="mixed_satterthwaite_df"):
        satterthwaite_df(fit, [0, 1])
    df = mixed_satterthwaite_df(fit, [0, 1])
    assert np.all((df > 1) & (df < 60))
    with pytest.raises(AttributeError):
        fit.beta = None  # frozen


def test_memory_budget_does_not_change_the_fit():
    rng = np.random.default_rng(71)
    y, X, animal, drug = slope_study(rng, 300)
    a = fit_mixed(y.astype(np.float32), None, X, animal, slopes=drug)
    b = fit_mixed(y.astype(np.float32), None, X, animal, slopes=drug, memory_gb=1e-4)
    np.testing.assert_array_equal(a.beta, b.beta)
    np.testing.assert_array_equal(a.loglik, b.loglik)


def test_bad_arguments_raise_value_errors():
    rng = np.random.default_rng(72)
    y, X, animal, drug = slope_study(rng, 4, m=4, runs=4)
    cases = [
        ({"X": X[:-1]}, "X must be"),
        ({"animal": animal[:-1]}, "animal must have one entry"),
        ({"animal": animal + 0.5}, "integer codes"),
        ({"animal": animal * 2}, "without gaps"),
        ({"variance": -np.ones_like(y)}, "≥ 0"),
        ({"slopes": drug[:-1]}, "slopes must be"),
        ({"slopes": drug, "slope_names": ["a", "b"]}, "distinct slope_names"),
        ({"session": np.zeros(animal.size, dtype=int)}, "occurs in two animals"),
        ({"animal_group": [0, 1]}, "animal_group must have one entry"),
        ({"animal_group": [0, 2, 0, 2]}, "without gaps"),
        ({"estimate_run_variance": False}, "must be given"),
        ({"max_iter": 0}, "max_iter"),
        ({"memory_gb": -1.0}, "memory_gb"),
    ]
    for change, message in cases:
        args = {"y": y, "variance": None, "X": X, "animal": animal, "slopes": None}
        args.update(change)
        kw = {k: v for k, v in args.items() if k not in ("y", "variance", "X", "animal")}
        with pytest.raises(ValueError, match=message):
            fit_mixed(args["y"], args["variance"], args["X"], args["animal"], **kw)


def test_compiled_block_inverse_matches_numpy_linalg():
    from grouplevel.model.mixed import _cholesky_inverse

    rng = np.random.default_rng(73)
    B = rng.normal(size=(50, 3, 5, 5))
    V = B @ np.swapaxes(B, -1, -2) + 0.1 * np.eye(5)
    V[0, 0] = -np.eye(5)  # not positive definite: flagged
    inv, logdet, ok = _cholesky_inverse(V)
    good = np.ones((50, 3), dtype=bool)
    good[0, 0] = False
    np.testing.assert_array_equal(ok, good)
    # numpy.linalg.inv and slogdet (LAPACK) as the reference
    np.testing.assert_allclose(inv[good], np.linalg.inv(V[good]), rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(logdet[good], np.linalg.slogdet(V[good])[1], rtol=1e-12)


def test_unfittable_voxels_are_flagged_not_silent():
    rng = np.random.default_rng(74)
    y, X, animal, drug = slope_study(rng, 4, m=4, runs=4)
    y[:, 1] = np.nan  # no data
    y[1:, 2] = np.nan  # one run: fewer runs than design columns
    y[:, 3] = 2.0  # no variation and no first-level variances
    fit = fit_mixed(y, None, X, animal, slopes=drug)
    assert fit.converged[0] and not fit.converged[1:].any()
    assert np.isnan(fit.beta[1:]).all() and np.isnan(fit.loglik[1:]).all()
    assert np.isnan(fit.components["slope[0]"][1:]).all()
    assert list(fit.n_runs) == [16, 0, 1, 16]
    assert list(fit.n_animals) == [4, 0, 1, 4]


# --------------------------------------------------------------------------------------
# 8. compiled kernels against numpy references
# --------------------------------------------------------------------------------------


def information_reference(st, ev):
    """numpy reference of the compiled score and information (batched dense products).

    With P = V⁻¹ − V⁻¹X(XᵀV⁻¹X)⁻¹XᵀV⁻¹ and Py = Ã r (Harville 1977):
    ∂ℓ/∂θ_j = −½ tr(P G_j) + ½ yᵀP G_j P y, F_ij = ½ tr(P G_i P G_j) and
    ∂²ℓ/∂θ_i∂θ_j = F_ij − yᵀP G_i P G_j P y, each trace split into per-animal sums.
    """
    A, E, Minv, a = ev["A"], ev["E"], ev["Minv"], ev["a"]
    c, m, w, p = E.shape
    J = st.J
    B = A[:, None] @ st.G[None]  # (c, J, m, w, w): Ã G_j
    tr_ag = np.trace(B, axis1=-2, axis2=-1).sum(axis=-1)
    Bt = np.swapaxes(B, -1, -2).reshape(c, J, -1)
    tr_bb = B.reshape(c, J, -1) @ np.swapaxes(Bt, 1, 2)  # tr(Ã G_i Ã G_j)
    del B, Bt
    CG = st.G[None] @ E[:, None]  # (c, J, m, w, p): G_j Ã X
    Ef = E.reshape(c, 1, m * w, p)
    Q = np.swapaxes(Ef, -1, -2) @ CG.reshape(c, J, m * w, p)  # XᵀÃ G_j Ã X
    ACG = A[:, None] @ CG
    Cf = np.moveaxis(CG, 4, 2).reshape(c, J * p, -1)
    ACf = np.moveaxis(ACG, 4, 2).reshape(c, J * p, -1)
    R = (Cf @ np.swapaxes(ACf, 1, 2)).reshape(c, J, p, J, p)
    tr_mr = np.sum(R * np.swapaxes(Minv, 1, 2)[:, None, :, None, :], axis=(2, 4))
    MQ = Minv[:, None] @ Q
    tr_mqmq = MQ.reshape(c, J, -1) @ np.swapaxes(MQ, -1, -2).reshape(c, J, -1).transpose(0, 2, 1)
    F = 0.5 * (tr_bb - 2.0 * tr_mr + tr_mqmq)
    F = 0.5 * (F + np.swapaxes(F, 1, 2))
    tr_mq = np.trace(MQ, axis1=-2, axis2=-1)
    Ga = (st.G[None] @ a[:, None, :, :, None]).reshape(c, J, m * w)  # G_j P y
    af = a.reshape(c, m * w, 1)
    g = -0.5 * (tr_ag - tr_mq) + 0.5 * (Ga @ af)[..., 0]
    AGa = (A[:, None] @ Ga.reshape(c, J, m, w, 1)).reshape(c, J, m * w)
    W1 = Ga @ np.swapaxes(AGa, 1, 2)
    EGa = Ga @ Ef[:, 0]  # (c, J, p)
    W2 = EGa @ Minv @ np.swapaxes(EGa, 1, 2)
    H = F - (W1 - W2)
    H = 0.5 * (H + np.swapaxes(H, 1, 2))
    return g, F, H, Q


def test_compiled_information_matches_numpy_reference():
    import grouplevel.model.mixed as mm

    rng = np.random.default_rng(75)
    y, s2, X, animal, session, cond = _session_slope_study(rng, 30)
    y[[2, 9], :10] = np.nan  # missing runs decouple in both versions
    group = np.array([0, 1, 0, 1, 0, 1])
    fit_args = (X, animal, cond[:, None], ("c",), session, group, ("a", "b"), True)
    st = mm._Structure(*fit_args)
    idx = np.arange(30)
    pres = mm._layout(st, np.isfinite(y), idx, 0.0)
    yc = np.where(pres > 0, mm._layout(st, y, idx, 0.0), 0.0)
    vc = np.where(pres > 0, mm._layout(st, s2, idx, 0.0), 0.0)
    n_obs = pres.sum(axis=(1, 2))
    yc, vc, _, _, phi = mm._scale_and_start(st, yc, vc, pres, n_obs)
    ev = mm._evaluate(st, phi, yc, vc, pres, n_obs)
    for got, want in zip(mm._information(st, ev), information_reference(st, ev), strict=True):
        np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
