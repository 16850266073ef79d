"""Each animal's precision-weighted mean of its runs: one definition for the whole tool.

Run ``k`` of animal ``a`` enters with the weight ``w_k = 1 / (σ̂² + s_k²)``: its
first-level variance ``s_k²`` plus the between-run variance ``σ̂²`` of the fitted model.
The animal's mean is ``Σ w_k y_k / Σ w_k`` and its sampling variance, ``σ̂²`` treated as
known, is ``1 / Σ w_k`` (inverse-variance weighting).

One floor for all users: a total variance ``σ̂² + s_k²`` below :data:`VARIANCE_FLOOR` is
raised to it, so a run without any variance (``σ̂² = 0`` and no first-level variance)
gets a large but finite weight. Where every run of an animal is floored alike (the usual
case: no variances at all) the weights are equal and the mean is the plain mean of the
runs; the standard error is then unknown and reported as NaN.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from grouplevel.errors import ArgumentError

#: Smallest total variance σ̂² + s_k² of a run (the same bound the REML fit puts on σ²
#: when a run has no first-level variance: a zero variance is an infinite precision).
VARIANCE_FLOOR = 1e-12


@dataclass(frozen=True)
class AnimalMeans:
    """Per-animal summaries of runs × columns data (columns: voxels or regions).

    Attributes
    ----------
    mean
        ``(n_animals, n_columns)`` precision-weighted means; NaN where the animal has no
        run with data.
    precision
        ``(n_animals, n_columns)`` sums of the weights ``Σ w_k`` (0 where no data).
    runs
        ``(n_animals, n_columns)`` number of runs with data.
    floored
        ``(n_animals, n_columns)`` True where a run's total variance was raised to the
        floor (its precision is then not a sampling precision).
    """

    mean: np.ndarray
    precision: np.ndarray
    runs: np.ndarray
    floored: np.ndarray

    @property
    def has_data(self) -> np.ndarray:
        """``(n_animals, n_columns)`` True where the animal has at least one run."""
        return self.runs > 0

    @property
    def se(self) -> np.ndarray:
        """Standard error ``sqrt(1 / Σ w_k)``; NaN without data or where floored."""
        ok = (self.precision > 0) & ~self.floored
        with np.errstate(divide="ignore"):
            return np.where(ok, np.sqrt(1.0 / np.where(ok, self.precision, 1.0)), np.nan)


def animal_means(
    y: np.ndarray,
    animal: np.ndarray,
    *,
    n_animals: int | None = None,
    variance: np.ndarray | None = None,
    var_run: np.ndarray | float | None = None,
    present: np.ndarray | None = None,
    floor: np.ndarray | float = VARIANCE_FLOOR,
) -> AnimalMeans:
    """Precision-weighted mean of each animal's runs, column by column.

    Parameters
    ----------
    y
        ``(n_runs, n_columns)`` values (NaN: no data).
    animal
        ``(n_runs,)`` animal code of each run, 0 .. n_animals − 1.
    n_animals
        Number of animals (default: the largest code + 1).
    variance
        ``(n_runs, n_columns)`` first-level variances ``s_k²`` (None: 0). A run whose
        variance is not finite counts as a run without data.
    var_run
        Between-run variance ``σ̂²``: a scalar or one value per column (None or NaN: 0).
    present
        ``(n_runs, n_columns)`` bool: runs to use (default: all with finite values).
    floor
        Smallest total variance (scalar or one value per column); the default
        :data:`VARIANCE_FLOOR` is the one to use unless a caller documents its own.

    Returns
    -------
    AnimalMeans

    References
    ----------
    Borenstein M, Hedges LV, Higgins JPT, Rothstein HR (2009). Introduction to
    Meta-Analysis. Wiley (inverse-variance weighting).
    """
    y = np.asarray(y, dtype=float)
    if y.ndim != 2:
        raise ArgumentError(f"y must be a (runs, columns) array, got shape {y.shape}")
    n_runs, n_columns = y.shape
    animal = np.asarray(animal, dtype=np.int64).reshape(-1)
    m = int(animal.max()) + 1 if n_animals is None and n_runs else int(n_animals or 0)
    if animal.shape != (n_runs,) or (n_runs and (animal.min() < 0 or animal.max() >= m)):
        raise ArgumentError(f"animal must hold {n_runs} codes in 0..{m - 1}")
    use = np.isfinite(y) if present is None else np.asarray(present, dtype=bool) & np.isfinite(y)
    if variance is None:
        s2 = np.zeros_like(y)
    else:
        variance = np.asarray(variance, dtype=float)
        if variance.shape != y.shape:
            raise ArgumentError(f"variance has shape {variance.shape}, y has {y.shape}")
        use &= np.isfinite(variance)
        s2 = np.where(use, variance, 0.0)
    extra = 0.0 if var_run is None else np.nan_to_num(np.asarray(var_run, dtype=float), nan=0.0)
    total = extra + s2
    floor = np.asarray(floor, dtype=float)
    floored_runs = use & (total <= floor)
    w = np.where(use, 1.0 / np.maximum(total, floor), 0.0)
    indicator = np.zeros((m, n_runs))
    indicator[animal, np.arange(n_runs)] = 1.0
    precision = indicator @ w
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(
            precision > 0, (indicator @ (w * np.where(use, y, 0.0))) / precision, np.nan
        )
    return AnimalMeans(
        mean=mean,
        precision=precision,
        runs=indicator @ use.astype(float),
        floored=(indicator @ floored_runs.astype(float)) > 0,
    )
