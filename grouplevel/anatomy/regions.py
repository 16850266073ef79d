"""Cluster tables and region statistics against the user's atlas.

Two views of a group map meet the atlas here.

*Clusters.* :func:`cluster_table` describes every reported cluster of a thresholded map:
its size, its peak and sub-peaks (:func:`local_maxima`) in template millimetres and in
stereotaxic coordinates from the study's origin, its centre of mass, its corrected
p-values, the region at each peak and the regions it overlaps most.

*Regions.* The atlas gives every in-mask voxel a share in every region (leaves and
parents, see :class:`grouplevel.atlas.Atlas`). :func:`region_values` averages each run's
effect map over each region with those shares as weights, :func:`region_variances` gives
the first-level variance of such an average, and :func:`region_table` fits the same
run-within-animal REML model as the voxelwise analysis to one value per run and region,
the regions taking the place of voxels. :func:`animal_table` lists each animal's own
precision-weighted region effects.

Every function is pure: arrays and an :class:`~grouplevel.atlas.Atlas` in, arrays or
:class:`pandas.DataFrame` out; nothing is read, written or printed.

References
----------
Poldrack RA (2007). Region of interest analysis for fMRI. Soc Cogn Affect Neurosci
2:67-70.

Patterson HD, Thompson R (1971). Recovery of inter-block information when block sizes are
unequal. Biometrika 58:545-554 (REML).

Borenstein M, Hedges LV, Higgins JPT, Rothstein HR (2009). Introduction to Meta-Analysis.
Wiley, chapter 24 (the variance of a mean of correlated estimates; chapter from memory).

Benjamini Y, Hochberg Y (1995). Controlling the false discovery rate: a practical and
powerful approach to multiple testing. J R Stat Soc B 57:289-300.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy import ndimage

from grouplevel.anatomy.coordinates import STEREOTAXIC_COLUMNS, to_stereotaxic, voxel_to_mm
from grouplevel.distributions import t_ppf
from grouplevel.inference import fdr
from grouplevel.inference.clusters import Clusters
from grouplevel.model import between_animal_df, fit_reml, test_contrast
from grouplevel.model.animals import animal_means
from grouplevel.model.memory import voxel_chunks

if TYPE_CHECKING:  # types only: the atlas is read and built by the shell
    from grouplevel.anatomy.atlas import Atlas
    from grouplevel.intake.images import Grid

#: Sub-peaks closer than this to a stronger kept peak are not listed. Our own choice: five
#: voxels of a 0.2 mm mouse grid, about the size of a small cortical area.
DEFAULT_SUBPEAK_DISTANCE_MM = 1.0

#: Sub-peaks listed under each cluster besides its main peak (common practice: reporting
#: tables list up to three).
DEFAULT_MAX_SUBPEAKS = 3

#: Regions named in the ``regions`` column of a cluster (our own choice).
DEFAULT_TOP_REGIONS = 3

#: Level of the confidence interval of a region's effect (common practice).
CONFIDENCE_LEVEL = 0.95

#: Region name given to a peak that no atlas label covers.
UNLABELLED = "unlabelled"

#: Two peaks this much closer than ``min_distance_mm`` still count as far enough apart
#: (absorbs float round-off in millimetre distances of whole voxel steps).
DISTANCE_ROUNDOFF_MM = 1e-9

#: Columns of :func:`cluster_table`, in order.
CLUSTER_COLUMNS = (
    "cluster",
    "peak",
    "sign",
    "voxels",
    "volume_mm3",
    "z",
    "t",
    "effect",
    "peak_x_mm",
    "peak_y_mm",
    "peak_z_mm",
    *(f"peak_{c}" for c in STEREOTAXIC_COLUMNS),
    "centre_x_mm",
    "centre_y_mm",
    "centre_z_mm",
    *(f"centre_{c}" for c in STEREOTAXIC_COLUMNS),
    "p_fwe_cluster_extent",
    "p_fwe_cluster_mass",
    "p_fwe_voxel_min",
    "p_fwe_tfce_min",
    "q_min",
    "peak_region",
    "peak_region_abbreviation",
    "peak_region_hemisphere",
    "regions",
)


# --------------------------------------------------------------------------------------
# Peaks
# --------------------------------------------------------------------------------------


def local_maxima(
    stat3d: np.ndarray,
    labels3d: np.ndarray,
    cluster_id: int,
    affine: np.ndarray,
    min_distance_mm: float = DEFAULT_SUBPEAK_DISTANCE_MM,
    sign: int = +1,
) -> np.ndarray:
    """Peaks of one cluster: local maxima kept from the highest down, apart in space.

    A voxel of the cluster is a local maximum when ``sign * stat`` there is at least as
    large as at each of its 26 neighbours that belong to the cluster (a plateau gives
    several). The local maxima are taken from the highest down (equal values in C order
    of the grid), and one is kept when it lies at least ``min_distance_mm`` (world mm,
    through ``affine``) from every one kept before it. The first row is therefore the
    cluster's peak: its largest ``sign * stat``, the first in C order on ties.

    Parameters
    ----------
    stat3d
        3-D statistic map; NaN is never a maximum.
    labels3d
        3-D integer cluster labels on the same grid.
    cluster_id
        The label of the cluster.
    affine
        4 × 4 voxel → mm affine of the grid.
    min_distance_mm
        Smallest distance between two kept peaks (>= 0).
    sign
        +1 for maxima of ``stat`` (a positive cluster), -1 for minima (a negative one).

    Returns
    -------
    numpy.ndarray
        ``(k, 3)`` int64 voxel indices, strongest first; ``(0, 3)`` when the label is
        absent.
    """
    stat3d = np.asarray(stat3d, dtype=float)
    labels3d = np.asarray(labels3d)
    if stat3d.shape != labels3d.shape or stat3d.ndim != 3:
        raise ValueError(
            f"stat3d {stat3d.shape} and labels3d {labels3d.shape} must be 3-D of one shape"
        )
    box = ndimage.find_objects((labels3d == cluster_id).astype(np.int8), max_label=1)[0]
    if box is None:
        return np.zeros((0, 3), dtype=np.int64)
    return _local_maxima_in_box(
        stat3d, labels3d, int(cluster_id), box, affine, float(min_distance_mm), int(sign)
    )


def _local_maxima_in_box(
    stat3d: np.ndarray,
    labels3d: np.ndarray,
    cluster_id: int,
    box: tuple[slice, ...],
    affine: np.ndarray,
    min_distance_mm: float,
    sign: int,
) -> np.ndarray:
    """:func:`local_maxima` within the cluster's bounding box (from find_objects)."""
    if sign not in (1, -1):
        raise ValueError(f"sign must be +1 or -1, got {sign}")
    if not (np.isfinite(min_distance_mm) and min_distance_mm >= 0):
        raise ValueError(f"min_distance_mm must be a finite number >= 0, got {min_distance_mm}")
    # one voxel of margin so that the neighbourhood of an edge voxel is complete
    padded = tuple(
        slice(max(s.start - 1, 0), min(s.stop + 1, n))
        for s, n in zip(box, stat3d.shape, strict=True)
    )
    start = np.array([s.start for s in padded], dtype=np.int64)
    inside = labels3d[padded] == cluster_id
    values = np.where(inside, sign * stat3d[padded], -np.inf)
    values = np.where(np.isnan(values), -np.inf, values)
    neighbourhood_max = ndimage.maximum_filter(values, size=3, mode="constant", cval=-np.inf)
    is_max = inside & np.isfinite(values) & (values >= neighbourhood_max)
    candidates = np.argwhere(is_max)  # C order within the box = C order of the grid
    if candidates.size == 0:
        return np.zeros((0, 3), dtype=np.int64)
    heights = values[is_max]
    order = np.argsort(-heights, kind="stable")  # highest first, C order on ties
    candidates = candidates[order] + start
    mm = voxel_to_mm(candidates, affine)
    alive = np.ones(len(candidates), dtype=bool)
    kept: list[int] = []
    # A loop over local maxima (a handful per cluster), each step vectorised over them.
    for i in range(len(candidates)):
        if not alive[i]:
            continue
        kept.append(i)
        distance = np.sqrt(np.sum((mm - mm[i]) ** 2, axis=1))
        alive &= distance >= min_distance_mm - DISTANCE_ROUNDOFF_MM
    return candidates[kept].astype(np.int64)


