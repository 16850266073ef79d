"""Run quality: which runs look unlike the rest of the study?

For every run three numbers are computed and compared with the other runs by a robust z
score (median and scaled median absolute deviation):

* the spatial correlation of the run's effect map with the group effect map fitted
  *without that run's animal* (so a run is not compared with a map it helped make),
  over the voxels where agreement matters (``agreement``: the targets, or the group's
  surviving voxels; the whole map when neither is given) — over the whole brain a focal
  response is a small share of the voxels and the correlation of every run is near 0,
  whatever the run; an outlying low value marks a run that does not show the group
  pattern there;
* the run's mean first-level variance (a noisy run);
* an edge-rim score: the mean |effect| in the brain's edge shell divided by the mean
  |effect| inside it (stimulus-locked head motion puts signal at the edge).

A run with any |robust z| above the threshold is flagged, with the reasons. Flagged runs
are never dropped: the user decides with the runs table's ``exclude`` column.

The function is pure: arrays and a DataFrame in, a frozen dataclass out.

References
----------
Iglewicz B, Hoaglin DC (1993). How to Detect and Handle Outliers. ASQC Quality Press
(modified z score with median and MAD; the 3.5 cut-off; value from memory).

Rousseeuw PJ, Croux C (1993). Alternatives to the median absolute deviation. J Am Stat
Assoc 88:1273-1283 (the 1.4826 consistency factor of the MAD).

Hajnal JV, Myers R, Oatridge A, Schwieso JE, Young IR, Bydder GM (1994). Artifacts due to
stimulus correlated motion in functional imaging of the brain. Magn Reson Med 31:283-291.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from grouplevel.compiled import lazy_njit
from grouplevel.errors import ArgumentError
from grouplevel.model.memory import voxel_chunks
from grouplevel.questions.specificity import row_correlations

#: |robust z| above which a run is flagged (Iglewicz & Hoaglin 1993; value from memory).
DEFAULT_Z_THRESHOLD = 3.5

#: MAD × 1.4826 estimates the standard deviation of normal data (1 / Φ⁻¹(3/4); common
#: practice, Rousseeuw & Croux 1993).
MAD_SCALE = 1.4826

QUALITY_COLUMNS = (
    "animal",
    "session",
    "run",
    "correlation",
    "correlation_voxels",
    "correlation_where",
    "mean_variance",
    "z_correlation",
    "z_variance",
    "edge_score",
    "z_edge",
    "flagged",
    "why",
)


def robust_z(x: np.ndarray) -> np.ndarray:
    """``(x − median) / (1.4826 · MAD)`` over the finite values of ``x``.

    NaN stays NaN. When the MAD is 0 (more than half of the values equal), values equal
    to the median get 0 and the others ±inf.

    References
    ----------
    Iglewicz B, Hoaglin DC (1993). How to Detect and Handle Outliers. ASQC Quality Press.
    """
    x = np.asarray(x, dtype=float)
    out = np.full(x.shape, np.nan)
    ok = np.isfinite(x)
    if not ok.any():
        return out
    med = np.median(x[ok])
    mad = MAD_SCALE * np.median(np.abs(x[ok] - med))
    dev = x[ok] - med
    if mad > 0:
        out[ok] = dev / mad
    else:
        out[ok] = np.where(dev > 0, np.inf, np.where(dev < 0, -np.inf, 0.0))
    return out


@dataclass(frozen=True)
class RunQuality:
    """Per-run quality numbers, robust z scores and flags (see :meth:`table`)."""

    runs: pd.DataFrame
    threshold: float
    agreement_where: str = "the whole analysed brain"

    def table(self) -> pd.DataFrame:
        """Columns :data:`QUALITY_COLUMNS`, one row per run in the order given."""
        return self.runs.copy()

    def summary(self) -> dict:
        """Plain JSON types for summary.json."""
        flagged = self.runs[self.runs["flagged"]]
        return {
            "threshold": float(self.threshold),
            "correlation_where": self.agreement_where,
            "runs": int(len(self.runs)),
            "flagged": int(len(flagged)),
            "flagged_runs": [
                {
                    "animal": str(r["animal"]),
                    "session": str(r["session"]),
                    "run": str(r["run"]),
                    "why": str(r["why"]),
                }
                for _, r in flagged.iterrows()
            ],
        }


def run_quality(
    y: np.ndarray,
    variance: np.ndarray | None,
    animal: np.ndarray,
    runs: pd.DataFrame,
    loo_effect: np.ndarray,
    shell: np.ndarray,
    *,
    threshold: float = DEFAULT_Z_THRESHOLD,
    agreement: np.ndarray | None = None,
    agreement_where: str = "the whole analysed brain",
    rows: np.ndarray | None = None,
    chunk_rows: int | None = None,
) -> RunQuality:
    """Quality numbers of every run and flags for outliers.

    Parameters
    ----------
    y
        ``(n_runs, V)`` run effect maps (NaN: no data).
    variance
        ``(n_runs, V)`` first-level variances, or None (then ``mean_variance`` and its z
        are NaN and never flag).
    animal
        ``(n_runs,)`` animal codes ``0..m-1``.
    runs
        The runs table (columns ``animal``, ``session`` (optional), ``run``), one row
        per run in the order of ``y``.
    loo_effect
        ``(m, V)`` group effect maps fitted without each animal
        (:attr:`grouplevel.specificity.LooMaps.effect`).
    shell
        ``(V,)`` bool edge shell (:func:`grouplevel.specificity.edge_shell`).
    threshold
        |robust z| above which a run is flagged.
    agreement
        ``(V,)`` bool: the voxels over which the correlation is computed (None: all).
    agreement_where
        Those voxels in words, for the table's readers (e.g. "inside the targets").
    rows
        The rows of ``y`` and ``variance`` that are the runs assessed (default all);
        ``animal``, ``runs`` and the order of the result follow them. Saves a copy of
        the runs × voxels arrays when only some runs are assessed.
    chunk_rows
        Runs scored together (default all); every number is a run's own, so it does
        not depend on this (:func:`grouplevel.model.memory.chunk_rows` sizes it for a
        budget).

    Returns
    -------
    RunQuality

    References
    ----------
    Iglewicz B, Hoaglin DC (1993). How to Detect and Handle Outliers. ASQC Quality Press.

    Hajnal JV et al. (1994). Magn Reson Med 31:283-291.
    """
    y = np.asarray(y)
    rows = np.arange(len(y)) if rows is None else np.asarray(rows, dtype=np.intp).ravel()
    animal, loo_effect, shell = _check_quality_inputs(
        y, rows, animal, runs, loo_effect, shell, threshold
    )
    if agreement is None:
        agreement = np.ones(y.shape[1], dtype=bool)
    agreement = np.asarray(agreement, dtype=bool).reshape(-1)
    if agreement.shape != (y.shape[1],):
        raise ArgumentError(
            f"run_quality: agreement has {agreement.size} values for {y.shape[1]} voxels."
        )
    if variance is not None and np.shape(variance) != y.shape:
        raise ArgumentError(f"run_quality: variance {np.shape(variance)} and y {y.shape} differ.")
    n = len(rows)
    correlation, mean_var, edge = np.empty(n), np.empty(n), np.empty(n)
    n_agree = np.empty(n, dtype=np.int64)
    # a block of runs at a time, read in place: every number below is one run's own
    for block in voxel_chunks(n, max(1, n if chunk_rows is None else chunk_rows)):
        correlation[block], n_agree[block] = row_correlations(
            y, loo_effect, rows[block], animal[block], agreement
        )
        mean_var[block], edge[block] = _run_scores(y, variance, rows[block], shell)
    z_c, z_v, z_e = robust_z(correlation), robust_z(mean_var), robust_z(edge)
    flagged, why = _flags(correlation, mean_var, edge, (z_c, z_v, z_e), threshold)
    session = runs["session"] if "session" in runs.columns else pd.Series([""] * n)
    table = pd.DataFrame(
        {
            "animal": runs["animal"].astype(str).to_numpy(),
            "session": session.astype(str).to_numpy(),
            "run": runs["run"].astype(str).to_numpy(),
            "correlation": correlation,
            "correlation_voxels": n_agree,
            "correlation_where": [agreement_where] * n,
            "mean_variance": mean_var,
            "z_correlation": z_c,
            "z_variance": z_v,
            "edge_score": edge,
            "z_edge": z_e,
            "flagged": flagged,
            "why": why,
        },
        columns=list(QUALITY_COLUMNS),
    )
    return RunQuality(runs=table, threshold=float(threshold), agreement_where=agreement_where)


def _check_quality_inputs(
    y: np.ndarray,
    rows: np.ndarray,
    animal: np.ndarray,
    runs: pd.DataFrame,
    loo_effect: np.ndarray,
    shell: np.ndarray,
    threshold: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``animal``, ``loo_effect`` and ``shell`` as arrays, checked against ``y`` and the
    ``rows`` assessed.

    Raises
    ------
    ArgumentError
        On shapes that do not match or a threshold that is not positive.
    """
    if y.ndim != 2:
        raise ArgumentError(f"run_quality: y must be (runs, voxels), got shape {y.shape}.")
    n_vox = y.shape[1]
    n = len(rows)
    if n and (rows.min() < 0 or rows.max() >= len(y)):
        raise ArgumentError(f"run_quality: rows must be run indices below {len(y)}.")
    animal = np.asarray(animal, dtype=np.int64).reshape(-1)
    loo_effect = np.asarray(loo_effect, dtype=float)
    shell = np.asarray(shell, dtype=bool).reshape(-1)
    if animal.shape != (n,) or len(runs) != n:
        raise ArgumentError(
            f"run_quality: {n} run maps but {animal.size} animal codes and {len(runs)} "
            "table rows; give one of each per run."
        )
    if loo_effect.ndim != 2 or loo_effect.shape[1] != n_vox or animal.max() >= len(loo_effect):
        raise ArgumentError(
            f"run_quality: loo_effect must be (animals, {n_vox}), got {loo_effect.shape}."
        )
    if shell.shape != (n_vox,):
        raise ArgumentError(f"run_quality: shell has {shell.size} values for {n_vox} voxels.")
    if not threshold > 0:
        raise ArgumentError(f"run quality threshold must be positive, got {threshold!r}.")
    return animal, loo_effect, shell


