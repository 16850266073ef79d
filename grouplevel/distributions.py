"""Tail probabilities and quantiles of the reference distributions, from scipy.special.

The t, standard normal, F and χ² functions a run needs, computed by the same special
functions ``scipy.stats`` calls for them (``stdtr``/``stdtrit``, ``ndtr``/``ndtri``,
``fdtrc``/``fdtri``, ``chdtrc``), with ``scipy.stats``' handling of the edges (NaN for
parameters outside their range, 1 below the support of F and χ²), so every value equals
``scipy.stats``' bit for bit (tests/unit/test_distributions.py). Importing
``scipy.stats`` costs about 0.4 s (it loads scipy.optimize, integrate, interpolate,
sparse, spatial); a parametric run and ``grouplevel check`` need none of it. The rare
callers of other distributions (the noncentral t of the power planner, the Mann–Whitney
test) import ``scipy.stats`` themselves, when they run.

Scalars in give numpy float64 scalars out, arrays in give arrays out, as in
``scipy.stats``.
"""

from __future__ import annotations

import numpy as np
from scipy import special

__all__ = [
    "chi2_logsf",
    "chi2_sf",
    "f_logsf",
    "f_median",
    "f_sf",
    "norm_isf",
    "norm_ppf",
    "norm_sf",
    "t_cdf",
    "t_isf",
    "t_logsf",
    "t_ppf",
    "t_sf",
]


def _out(values: np.ndarray) -> np.ndarray | np.float64:
    """A 0-d result as a numpy scalar (as ``scipy.stats`` returns it)."""
    values = np.asarray(values, dtype=float)
    return values[()] if values.ndim == 0 else values


def _logsf(sf: np.ndarray, cdf: np.ndarray, above_median: np.ndarray) -> np.ndarray:
    """log P(X > x) as ``scipy.stats`` computes it for a continuous distribution: the log
    of the survival function above the median, log1p(-cdf) at or below it (each where it
    keeps its digits); -inf where the probability is 0, silently."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(above_median, np.log(sf), np.log1p(-cdf))


def _bad_df(*dfs: np.ndarray) -> np.ndarray:
    """Where a degrees-of-freedom parameter is not > 0 (NaN included)."""
    bad = np.zeros(np.broadcast(*dfs).shape, dtype=bool)
    for df in dfs:
        bad = bad | ~(np.asarray(df, dtype=float) > 0)
    return bad


def _bad_q(q: np.ndarray) -> np.ndarray:
    """Where a probability is outside [0, 1] (NaN included)."""
    q = np.asarray(q, dtype=float)
    return ~((q >= 0) & (q <= 1))


# --- Student's t --------------------------------------------------------------------


def t_sf(x, df):
    """P(T > x) for Student's t with ``df`` degrees of freedom (``scipy.stats.t.sf``)."""
    x, df = np.asarray(x, dtype=float), np.asarray(df, dtype=float)
    return _out(np.where(_bad_df(df) | np.isnan(x), np.nan, special.stdtr(df, -x)))


def t_cdf(x, df):
    """P(T ≤ x) (``scipy.stats.t.cdf``)."""
    x, df = np.asarray(x, dtype=float), np.asarray(df, dtype=float)
    return _out(np.where(_bad_df(df) | np.isnan(x), np.nan, special.stdtr(df, x)))


def t_logsf(x, df):
    """log P(T > x) (``scipy.stats.t.logsf``; -inf where it underflows)."""
    x, df = np.asarray(x, dtype=float), np.asarray(df, dtype=float)
    above = x > special.stdtrit(df, 0.5)
    value = _logsf(special.stdtr(df, -x), special.stdtr(df, x), above)
    return _out(np.where(_bad_df(df) | np.isnan(x), np.nan, value))


def _t_quantile(p: np.ndarray, df: np.ndarray) -> np.ndarray:
    """``stdtrit`` with the ends of the support at p = 0 and 1 (``stdtrit(df, 0)`` is not
    -inf), NaN outside [0, 1] or for df ≤ 0."""
    with np.errstate(invalid="ignore"):
        inner = special.stdtrit(df, p)
    value = np.where(p == 0, -np.inf, np.where(p == 1, np.inf, inner))
    return np.where(_bad_df(df) | _bad_q(p), np.nan, value)