# --------------------------------------------------------------------------------------
# Cluster table
# --------------------------------------------------------------------------------------


def _optional_cluster_vector(values: np.ndarray | None, n: int, what: str) -> np.ndarray:
    if values is None:
        return np.full(n, np.nan)
    out = np.asarray(values, dtype=float).reshape(-1)
    if out.shape != (n,):
        raise ValueError(f"{what} has {out.size} values for {n} clusters")
    return out


def _cluster_minimum(volume: np.ndarray | None, flat_index, cluster_of, n, shape, what):
    """Smallest value of a map within each cluster (NaN when absent or no finite value)."""
    if volume is None:
        return np.full(n, np.nan)
    volume = np.asarray(volume, dtype=float)
    if volume.shape != shape:
        raise ValueError(f"{what} has shape {volume.shape}, the grid {shape}")
    values = volume.ravel()[flat_index]
    values = np.where(np.isnan(values), np.inf, values)
    out = np.full(n, np.inf)
    np.minimum.at(out, cluster_of, values)
    return np.where(np.isfinite(out), out, np.nan)


def _region_lookup(atlas: Atlas) -> dict[int, tuple[str, str, str]]:
    r = atlas.regions
    return {
        int(i): (str(n), str(a), str(h))
        for i, n, a, h in zip(
            r["index"], r["name"], r["abbreviation"], r["hemisphere"], strict=True
        )
    }


