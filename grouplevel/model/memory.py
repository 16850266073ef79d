"""Memory budget: how much a study needs, and how many voxels to fit at a time.

A group analysis holds one first-level contrast's maps as two runs × in-mask-voxels
arrays (effects and first-level variances). They are kept as float32 — first-level maps
are float32 on disk, so nothing is lost — and converted to float64 only one chunk of
voxels at a time inside the model fit. Everything else the fit keeps is per voxel
(estimates, covariances) or a boolean runs × voxels presence mask.

This module turns a budget in GiB (``[compute] memory_gb``) into

- :func:`runs_array_bytes`: the bytes of the runs × voxels arrays alone;
- :func:`study_memory_need`: those plus the presence mask and the fit's per-voxel
  outputs, i.e. what one first-level contrast needs beyond the chunk working set;
- :func:`chunk_voxels`: a chunk size whose float64 working set stays within a fixed
  share of the budget (for steps that are computed voxel by voxel);
- :func:`chunk_rows`: how many runs (rows) of a runs × voxels array to take together
  (for steps that are computed run by run: region averages, run quality);
- :func:`voxel_chunks`: the voxel slices of a chunked pass;
- :func:`memory_plan`: all of these for one contrast, with a ``summary()`` for
  summary.json.

Pure functions: numbers in, numbers out; no reading of configuration or files.
"""

from __future__ import annotations

from dataclasses import dataclass

from grouplevel.errors import ArgumentError

GIB = 2**30  # bytes in one GiB (the unit of [compute] memory_gb)

# Bytes per value of the runs × voxels arrays as held in memory (float32: first-level
# maps are float32 on disk, so keeping them as float32 loses nothing).
STORED_BYTES = 4
# Bytes per value inside the fit (float64 arithmetic, one chunk at a time).
WORKING_BYTES = 8
# Bytes per run and voxel of the boolean "run has data" mask that the fit keeps.
PRESENCE_BYTES = 1

# (chunk, runs) float64 arrays alive at once inside the vectorised (numpy) REML
# iteration: weights, residuals and their powers, trial copies (counted in
# grouplevel/model/reml.py). The compiled kernel needs about three (voxel-major copies of
# effects, variances and presence), so this bound covers both backends.
CHUNK_ARRAYS = 24

# (runs, voxels) float64 arrays alive at once while a block of runs is averaged over
# atlas regions (grouplevel/anatomy/regions.py, region_values: the block, its presence
# as float, the zeroed values, and their transposes inside the sparse product)
REGION_AVERAGE_ARRAYS = 6
# (runs, voxels) float64 arrays a block of runs may hold while it is scored for run
# quality: an upper bound (grouplevel/questions/quality.py now reads the runs in place
# in compiled loops and holds none; kept so that the block size stays a safe bound)
RUN_SCORE_ARRAYS = 8

# (replicates, pair voxels) float64 arrays alive at once while bootstrap replicates of a
# region pair's laterality are mapped (grouplevel/questions/symmetry.py, _shortcut_maps:
# sums, means, variances, t, masks and their products)
BOOTSTRAP_ARRAYS = 12
# (voxels, animals + 1) float64 arrays alive at once per chunk of the leave-one-animal-out
# downdate beyond its two (voxels, runs) copies (grouplevel/model/leave_one_out.py: the
# kernel's effect and variance outputs, and the left-out t and |Δt| rows of the maps)
LEAVE_ONE_OUT_ARRAYS = 4

# Share of the budget that one chunk's working set may use (our own choice: the
# runs × voxels arrays take most of the budget; the chunk is a small addition to them).
CHUNK_SHARE = 1 / 16

# Smallest chunk: below this the per-chunk overhead (thread start, small matrix
# products) dominates (common practice; measured on the model benchmark).
MIN_CHUNK_VOXELS = 256


def _fit_outputs_per_voxel(n_columns: int) -> int:
    """Float64 values the REML fit returns per voxel for a design with p columns.

    beta (p), cov_beta (p²), var_animal, var_run, cov_theta (4), dcov_beta (2p²),
    loglik, and converged / n_iter / n_runs / n_animals (stored as 8-byte values or
    fewer; counted as 8).
    """
    p = int(n_columns)
    return p + p * p + 2 + 4 + 2 * p * p + 1 + 4


