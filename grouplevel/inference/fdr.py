"""False discovery rate control over the voxels of one map.

A map of p-values is turned into q-values (adjusted p-values): the smallest false
discovery rate at which each voxel would be declared significant by the step-up procedure.
Two procedures are offered:

``"bh"``
    Benjamini & Hochberg (1995): valid for independent or positively dependent tests,
    the usual choice for smooth statistic maps.
``"by"``
    Benjamini & Yekutieli (2001): valid under any dependence, at the price of dividing
    the level by the harmonic sum ``1 + 1/2 + ... + 1/m``.

References
----------
Benjamini Y, Hochberg Y (1995). Controlling the false discovery rate: a practical and
powerful approach to multiple testing. J R Stat Soc B 57:289-300.

Benjamini Y, Yekutieli D (2001). The control of the false discovery rate in multiple
testing under dependency. Ann Stat 29:1165-1188.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from grouplevel.errors import ArgumentError

#: The procedures :func:`fdr` knows, by name.
FDR_METHODS = ("bh", "by")

#: Default false discovery rate (common practice).
DEFAULT_FDR_ALPHA = 0.05


@dataclass(frozen=True)
class FdrResult:
    """Outcome of a false-discovery-rate procedure on one map.

    Attributes
    ----------
    q
        Adjusted p-values (q-values), same shape as the input; NaN where p was NaN.
    threshold_p
        The largest p-value declared significant at ``alpha``; NaN when none is.
    n_significant
        Number of p-values declared significant (``q <= alpha``).
    method
        ``"bh"`` or ``"by"``.
    alpha
        The false discovery rate the decision was made at.
    """

    q: np.ndarray
    threshold_p: float
    n_significant: int
    method: str
    alpha: float


def fdr(p: np.ndarray, alpha: float = DEFAULT_FDR_ALPHA, method: str = "bh") -> FdrResult:
    """Control the false discovery rate over a map of p-values.

    Parameters
    ----------
    p
        P-values of any shape. NaN entries (voxels without a test) are ignored: they do
        not count towards the number of tests and get a NaN q-value.
    alpha
        False discovery rate to decide at, in (0, 1).
    method
        ``"bh"`` (Benjamini & Hochberg 1995) or ``"by"`` (Benjamini & Yekutieli 2001).

    Returns
    -------
    FdrResult
        q-values of the same shape as ``p``, the p-value threshold, and the count.

    Raises
    ------
    ArgumentError
        When ``alpha`` is outside (0, 1), ``method`` is unknown, or a p-value lies
        outside [0, 1].

    Notes
    -----
    With the m finite p-values sorted, :math:`p_{(1)} \\le \\dots \\le p_{(m)}`, the
    q-value of :math:`p_{(i)}` is :math:`\\min_{j \\ge i} \\min(1, c(m)\\, m\\, p_{(j)} / j)`
    with :math:`c(m) = 1` for ``"bh"`` and :math:`c(m) = \\sum_{k=1}^m 1/k` for ``"by"``.
    A voxel is significant when its q-value is at most ``alpha``; this is the step-up
    rule "reject all p up to the largest :math:`p_{(k)} \\le k\\alpha / (c(m)\\, m)`".

    References
    ----------
    Benjamini Y, Hochberg Y (1995). J R Stat Soc B 57:289-300.

    Benjamini Y, Yekutieli D (2001). Ann Stat 29:1165-1188.
    """
    if method not in FDR_METHODS:
        raise ArgumentError(
            f"FDR method {method!r} is not known; use one of {', '.join(FDR_METHODS)} "
            "('bh' for Benjamini-Hochberg, 'by' for Benjamini-Yekutieli)."
        )
    alpha = float(alpha)
    if not 0.0 < alpha < 1.0:
        raise ArgumentError(
            f"FDR level alpha = {alpha} is outside (0, 1); give a rate such as 0.05."
        )
    p = np.asarray(p, dtype=np.float64)
    finite = ~np.isnan(p)
    values = p[finite]
    if values.size and (values.min() < 0.0 or values.max() > 1.0):
        raise ArgumentError(
            f"p-values must lie in [0, 1]; found values from {values.min()} to "
            f"{values.max()}. Pass p-values, not statistics."
        )
    q = np.full(p.shape, np.nan)
    m = values.size
    if m == 0:
        return FdrResult(q=q, threshold_p=float("nan"), n_significant=0, method=method, alpha=alpha)

    order = np.argsort(values, kind="stable")
    ranks = np.arange(1, m + 1, dtype=np.float64)
    factor = np.sum(1.0 / ranks) if method == "by" else 1.0
    scaled = values[order] * (factor * m) / ranks
    # Step-up: running minimum from the largest p downwards.
    q_sorted = np.minimum.accumulate(scaled[::-1])[::-1]
    np.minimum(q_sorted, 1.0, out=q_sorted)
    q_values = np.empty(m)
    q_values[order] = q_sorted
    q[finite] = q_values

    significant = q_values <= alpha
    n_significant = int(np.count_nonzero(significant))
    threshold_p = float(values[significant].max()) if n_significant else float("nan")
    return FdrResult(
        q=q,
        threshold_p=threshold_p,
        n_significant=n_significant,
        method=method,
        alpha=alpha,
    )