def t_ppf(q, df):
    """The ``q`` quantile of t (``scipy.stats.t.ppf``)."""
    return _out(_t_quantile(np.asarray(q, dtype=float), np.asarray(df, dtype=float)))


def t_isf(q, df):
    """The value exceeded with probability ``q`` (``scipy.stats.t.isf``)."""
    return _out(-_t_quantile(np.asarray(q, dtype=float), np.asarray(df, dtype=float)))


# --- standard normal ----------------------------------------------------------------


def norm_sf(x):
    """P(Z > x) for the standard normal (``scipy.stats.norm.sf``)."""
    return _out(special.ndtr(-np.asarray(x, dtype=float)))


def norm_ppf(q):
    """The ``q`` quantile of the standard normal (``scipy.stats.norm.ppf``)."""
    q = np.asarray(q, dtype=float)
    return _out(np.where(_bad_q(q), np.nan, special.ndtri(q)))


def norm_isf(q):
    """The value exceeded with probability ``q`` (``scipy.stats.norm.isf``)."""
    q = np.asarray(q, dtype=float)
    return _out(np.where(_bad_q(q), np.nan, -special.ndtri(q)))


# --- F and χ² (support [0, ∞): probability 1 of exceeding a value at or below 0) ------


def _positive_support(x: np.ndarray, bad: np.ndarray, at_zero, at_inf, inside) -> np.ndarray:
    """A function of a distribution on [0, ∞): ``at_zero`` at or below 0, ``at_inf`` at
    +∞, ``inside(x)`` between (x clipped into the support while it is evaluated), NaN
    where a parameter or x is bad."""
    with np.errstate(invalid="ignore", divide="ignore"):
        middle = inside(np.clip(x, 0.0, np.finfo(float).max))
    value = np.where(x <= 0, at_zero, np.where(x == np.inf, at_inf, middle))
    return np.where(bad | np.isnan(x), np.nan, value)


def f_sf(x, dfn, dfd):
    """P(F > x) for F(``dfn``, ``dfd``) (``scipy.stats.f.sf``)."""
    x = np.asarray(x, dtype=float)
    dfn, dfd = np.asarray(dfn, dtype=float), np.asarray(dfd, dtype=float)
    bad = _bad_df(dfn, dfd)
    return _out(_positive_support(x, bad, 1.0, 0.0, lambda v: special.fdtrc(dfn, dfd, v)))


def f_logsf(x, dfn, dfd):
    """log P(F > x) (``scipy.stats.f.logsf``)."""
    x = np.asarray(x, dtype=float)
    dfn, dfd = np.asarray(dfn, dtype=float), np.asarray(dfd, dtype=float)

    def inside(v):
        above = v > special.fdtri(dfn, dfd, 0.5)
        return _logsf(special.fdtrc(dfn, dfd, v), special.fdtr(dfn, dfd, v), above)

    return _out(_positive_support(x, _bad_df(dfn, dfd), 0.0, -np.inf, inside))


def f_median(dfn, dfd):
    """The median of F(``dfn``, ``dfd``) (``scipy.stats.f.median``)."""
    dfn, dfd = np.asarray(dfn, dtype=float), np.asarray(dfd, dtype=float)
    return _out(np.where(_bad_df(dfn, dfd), np.nan, special.fdtri(dfn, dfd, 0.5)))


def chi2_sf(x, df):
    """P(χ² > x) for χ² with ``df`` degrees of freedom (``scipy.stats.chi2.sf``)."""
    x, df = np.asarray(x, dtype=float), np.asarray(df, dtype=float)
    return _out(_positive_support(x, _bad_df(df), 1.0, 0.0, lambda v: special.chdtrc(df, v)))


def chi2_logsf(x, df):
    """log P(χ² > x) (``scipy.stats.chi2.logsf``)."""
    x, df = np.asarray(x, dtype=float), np.asarray(df, dtype=float)

    def inside(v):
        above = v > 2.0 * special.gammaincinv(df / 2.0, 0.5)  # the median
        return _logsf(special.chdtrc(df, v), special.chdtr(df, v), above)

    return _out(_positive_support(x, _bad_df(df), 0.0, -np.inf, inside))