def _check_counts(n_runs: int, n_voxels: int) -> None:
    if n_runs < 0 or n_voxels < 0:
        raise ArgumentError(
            f"memory: runs ({n_runs}) and voxels ({n_voxels}) must be non-negative counts."
        )


def runs_array_bytes(n_runs: int, n_voxels: int, with_variance: bool) -> int:
    """Bytes of the runs × voxels arrays of one first-level contrast (float32).

    Parameters
    ----------
    n_runs, n_voxels
        Runs included and in-mask voxels.
    with_variance
        Whether first-level variance maps are held beside the effect maps.

    Returns
    -------
    int
        ``n_runs · n_voxels · 4 · (2 if with_variance else 1)``.
    """
    _check_counts(n_runs, n_voxels)
    maps = 2 if with_variance else 1
    return int(n_runs) * int(n_voxels) * STORED_BYTES * maps


def study_memory_need(
    n_runs: int, n_voxels: int, with_variance: bool, *, n_columns: int = 1
) -> int:
    """Bytes that loading and fitting one first-level contrast holds at once.

    The runs × voxels arrays (float32), the fit's runs × voxels presence mask and its
    per-voxel outputs for a design of ``n_columns`` columns. The working set of one
    chunk of voxels comes on top; it is bounded by :func:`chunk_voxels` to
    ``CHUNK_SHARE`` of the budget.

    Parameters
    ----------
    n_runs, n_voxels
        Runs included and in-mask voxels.
    with_variance
        Whether first-level variance maps are held beside the effect maps.
    n_columns
        Columns of the group design (1 for a one-sample mean).

    Returns
    -------
    int
        Bytes.
    """
    if n_columns < 1:
        raise ArgumentError(f"memory: the design needs at least one column, got {n_columns}.")
    arrays = runs_array_bytes(n_runs, n_voxels, with_variance)
    presence = int(n_runs) * int(n_voxels) * PRESENCE_BYTES
    outputs = int(n_voxels) * _fit_outputs_per_voxel(n_columns) * WORKING_BYTES
    return arrays + presence + outputs


def _units_within(memory_gb: float, share: float, length: int, arrays: int, name: str) -> int:
    """How many units (voxels or rows) of ``arrays`` float64 arrays of ``length`` values
    each fit in ``share`` of the budget; the inputs checked (``name``: the caller's
    argument for ``arrays``)."""
    if not memory_gb > 0:
        raise ArgumentError(f"memory_gb must be a positive number of GiB, got {memory_gb}.")
    if not 0 < share <= 1:
        raise ArgumentError(f"memory: share must be in (0, 1], got {share}.")
    if arrays < 1:
        raise ArgumentError(f"memory: {name} must be at least 1, got {arrays}.")
    per_unit = WORKING_BYTES * max(int(length), 1) * int(arrays)
    return int(share * memory_gb * GIB) // per_unit


def chunk_voxels(
    n_runs: int,
    memory_gb: float,
    arrays_per_voxel: int = CHUNK_ARRAYS,
    *,
    share: float = CHUNK_SHARE,
) -> int:
    """Voxels to fit together so that one chunk's working set fits its share of the budget.

    Parameters
    ----------
    n_runs
        Runs in the fit.
    memory_gb
        The budget in GiB (``[compute] memory_gb``).
    arrays_per_voxel
        Float64 arrays of shape (chunk, runs) alive at once.
    share
        Share of the budget for the chunk's working set (0 < share ≤ 1).

    Returns
    -------
    int
        ``floor(share · memory_gb · 2³⁰ / (8 · n_runs · arrays_per_voxel))``, at least
        ``MIN_CHUNK_VOXELS``.
    """
    fitting = _units_within(memory_gb, share, n_runs, arrays_per_voxel, "arrays_per_voxel")
    return max(MIN_CHUNK_VOXELS, fitting)


