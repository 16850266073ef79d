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
    down = leave_one_animal_out(y, s2, X, animal, c, fit.var_animal, fit.var_run, chunk=7)
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
    down = leave_one_animal_out(y, None, X, animal, c, fit.var_animal, fit.var_run)
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