def _percent(fraction: float) -> str:
    """A share as a whole percentage; "<1%" for a share that would round to 0."""
    if 0.0 < fraction < 0.005:
        return "<1%"
    return f"{100.0 * fraction:.0f}%"


def _regions_text(
    overlap: np.ndarray,
    cluster_voxels: float,
    region_voxels: np.ndarray,
    names: np.ndarray,
    hemispheres: np.ndarray,
    top: int,
) -> str:
    """ "name [abbreviation] (hemisphere) 45% of cluster, 12% of region; ..." for the
    largest overlaps."""
    order = np.argsort(-overlap, kind="stable")[:top]
    parts = []
    for r in order:
        if overlap[r] <= 0:
            break
        of_cluster = _percent(overlap[r] / cluster_voxels)
        of_region = _percent(overlap[r] / region_voxels[r])
        parts.append(
            f"{names[r]} ({hemispheres[r]}) {of_cluster} of cluster, {of_region} of region"
        )
    return "; ".join(parts) if parts else UNLABELLED


def cluster_table(
    clusters: Clusters,
    z3d: np.ndarray,
    t3d: np.ndarray,
    effect3d: np.ndarray,
    mask: np.ndarray,
    atlas: Atlas,
    grid: Grid,
    origin_mm: Sequence[float] | np.ndarray | None,
    *,
    significant: np.ndarray,
    p_extent: np.ndarray | None,
    p_mass: np.ndarray | None,
    p_voxel3d: np.ndarray | None = None,
    p_tfce3d: np.ndarray | None = None,
    q3d: np.ndarray | None = None,
    subpeak_distance_mm: float = DEFAULT_SUBPEAK_DISTANCE_MM,
    top_regions: int = DEFAULT_TOP_REGIONS,
    max_subpeaks: int = DEFAULT_MAX_SUBPEAKS,
) -> pd.DataFrame:
    """One row per peak of every significant cluster, with its regions.

    Parameters
    ----------
    clusters
        Clusters of the z map (:func:`grouplevel.inference.clusters.find_clusters`).
    z3d, t3d, effect3d
        z, t and effect maps on the grid; peaks are the local maxima of ``sign * z``.
    mask
        Boolean analysis mask on the grid (the atlas's in-mask voxels, in C order).
    atlas
        The atlas on the study grid.
    grid
        The study grid.
    origin_mm
        World coordinates of the stereotaxic origin (e.g. bregma); None leaves the
        stereotaxic columns NaN.
    significant
        ``(n_clusters,)`` bool: which clusters the table lists (the caller's decision).
    p_extent, p_mass
        ``(n_clusters,)`` FWE-corrected p of each cluster's extent and mass; None (no
        permutation test) leaves the columns NaN.
    p_voxel3d, p_tfce3d, q3d
        Optional maps (grid shape) of voxel FWE p, TFCE FWE p and FDR q; the table gives
        their smallest value in each cluster (NaN when absent).
    subpeak_distance_mm
        Smallest distance between listed peaks of one cluster.
    top_regions
        Regions named in the ``regions`` column.
    max_subpeaks
        Sub-peaks listed under each cluster besides its main peak.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`CLUSTER_COLUMNS`. ``cluster`` is the cluster's label in
        ``clusters.labels``; ``peak`` is 1 for the main peak and 2, 3, ... for
        sub-peaks, which follow their cluster's main row. ``sign`` is +1 or -1.
        ``voxels``, ``volume_mm3``, the centre of mass (``centre_*``; the mean position
        of the cluster's voxels), the cluster p-values, the minima of the optional maps
        and ``regions`` are cluster-level and empty (NA / NaN / "") on sub-peak rows.
        ``peak_*_mm`` are template (world) mm, ``peak_AP_mm`` etc. stereotaxic mm from
        the origin (:func:`grouplevel.coordinates.to_stereotaxic`). ``peak_region`` is
        the leaf with the largest share of the peak voxel (:attr:`Atlas.label_volume`),
        :data:`UNLABELLED` when none. ``regions`` lists the leaves with the largest
        shares of the cluster: "name [abbreviation] (hemisphere) 45% of cluster, 12% of
        region" (the abbreviation where the atlas gives one), where the second number is
        the share of the region's in-mask volume inside the cluster.
    """
    shape = tuple(grid.shape)
    labels, mask, z3d, t3d, effect3d = _check_cluster_maps(
        clusters, z3d, t3d, effect3d, mask, shape
    )
    n = clusters.n_clusters
    significant = np.asarray(significant, dtype=bool).reshape(-1)
    if significant.shape != (n,):
        raise ValueError(f"significant has {significant.size} values for {n} clusters")
    level = {
        "p_fwe_cluster_extent": _optional_cluster_vector(p_extent, n, "p_extent"),
        "p_fwe_cluster_mass": _optional_cluster_vector(p_mass, n, "p_mass"),
    }
    voxels, centre_mm, minima = _cluster_summaries(labels, n, grid, p_voxel3d, p_tfce3d, q3d)
    level.update(minima)
    overlap = _LeafOverlap.of(atlas, labels, mask, n)
    origin = None if origin_mm is None else np.asarray(origin_mm, dtype=float)
    lookup = _region_lookup(atlas)
    boxes = ndimage.find_objects(labels.astype(np.int64), max_label=n)
    rows: list[dict[str, object]] = []
    for k in np.flatnonzero(significant):  # a loop over reported clusters
        sign = int(clusters.sign[k])
        peaks = _local_maxima_in_box(
            z3d, labels, int(k) + 1, boxes[k], grid.affine, float(subpeak_distance_mm), sign
        )[: 1 + max(int(max_subpeaks), 0)]
        peak_mm = voxel_to_mm(peaks, grid.affine).reshape(-1, 3)
        for number, (voxel, mm) in enumerate(zip(peaks, peak_mm, strict=True), start=1):
            at = tuple(int(v) for v in voxel)
            row = _peak_row(int(k), number, sign, at, mm, origin, z3d, t3d, effect3d)
            row.update(
                zip(
                    ("peak_region", "peak_region_abbreviation", "peak_region_hemisphere"),
                    lookup.get(int(atlas.label_volume[at]), (UNLABELLED, "", "")),
                    strict=True,
                )
            )
            if number == 1:
                row.update(
                    {
                        "voxels": int(voxels[k]),
                        "volume_mm3": float(voxels[k]) * grid.voxel_volume,
                        **_position_columns("centre", centre_mm[k], origin),
                        **{column: values[k] for column, values in level.items()},
                        "regions": overlap.text(k, float(voxels[k]), int(top_regions)),
                    }
                )
            else:
                row["regions"] = ""
            rows.append(row)
    return _typed_cluster_table(rows)