def _run_scores(
    y: np.ndarray, variance: np.ndarray | None, rows: np.ndarray, shell: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """For the runs ``rows`` of ``y``: the mean of each run's finite first-level
    variances (NaN without them) and its edge-rim score, the mean |effect| in the edge
    shell over the mean |effect| inside it (over finite effects)."""
    mean_var, edge = np.empty(len(rows)), np.empty(len(rows))
    y = np.asarray(y)
    _nb_run_scores(
        y,
        y if variance is None else np.asarray(variance),
        variance is not None,
        np.asarray(rows, dtype=np.int64),
        np.asarray(shell, dtype=bool),
        mean_var,
        edge,
    )
    return mean_var, edge


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_run_scores(y, variance, has_variance, rows, shell, mean_var, edge):
    """The loops of :func:`_run_scores`, one run at a time."""
    for i in range(len(rows)):
        row = y[rows[i]]
        edge_sum, inner_sum, n_edge, n_inner = 0.0, 0.0, 0, 0
        for j in range(row.shape[0]):
            if np.isfinite(row[j]):
                if shell[j]:
                    edge_sum += abs(row[j])
                    n_edge += 1
                else:
                    inner_sum += abs(row[j])
                    n_inner += 1
        edge[i] = (edge_sum / n_edge) / (inner_sum / n_inner)
        mean_var[i] = np.nan
        if has_variance:
            var = variance[rows[i]]
            total, count = 0.0, 0
            for j in range(var.shape[0]):
                if np.isfinite(var[j]):
                    total += var[j]
                    count += 1
            mean_var[i] = total / count


def _flags(
    correlation: np.ndarray,
    mean_var: np.ndarray,
    edge: np.ndarray,
    robust: tuple[np.ndarray, np.ndarray, np.ndarray],
    threshold: float,
) -> tuple[np.ndarray, list[str]]:
    """Which runs are flagged, and why.

    Parameters
    ----------
    correlation, mean_var, edge
        ``(n_runs,)`` the three quality numbers.
    robust
        Their robust z scores, in the same order.
    threshold
        |robust z| above which a run is flagged.

    Returns
    -------
    flagged
        ``(n_runs,)`` bool.
    why
        One string per run: the reasons joined by "; ", "" for a run not flagged.
    """
    z_c, z_v, z_e = robust
    n = len(correlation)
    why = []
    flagged = np.zeros(n, dtype=bool)
    for k in range(n):  # loop over runs (tens), not voxels
        parts = []
        if abs(z_c[k]) > threshold:
            side = "low" if z_c[k] < 0 else "high"
            parts.append(
                f"{side} correlation with the group map without its animal "
                f"({correlation[k]:.3f}, robust z {z_c[k]:.1f})"
            )
        if abs(z_v[k]) > threshold:
            side = "high" if z_v[k] > 0 else "low"
            parts.append(f"{side} mean variance ({mean_var[k]:.3g}, robust z {z_v[k]:.1f})")
        if abs(z_e[k]) > threshold:
            side = "high" if z_e[k] > 0 else "low"
            parts.append(f"{side} edge-rim score ({edge[k]:.2f}, robust z {z_e[k]:.1f})")
        flagged[k] = bool(parts)
        why.append("; ".join(parts))
    return flagged, why