def chunk_rows(
    n_voxels: int,
    memory_gb: float,
    arrays_per_row: int,
    *,
    share: float = CHUNK_SHARE,
) -> int:
    """Rows of a (rows, voxels) array to process together within a share of the budget.

    The counterpart of :func:`chunk_voxels` for steps whose numbers are computed for
    each run separately from all its voxels (a run's region averages, its quality
    scores): a block of rows gives the same numbers as all rows at once.

    Parameters
    ----------
    n_voxels
        Voxels per row.
    memory_gb
        The budget in GiB (``[compute] memory_gb``).
    arrays_per_row
        Float64 arrays of shape (rows, voxels) alive at once.
    share
        Share of the budget for the block's working set (0 < share ≤ 1).

    Returns
    -------
    int
        ``floor(share · memory_gb · 2³⁰ / (8 · n_voxels · arrays_per_row))``, at least 1.
    """
    return max(1, _units_within(memory_gb, share, n_voxels, arrays_per_row, "arrays_per_row"))


def voxel_chunks(n_voxels: int, chunk: int) -> list[slice]:
    """The slices ``[0, chunk), [chunk, 2·chunk), …`` covering ``n_voxels`` (or rows).

    Raises
    ------
    ArgumentError
        When ``chunk`` is below 1.
    """
    if chunk < 1:
        raise ArgumentError(f"memory: a chunk needs at least 1 voxel, got {chunk}.")
    return [slice(lo, min(int(n_voxels), lo + int(chunk))) for lo in range(0, int(n_voxels), chunk)]


@dataclass(frozen=True)
class MemoryPlan:
    """What one first-level contrast needs against the budget.

    Attributes
    ----------
    n_runs, n_voxels, with_variance
        The sizes the plan was made for.
    budget_bytes
        ``[compute] memory_gb`` in bytes.
    arrays_bytes
        The runs × voxels arrays alone (:func:`runs_array_bytes`).
    need_bytes
        Arrays, presence mask and fit outputs (:func:`study_memory_need`).
    chunk_voxels
        Voxels fitted together (:func:`chunk_voxels`).
    chunk_bytes
        The float64 working set of one chunk.
    """

    n_runs: int
    n_voxels: int
    with_variance: bool
    budget_bytes: int
    arrays_bytes: int
    need_bytes: int
    chunk_voxels: int
    chunk_bytes: int

    @property
    def arrays_fit(self) -> bool:
        """Whether the runs × voxels arrays alone fit within the budget."""
        return self.arrays_bytes <= self.budget_bytes

    def summary(self) -> dict:
        """Plain-JSON numbers (GiB rounded to 3 decimals) for summary.json."""
        return {
            "runs": self.n_runs,
            "voxels": self.n_voxels,
            "variance_maps": self.with_variance,
            "budget_gb": round(self.budget_bytes / GIB, 3),
            "arrays_gb": round(self.arrays_bytes / GIB, 3),
            "need_gb": round(self.need_bytes / GIB, 3),
            "chunk_voxels": self.chunk_voxels,
            "chunk_gb": round(self.chunk_bytes / GIB, 3),
        }


def memory_plan(
    n_runs: int,
    n_voxels: int,
    with_variance: bool,
    memory_gb: float,
    *,
    n_columns: int = 1,
) -> MemoryPlan:
    """Sizes of one first-level contrast against a budget of ``memory_gb`` GiB."""
    chunk = chunk_voxels(n_runs, memory_gb)
    return MemoryPlan(
        n_runs=int(n_runs),
        n_voxels=int(n_voxels),
        with_variance=bool(with_variance),
        budget_bytes=int(memory_gb * GIB),
        arrays_bytes=runs_array_bytes(n_runs, n_voxels, with_variance),
        need_bytes=study_memory_need(n_runs, n_voxels, with_variance, n_columns=n_columns),
        chunk_voxels=chunk,
        chunk_bytes=chunk * max(int(n_runs), 1) * WORKING_BYTES * CHUNK_ARRAYS,
    )


__all__ = [
    "CHUNK_ARRAYS",
    "CHUNK_SHARE",
    "BOOTSTRAP_ARRAYS",
    "GIB",
    "LEAVE_ONE_OUT_ARRAYS",
    "MIN_CHUNK_VOXELS",
    "MemoryPlan",
    "REGION_AVERAGE_ARRAYS",
    "RUN_SCORE_ARRAYS",
    "chunk_rows",
    "chunk_voxels",
    "memory_plan",
    "runs_array_bytes",
    "study_memory_need",
    "voxel_chunks",
]