# --------------------------------------------------------------------------------------
# The steps of cluster_table
# --------------------------------------------------------------------------------------


def _check_cluster_maps(clusters, z3d, t3d, effect3d, mask, shape):
    """Labels, mask and the three statistic maps, all on the grid."""
    labels = np.asarray(clusters.labels)
    mask = np.asarray(mask, dtype=bool)
    for what, array in (("labels", labels), ("z3d", z3d), ("t3d", t3d), ("effect3d", effect3d)):
        if np.shape(array) != shape:
            raise ValueError(f"{what} has shape {np.shape(array)}, the grid {shape}")
    if mask.shape != shape:
        raise ValueError(f"mask has shape {mask.shape}, the grid {shape}")
    as_float = (np.asarray(a, dtype=float) for a in (z3d, t3d, effect3d))
    return (labels, mask, *as_float)


def _cluster_summaries(labels, n, grid, p_voxel3d, p_tfce3d, q3d):
    """Voxels, centre (mm) and smallest voxel-wise p / q of every cluster, vectorised
    over all voxels of all clusters."""
    shape = tuple(grid.shape)
    flat = labels.ravel()
    members = np.flatnonzero(flat > 0)
    cluster_of = flat[members].astype(np.int64) - 1
    voxels = np.bincount(cluster_of, minlength=n).astype(np.int64)
    ijk = np.column_stack(np.unravel_index(members, shape)).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        centre_ijk = (
            np.column_stack(
                [np.bincount(cluster_of, weights=ijk[:, a], minlength=n) for a in range(3)]
            )
            / voxels[:, None]
        )
    centre_mm = voxel_to_mm(centre_ijk, grid.affine).reshape(n, 3)
    minima = {
        column: _cluster_minimum(values, members, cluster_of, n, shape, what)
        for column, values, what in (
            ("p_fwe_voxel_min", p_voxel3d, "p_voxel3d"),
            ("p_fwe_tfce_min", p_tfce3d, "p_tfce3d"),
            ("q_min", q3d, "q3d"),
        )
    }
    return voxels, centre_mm, minima


