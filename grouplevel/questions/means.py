"""Is a group contrast the mean response of a set of animals, or a difference?

The reviewer's questions (is the response bilateral, specific to the target, consistent
across animals) are questions about a *response*: the mean effect of a set of animals.
A contrast ``c`` of the group coefficients ``β`` estimates such a mean when ``cᵀβ`` is a
weighted average of the expected responses of the design's rows: ``c = Aᵀw`` with
weights ``w`` that sum to 1, where ``A`` holds one row per animal (or per run for a
design that varies within animals). It estimates a difference (a group difference, a
drug-minus-vehicle contrast, a slope) when the weights sum to 0.

When the design spans the constant (an intercept, or one indicator per level) the sum of
the weights is the same for every ``w`` that solves ``Aᵀw = c``: with ``1 = A b``,
``Σw = 1ᵀw = bᵀAᵀw = bᵀc``. A mean must also be an average of animals that exist:
some solution must have non-negative weights (checked by non-negative least squares),
otherwise ``c`` is a response outside the animals' range, such as the intercept of an
uncentred covariate (the response at dose 0 when every animal had a dose).

Examples: in an intercept-only design ``c = [1]`` is the mean of all animals; with a
centred covariate ``[1, 0]`` is still the mean of all animals (the covariate's rows
average to 0); in treatment coding ``Intercept + group[T.b]`` the contrast ``[1, 1]`` is
the mean of group b, ``[1, 0]`` the mean of the reference group and ``[0, 1]`` their
difference.

Pure: arrays in, a frozen dataclass out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Kinds of contrast told apart.
MEAN = "mean"
DIFFERENCE = "difference"
OTHER = "other"

#: Relative tolerance of the weight sum and of the solve (our own choice: far above the
#: rounding of a least-squares solve of a few dozen rows, far below any real weight).
_TOL = 1e-8


@dataclass(frozen=True)
class ContrastKind:
    """What a group contrast estimates.

    Attributes
    ----------
    kind
        :data:`MEAN` (weights sum to 1), :data:`DIFFERENCE` (weights sum to 0) or
        :data:`OTHER` (not estimable from the rows, a design without a constant in its
        span, or weights with another sum, e.g. the sum of two group means).
    weight_sum
        ``Σw`` (NaN when it is not determined).
    weights
        ``(n_rows,)`` the smallest-norm weights ``w`` with ``Aᵀw = c`` (NaN when ``c`` is
        not estimable); for a mean, the rows with a weight away from 0 are the animals
        whose mean it is.
    why
        One plain sentence saying what the contrast is.
    """

    kind: str
    weight_sum: float
    weights: np.ndarray
    why: str

    @property
    def is_mean(self) -> bool:
        return self.kind == MEAN

    def rows_in_mean(self) -> np.ndarray:
        """Bool per row: carries weight in the mean (all False unless a mean)."""
        if not self.is_mean:
            return np.zeros(self.weights.shape, dtype=bool)
        scale = max(float(np.max(np.abs(self.weights))), 1.0)
        return np.abs(self.weights) > _TOL * scale


def contrast_kind(rows: np.ndarray, c: np.ndarray) -> ContrastKind:
    """Decide whether ``c`` is the mean response of a set of rows, or a difference.

    Parameters
    ----------
    rows
        ``(n, p)`` the design's rows: one per animal for an animal-level design (its
        animal-level matrix), or one per run when a column varies within animals.
    c
        ``(p,)`` contrast weights.

    Returns
    -------
    ContrastKind

    Examples
    --------
    >>> A = np.array([[1.0, 0.0], [1.0, 0.0], [1.0, 1.0], [1.0, 1.0]])
    >>> contrast_kind(A, [1.0, 1.0]).kind, contrast_kind(A, [0.0, 1.0]).kind
    ('mean', 'difference')
    """
    A = np.asarray(rows, dtype=float)
    c = np.asarray(c, dtype=float).ravel()
    if A.ndim != 2 or A.shape[1] != c.size or A.shape[0] == 0:
        raise ValueError(f"rows must be (n, {c.size}) for a contrast of {c.size} weights")
    scale = max(float(np.max(np.abs(A))), float(np.max(np.abs(c))), 1.0)
    w = np.linalg.lstsq(A.T, c, rcond=None)[0]
    nan_w = np.full(A.shape[0], np.nan)
    if np.max(np.abs(A.T @ w - c)) > _TOL * scale * A.shape[0]:
        return ContrastKind(
            OTHER,
            float("nan"),
            nan_w,
            "the contrast is not a combination of the design's rows (not estimable)",
        )
    ones = np.ones(A.shape[0])
    b = np.linalg.lstsq(A, ones, rcond=None)[0]
    if np.max(np.abs(A @ b - ones)) > _TOL * scale * A.shape[0]:
        return ContrastKind(
            OTHER,
            float("nan"),
            w,
            "the design has no constant term, so the contrast cannot be read as a mean "
            "or a difference of responses",
        )
    total = float(b @ c)
    if abs(total - 1.0) <= _TOL * scale:
        # Aᵀw = c already gives Σw = bᵀAᵀw = bᵀc = 1: when the least-squares weights are
        # non-negative (a group mean, an intercept) they answer without the NNLS search
        if np.min(w) < -_TOL * scale and not _non_negative_solution(A, c, scale):
            return ContrastKind(
                OTHER,
                1.0,
                w,
                "the contrast is a response outside the range of the animals (no average "
                "of animals gives it; an uncentred covariate's intercept, for example, is "
                "the response at covariate value 0); centre the covariate to ask about "
                "the mean",
            )
        return ContrastKind(MEAN, 1.0, w, "the contrast is the mean response of a set of animals")
    if abs(total) <= _TOL * scale:
        return ContrastKind(
            DIFFERENCE,
            0.0,
            w,
            "the contrast is a difference (or slope) between responses, not a response",
        )
    return ContrastKind(
        OTHER,
        total,
        w,
        f"the contrast's weights on the animals' responses sum to {total:.3g}, neither a "
        "mean (1) nor a difference (0)",
    )


def _non_negative_solution(A: np.ndarray, c: np.ndarray, scale: float) -> bool:
    """Whether ``Aᵀw = c, Σw = 1`` has a solution with ``w ≥ 0`` (non-negative LS)."""
    from scipy.optimize import nnls  # loaded here only: scipy.optimize takes 60 ms

    system = np.vstack([A.T, np.ones(A.shape[0])])
    target = np.concatenate([c, [1.0]])
    w, _ = nnls(system, target)
    return bool(np.max(np.abs(system @ w - target)) <= 1e-6 * scale)


def design_rows(matrix: np.ndarray, animal: np.ndarray, animal_level: np.ndarray) -> np.ndarray:
    """The rows that :func:`contrast_kind` needs for a design.

    One row per animal (its first run; row ``a`` is animal code ``a``) when every column
    is constant within animals; otherwise every run's row (a within-animal effect is a
    difference of runs).
    """
    X = np.asarray(matrix, dtype=float)
    animal = np.asarray(animal).ravel()
    if np.all(animal_level):
        first = np.unique(animal, return_index=True)[1]
        return X[first]
    return X
