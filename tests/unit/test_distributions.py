"""grouplevel.distributions against scipy.stats (the reference library), bit for bit.

Each function is documented as equal to its ``scipy.stats`` counterpart; these checks
compare both on grids that include the edges (0, ±inf, NaN, parameters ≤ 0 or NaN,
probabilities 0, 1 and outside [0, 1], tails far enough to underflow).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from grouplevel import distributions as dist

X = np.array(
    [-np.inf, -1e3, -40.0, -3.0, -1.0, -1e-300, 0.0, 1e-12, 0.5, 1.0, 2.0, 3.3, 8.0, 40.0,
     1e3, 1e300, np.inf, np.nan]
)  # fmt: skip
DF = np.array([-1.0, 0.0, 1e-3, 0.5, 1.0, 2.5, 9.0, 30.0, 1e6, np.inf, np.nan])
Q = np.array([-0.1, 0.0, 1e-300, 1e-20, 1e-3, 0.025, 0.5, 0.975, 1 - 1e-16, 1.0, 1.1, np.nan])


def _same(a, b):
    """Equal bit for bit, NaN where NaN, and the same kind (scalar or array)."""
    assert np.shape(a) == np.shape(b)
    assert np.isscalar(a) == np.isscalar(b) or (np.ndim(a) == 0 and np.ndim(b) == 0)
    np.testing.assert_array_equal(np.asarray(a), np.asarray(b))


@pytest.mark.parametrize("name", ["sf", "cdf", "logsf"])
def test_t_tails_equal_scipy_stats(name):
    # reference: scipy.stats.t
    x, df = np.meshgrid(X, DF)
    with np.errstate(all="ignore"):
        ref = getattr(stats.t, name)(x, df)
    _same(getattr(dist, f"t_{name}")(x, df), ref)
    _same(getattr(dist, f"t_{name}")(2.0, 7.0), getattr(stats.t, name)(2.0, 7.0))


@pytest.mark.parametrize("name", ["ppf", "isf"])
def test_t_quantiles_equal_scipy_stats(name):
    # reference: scipy.stats.t
    q, df = np.meshgrid(Q, DF)
    with np.errstate(all="ignore"):
        ref = getattr(stats.t, name)(q, df)
    _same(getattr(dist, f"t_{name}")(q, df), ref)
    _same(getattr(dist, f"t_{name}")(0.975, 9.0), getattr(stats.t, name)(0.975, 9.0))


def test_normal_equals_scipy_stats():
    # reference: scipy.stats.norm
    _same(dist.norm_sf(X), stats.norm.sf(X))
    _same(dist.norm_ppf(Q), stats.norm.ppf(Q))
    _same(dist.norm_isf(Q), stats.norm.isf(Q))
    _same(dist.norm_isf(0.001), stats.norm.isf(0.001))
    _same(dist.norm_ppf(0.975), stats.norm.ppf(0.975))
    # a handbook value (from memory, common practice): the two-sided 95 % normal quantile
    assert dist.norm_ppf(0.975) == pytest.approx(1.959964, abs=1e-6)


@pytest.mark.parametrize("name", ["sf", "logsf"])
def test_f_and_chi2_tails_equal_scipy_stats(name):
    # reference: scipy.stats.f and scipy.stats.chi2
    x, dfn, dfd = np.meshgrid(X, DF, DF[[0, 2, 4, 6, 8, 9, 10]], indexing="ij")
    with np.errstate(all="ignore"):
        ref_f = getattr(stats.f, name)(x, dfn, dfd)
        ref_c = getattr(stats.chi2, name)(x[..., 0], dfn[..., 0])
    _same(getattr(dist, f"f_{name}")(x, dfn, dfd), ref_f)
    _same(getattr(dist, f"chi2_{name}")(x[..., 0], dfn[..., 0]), ref_c)
    _same(getattr(dist, f"f_{name}")(3.1, 2, 17), getattr(stats.f, name)(3.1, 2, 17))
    _same(getattr(dist, f"chi2_{name}")(3.1, 2), getattr(stats.chi2, name)(3.1, 2))


def test_f_median_equals_scipy_stats():
    # reference: scipy.stats.f.median
    dfn, dfd = np.meshgrid(DF, DF)
    with np.errstate(all="ignore"):
        ref = stats.f.median(dfn, dfd)
    _same(dist.f_median(dfn, dfd), ref)
    _same(dist.f_median(3.0, 12.0), stats.f.median(3.0, 12.0))
