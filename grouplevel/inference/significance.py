"""The significance level and the sides of a test: one home for both.

``sided`` says which sign of the statistic counts as evidence: ``"two"`` (either sign,
each tested on its own and the p doubled), ``"positive"`` or ``"negative"`` (one-sided).
"""

from __future__ import annotations

import numpy as np

from grouplevel.distributions import t_cdf, t_sf
from grouplevel.errors import ArgumentError

#: Sides a test can have, in the order the documentation lists them.
SIDES = ("two", "positive", "negative")
#: Both signs count (common practice: a deactivation is a response too).
DEFAULT_SIDED = "two"
#: Level of every test and correction (common practice).
DEFAULT_ALPHA = 0.05


def check_sided(sided: str, name: str = "sided") -> str:
    """Return ``sided`` when it is one of :data:`SIDES`; raise otherwise.

    Raises
    ------
    ArgumentError
        When ``sided`` is not one of :data:`SIDES` (``name`` is the argument's name in
        the message).
    """
    if sided not in SIDES:
        raise ArgumentError(
            f"{name} = {sided!r} is not known; use 'two' (both signs, each tested on its "
            "own), 'positive' or 'negative'."
        )
    return sided


def sided_p(t: np.ndarray, df: np.ndarray, sided: str) -> np.ndarray:
    """p of a t statistic for the chosen side (Student's t distribution with ``df``)."""
    check_sided(sided)
    if sided == "positive":
        return t_sf(t, df)
    if sided == "negative":
        return t_cdf(t, df)
    return 2.0 * t_sf(np.abs(t), df)