class _LeafOverlap:
    """Overlap of each cluster with each leaf region, in voxels (share-weighted)."""

    def __init__(self, overlap, leaf_voxels, names, hemispheres) -> None:
        self.overlap = overlap
        self.leaf_voxels = leaf_voxels
        self.names = names
        self.hemispheres = hemispheres

    @classmethod
    def of(cls, atlas: Atlas, labels: np.ndarray, mask: np.ndarray, n: int) -> _LeafOverlap:
        regions = atlas.regions
        leaf = regions["is_leaf"].to_numpy(dtype=bool)
        in_mask_label = labels[mask].astype(np.int64)
        in_cluster = np.flatnonzero(in_mask_label > 0)
        indicator = sp.csr_matrix(
            (np.ones(in_cluster.size), (in_mask_label[in_cluster] - 1, in_cluster)),
            shape=(n, int(mask.sum())),
        )
        leaf_shares = atlas.shares[:, np.flatnonzero(leaf)]
        return cls(
            (indicator @ leaf_shares).toarray(),
            np.asarray(leaf_shares.sum(axis=0)).ravel(),
            _names_with_abbreviations(regions)[leaf],
            regions["hemisphere"].to_numpy()[leaf],
        )

    def text(self, k: int, cluster_voxels: float, top: int) -> str:
        """The ``regions`` cell of cluster ``k`` (0-based)."""
        return _regions_text(
            self.overlap[k], cluster_voxels, self.leaf_voxels, self.names, self.hemispheres, top
        )


def _names_with_abbreviations(regions) -> np.ndarray:
    """Each region's name with its abbreviation beside it ("primary auditory area [A1]")
    where the atlas gives one that differs from the name."""
    names = regions["name"].astype(str).to_numpy()
    short = regions["abbreviation"].astype(str).str.strip().to_numpy()
    return np.array(
        [
            f"{n} [{a}]" if a and a.casefold() != n.casefold() else n
            for n, a in zip(names, short, strict=True)
        ],
        dtype=object,
    )


def _position_columns(prefix: str, mm: np.ndarray, origin: np.ndarray | None) -> dict:
    """``<prefix>_x_mm`` ... (template mm) and ``<prefix>_AP_mm`` ... (stereotaxic)."""
    stereo = to_stereotaxic(mm, origin) if origin is not None else np.full(3, np.nan)
    out = {f"{prefix}_{axis}_mm": mm[a] for a, axis in enumerate("xyz")}
    out.update(
        {
            f"{prefix}_{column}": value
            for column, value in zip(STEREOTAXIC_COLUMNS, stereo, strict=True)
        }
    )
    return out


def _peak_row(k, number, sign, at, mm, origin, z3d, t3d, effect3d) -> dict[str, object]:
    """The peak columns of one row: its statistics and position."""
    return {
        "cluster": k + 1,
        "peak": number,
        "sign": sign,
        "z": z3d[at],
        "t": t3d[at],
        "effect": effect3d[at],
        **_position_columns("peak", mm, origin),
    }


def _typed_cluster_table(rows: list[dict[str, object]]) -> pd.DataFrame:
    """The rows in :data:`CLUSTER_COLUMNS` order with integer, nullable and float types."""
    table = pd.DataFrame(rows, columns=list(CLUSTER_COLUMNS))
    table["voxels"] = table["voxels"].astype("Int64")
    for column in ("cluster", "peak", "sign"):
        table[column] = table[column].astype(np.int64)
    float_columns = [
        c
        for c in CLUSTER_COLUMNS
        if c not in ("cluster", "peak", "sign", "voxels", "regions")
        and not c.startswith("peak_region")
    ]
    table[float_columns] = table[float_columns].astype(float)
    return table


# --------------------------------------------------------------------------------------
# Region values
# --------------------------------------------------------------------------------------


def _as_runs_by_voxels(array: np.ndarray, shares: sp.spmatrix, what: str) -> np.ndarray:
    array = np.asarray(array)
    if array.ndim != 2 or array.shape[1] != shares.shape[0]:
        raise ValueError(
            f"{what} must be (runs, in-mask voxels) with {shares.shape[0]} voxels, "
            f"got {array.shape}"
        )
    return array


def _weighted_sums(shares: sp.spmatrix, values: np.ndarray) -> np.ndarray:
    """``values @ shares`` for dense (runs, V) values and sparse (V, R) shares."""
    return np.asarray(shares.T @ values.T).T


def region_values(
    y: np.ndarray, present: np.ndarray, shares: sp.spmatrix, *, chunk_rows: int | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Share-weighted mean of each run's in-mask values over each region.

    Parameters
    ----------
    y
        ``(n_runs, V)`` values at the in-mask voxels (mask voxels in C order).
    present
        ``(n_runs, V)`` bool: the run has data at the voxel. NaN values count as absent
        whatever ``present`` says.
    shares
        ``(V, n_regions)`` sparse shares (:attr:`Atlas.shares`).
    chunk_rows
        Runs averaged together (default all), each block converted to float64 on its
        own; a run's averages are its own, so the block size changes only the memory
        used (:func:`grouplevel.model.memory.chunk_rows` sizes it for a budget).

    Returns
    -------
    values
        ``(n_runs, n_regions)``: ``Σ_v w_rv y_kv / Σ_v w_rv`` over the voxels ``v`` where
        run ``k`` has data, with ``w_rv`` the share of voxel ``v`` in region ``r``; NaN
        where the run has no data in the region.
    coverage
        ``(n_runs, n_regions)``: the share-weighted fraction of the region's in-mask
        volume where the run has data (0 to 1; NaN for a region with no in-mask volume).

    References
    ----------
    Poldrack RA (2007). Soc Cogn Affect Neurosci 2:67-70.
    """
    shares = sp.csr_matrix(shares)
    y = _as_runs_by_voxels(np.asarray(y), shares, "y")
    present = _as_runs_by_voxels(np.asarray(present, dtype=bool), shares, "present")
    if present.shape != y.shape:
        raise ValueError(f"present {present.shape} and y {y.shape} differ in shape")
    n = y.shape[0]
    step = max(1, n if chunk_rows is None else int(chunk_rows))
    weight = np.empty((n, shares.shape[1]))
    sums = np.empty((n, shares.shape[1]))
    for lo in range(0, n, step):  # blocks of runs, not voxels
        yb = np.asarray(y[lo : lo + step], dtype=float)
        pb = present[lo : lo + step] & np.isfinite(yb)
        weight[lo : lo + step] = _weighted_sums(shares, pb.astype(float))
        sums[lo : lo + step] = _weighted_sums(shares, np.where(pb, yb, 0.0))
    total = np.asarray(shares.sum(axis=0)).ravel()
    with np.errstate(invalid="ignore", divide="ignore"):
        values = np.where(weight > 0, sums / weight, np.nan)
        coverage = np.where(total > 0, weight / total, np.nan)
    return values, coverage


def region_variances(
    variance: np.ndarray,
    present: np.ndarray,
    shares: sp.spmatrix,
    *,
    chunk_rows: int | None = None,
) -> np.ndarray:
    """First-level variance of each run's region average, assuming fully correlated noise.

    The region average is ``ȳ = Σ_v a_v y_v`` with ``a_v = w_v / Σ w``. Its variance is
    ``Σ_u Σ_v a_u a_v ρ_uv s_u s_v``, which needs the correlation ``ρ`` of the first-level
    noise between voxels, unknown here. With ``ρ = 1`` (noise fully correlated within the
    region) it is ``(Σ_v a_v s_v)²``, the square of the share-weighted mean of the
    standard errors. Every correlation ≤ 1 gives a smaller value, so this is an upper
    bound: conservative, never overstating the precision of a region average. For a region
    with one voxel it is exact.

    Parameters
    ----------
    variance
        ``(n_runs, V)`` first-level variances ``s²`` at the in-mask voxels.
    present
        ``(n_runs, V)`` bool: the run has data there (NaN variances count as absent).
    shares
        ``(V, n_regions)`` sparse shares.
    chunk_rows
        Runs taken together (default all), each block converted to float64 on its own:
        a run's bound is its own, so the block size changes only the memory used
        (:func:`grouplevel.model.memory.chunk_rows` sizes it for a budget).

    Returns
    -------
    numpy.ndarray
        ``(n_runs, n_regions)``; NaN where the run has no data in the region.

    References
    ----------
    Borenstein M, Hedges LV, Higgins JPT, Rothstein HR (2009). Introduction to
    Meta-Analysis. Wiley, chapter 24 (a mean of correlated outcomes; with correlation 1
    the conservative choice; chapter from memory).
    """
    shares = sp.csr_matrix(shares)
    # kept in its stored precision (float32 maps stay float32); one block of runs at a
    # time becomes float64 below
    variance = _as_runs_by_voxels(np.asarray(variance), shares, "variance")
    present = _as_runs_by_voxels(np.asarray(present, dtype=bool), shares, "present")
    if present.shape != variance.shape:
        raise ValueError(f"present {present.shape} and variance {variance.shape} differ")
    n = variance.shape[0]
    mean_se = np.empty((n, shares.shape[1]))
    for block in voxel_chunks(n, max(1, n if chunk_rows is None else int(chunk_rows))):
        vb = np.asarray(variance[block], dtype=float)
        pb = present[block]
        if np.any(vb[pb & np.isfinite(vb)] < 0):
            raise ValueError("first-level variances must not be negative")
        se = np.sqrt(np.where(pb, vb, np.nan))
        del vb
        mean_se[block], _ = region_values(se, pb, shares)
    return mean_se**2


# --------------------------------------------------------------------------------------
# Region statistics
# --------------------------------------------------------------------------------------


def _check_region_arrays(atlas: Atlas, values: np.ndarray, variances: np.ndarray | None):
    values = np.asarray(values, dtype=float)
    n_regions = len(atlas.regions)
    if values.ndim != 2 or values.shape[1] != n_regions:
        raise ValueError(f"values must be (runs, {n_regions} regions), got {values.shape}")
    if variances is not None:
        variances = np.asarray(variances, dtype=float)
        if variances.shape != values.shape:
            raise ValueError(f"variances {variances.shape} and values {values.shape} differ")
        variances = np.where(np.isfinite(values), variances, np.nan)
    return values, variances


@dataclass(frozen=True)
class RegionModel:
    """How region averages are fitted and tested when the voxel model goes beyond one
    random intercept per animal (so that regions.tsv follows the same model).

    Attributes
    ----------
    fit
        ``(values, variances) -> fit``: the voxel model's fit applied to the
        ``(n_runs, n_regions)`` region averages (a fit with ``beta``, ``cov_beta``,
        ``var_animal``, ``var_run``, ``n_runs``, ``n_animals`` and ``components``).
    df
        ``(fit, present) -> (n_regions,)`` degrees of freedom of the tested contrast.
    columns
        Variance component name → regions.tsv column (e.g. ``"session"`` →
        ``"var_session"``), in the order the columns are written.
    """

    fit: Callable
    df: Callable
    columns: Mapping[str, str]


def region_table(
    atlas: Atlas,
    values: np.ndarray,
    variances: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    c: np.ndarray,
    *,
    estimate_run_variance: bool,
    alpha: float,
    fdr_method: str,
    surviving: Mapping[str, np.ndarray],
    model: RegionModel | None = None,
) -> pd.DataFrame:
    """The group effect in every atlas region, from the same REML model as the voxels.

    Each region's run values (:func:`region_values`) and their first-level variances
    (:func:`region_variances`) are fitted with :func:`grouplevel.model.fit_reml`, one
    region per "voxel", and the contrast is tested with
    :func:`grouplevel.model.test_contrast` on the between-animal degrees of freedom.

    Parameters
    ----------
    atlas
        The atlas; one output row per row of ``atlas.regions`` (leaves and parents, each
        hemisphere).
    values
        ``(n_runs, n_regions)`` region averages, NaN where a run has no data.
    variances
        ``(n_runs, n_regions)`` their first-level variances, or None.
    X, animal
        Design ``(n_runs, p)`` and animal codes ``0..m-1`` of the runs.
    c
        ``(p,)`` contrast weights.
    estimate_run_variance
        Estimate the between-run variance σ² (else fixed at 0).
    alpha
        False discovery rate for ``fdr_significant``.
    fdr_method
        ``"bh"`` or ``"by"``, across the regions with a test.
    surviving
        Method name → ``(V,)`` bool in-mask vector of voxels that survive it; each gives
        a column ``surviving_<name>``: the share-weighted fraction of the region's
        in-mask volume that survives.
    model
        How the regions are fitted and tested when the voxel model has more than a
        random intercept per animal (sessions, random slopes, variance groups): the same
        random effects and df rule as the voxels (:class:`RegionModel`). Its variance
        components get columns between ``var_animal`` and ``var_run``. None: the
        run-within-animal model and the between-animal df.

    Returns
    -------
    pandas.DataFrame
        Columns ``index, name, abbreviation, hemisphere, parent, depth, volume_mm3``
        (in the mask), ``effect, se, ci_low, ci_high`` (:data:`CONFIDENCE_LEVEL`, t with
        the model df), ``t, df, p`` (two-sided), ``q`` (FDR across regions),
        ``fdr_significant, var_animal, var_run, runs, animals`` and the
        ``surviving_*`` columns. Regions without enough data have NaN statistics.

    References
    ----------
    Patterson HD, Thompson R (1971). Biometrika 58:545-554.

    Benjamini Y, Hochberg Y (1995). J R Stat Soc B 57:289-300.
    """
    values, variances = _check_region_arrays(atlas, values, variances)
    shares = sp.csr_matrix(atlas.shares)
    masks = _surviving_masks(surviving, shares.shape[0])
    statistics = _region_statistics(
        values,
        variances,
        X,
        animal,
        c,
        estimate_run_variance=estimate_run_variance,
        alpha=alpha,
        fdr_method=fdr_method,
        model=model,
    )
    regions = atlas.regions
    table = pd.DataFrame(
        {
            "index": regions["index"].to_numpy(),
            "name": regions["name"].to_numpy(),
            "abbreviation": regions["abbreviation"].to_numpy(),
            "hemisphere": regions["hemisphere"].to_numpy(),
            "parent": regions["parent"].to_numpy(),
            "depth": regions["depth"].to_numpy(),
            "volume_mm3": regions["mask_volume_mm3"].to_numpy(dtype=float),
            **statistics,
        }
    )
    total = np.asarray(shares.sum(axis=0)).ravel()
    for method, vector in masks.items():
        with np.errstate(invalid="ignore", divide="ignore"):
            table[f"surviving_{method}"] = np.where(
                total > 0, (shares.T @ vector.astype(float)) / total, np.nan
            )
    return table


def _surviving_masks(surviving: Mapping[str, np.ndarray], n_vox: int) -> dict[str, np.ndarray]:
    """Each method's surviving voxels as a ``(n_vox,)`` bool vector, its length checked."""
    masks = {}
    for method, vector in surviving.items():
        vector = np.asarray(vector, dtype=bool).reshape(-1)
        if vector.shape != (n_vox,):
            raise ValueError(
                f"surviving[{method!r}] has {vector.size} values for {n_vox} in-mask voxels"
            )
        masks[method] = vector
    return masks


def _region_statistics(
    values: np.ndarray,
    variances: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    c: np.ndarray,
    *,
    estimate_run_variance: bool,
    alpha: float,
    fdr_method: str,
    model: RegionModel | None = None,
) -> dict[str, np.ndarray]:
    """The REML fit and contrast test of every region, FDR across regions.

    Returns
    -------
    dict
        Column name → ``(n_regions,)`` values, from ``effect`` to ``animals`` in the
        order of :func:`region_table`.
    """
    present = np.isfinite(values)
    extra: dict[str, np.ndarray] = {}
    if model is None:
        fit = fit_reml(values, variances, X, animal, estimate_run_variance=estimate_run_variance)
        df = between_animal_df(X, animal, present, c)
    else:
        fit = model.fit(values, variances)
        df = model.df(fit, present)
        components = getattr(fit, "components", {}) or {}
        extra = {col: components[name] for name, col in model.columns.items() if name in components}
    result = test_contrast(fit, c, df)
    q = fdr(result.p, alpha=alpha, method=fdr_method).q
    with np.errstate(invalid="ignore"):
        critical = t_ppf(0.5 + CONFIDENCE_LEVEL / 2.0, result.df)
    return {
        "effect": result.effect,
        "se": result.se,
        "ci_low": result.effect - critical * result.se,
        "ci_high": result.effect + critical * result.se,
        "t": result.t,
        "df": result.df,
        "p": result.p,
        "q": q,
        "fdr_significant": np.nan_to_num(q, nan=np.inf) <= alpha,
        "var_animal": fit.var_animal,
        **extra,
        "var_run": fit.var_run,
        "runs": fit.n_runs,
        "animals": fit.n_animals,
    }


def animal_table(
    atlas: Atlas,
    values: np.ndarray,
    variances: np.ndarray | None,
    animal_ids: Sequence[str],
    animal: np.ndarray,
    var_run: np.ndarray,
) -> pd.DataFrame:
    """Each animal's effect in each region: the precision-weighted mean of its runs.

    Run ``k`` of the animal gets the weight ``w_k = 1 / (σ̂² + s_k²)`` with the region's
    between-run variance σ̂² (from :func:`region_table`) and the run's first-level
    variance ``s_k²`` of the region average; the animal's effect is ``Σ w_k y_k / Σ w_k``
    with standard error ``sqrt(1 / Σ w_k)``. Where every weight is undefined (σ̂² = 0 and
    no first-level variances) the effect is the plain mean of the runs and the standard
    error is NaN.

    Parameters
    ----------
    atlas
        The atlas (one column of ``values`` per row of ``atlas.regions``).
    values, variances
        ``(n_runs, n_regions)`` region averages and their first-level variances (None:
        0).
    animal_ids
        Names of the animals, position = animal code.
    animal
        ``(n_runs,)`` animal code of each run.
    var_run
        ``(n_regions,)`` σ̂² per region (NaN is read as 0).

    Returns
    -------
    pandas.DataFrame
        One row per animal and region (animal by animal, regions in atlas order):
        ``animal, index, name, hemisphere, effect, se, runs``.

    References
    ----------
    Borenstein M, Hedges LV, Higgins JPT, Rothstein HR (2009). Introduction to
    Meta-Analysis. Wiley (inverse-variance weighting).
    """
    values, variances = _check_region_arrays(atlas, values, variances)
    n_runs, n_regions = values.shape
    animal = np.asarray(animal, dtype=np.int64).reshape(-1)
    animal_ids = [str(a) for a in animal_ids]
    m = len(animal_ids)
    if animal.shape != (n_runs,) or (n_runs and (animal.min() < 0 or animal.max() >= m)):
        raise ValueError(f"animal must hold {n_runs} codes in 0..{m - 1}")
    var_run = np.nan_to_num(np.asarray(var_run, dtype=float).reshape(-1), nan=0.0)
    if var_run.shape != (n_regions,):
        raise ValueError(f"var_run has {var_run.size} values for {n_regions} regions")
    means = animal_means(values, animal, n_animals=m, variance=variances, var_run=var_run)
    effect, se, runs = means.mean, means.se, means.runs
    regions = atlas.regions
    return pd.DataFrame(
        {
            "animal": np.repeat(np.asarray(animal_ids, dtype=object), n_regions),
            "index": np.tile(regions["index"].to_numpy(), m),
            "name": np.tile(regions["name"].to_numpy(), m),
            "hemisphere": np.tile(regions["hemisphere"].to_numpy(), m),
            "effect": effect.ravel(),
            "se": se.ravel(),
            "runs": runs.ravel().astype(np.int64),
        }
    )
