"""Region-level results of one group map: its clusters, regions and animals.

Glue between the fitted maps (:class:`~grouplevel.results.maps.GroupMap`), the user's
atlas (:mod:`grouplevel.anatomy.atlas`) and the table builders
(:mod:`grouplevel.anatomy.regions`). Which
clusters count as significant depends on ``[clusters] method``:

* ``cluster_extent`` / ``cluster_mass``: the clusters at the cluster-forming threshold
  whose FWE p (extent or mass) is at most ``alpha``;
* ``tfce`` / ``voxel`` / ``fdr``: the connected groups of voxels that survive that
  voxel-wise method at ``alpha``.

Every reported cluster carries the p-values of all methods that were run.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from grouplevel.anatomy.atlas import Atlas
from grouplevel.anatomy.regions import (
    RegionModel,
    animal_table,
    cluster_table,
    region_table,
    region_values,
    region_variances,
)
from grouplevel.inference import Clusters, find_clusters
from grouplevel.intake.design import Design
from grouplevel.intake.settings import Settings
from grouplevel.results.maps import GroupMap


@dataclass(frozen=True)
class RegionData:
    """Per-run region averages of one first-level contrast (computed once, shared by its
    group contrasts)."""

    atlas: Atlas  # restricted to the analysed voxels (rows of ``shares`` = mask voxels)
    values: np.ndarray  # (n_runs, n_regions)
    variances: np.ndarray | None  # (n_runs, n_regions) or None (σ² absorbs them)


@dataclass(frozen=True)
class RegionTables:
    clusters: pd.DataFrame
    regions: pd.DataFrame
    animals: pd.DataFrame
    method: str
    n_significant_clusters: int


def restrict_atlas(atlas: Atlas, atlas_mask: np.ndarray, mask: np.ndarray) -> Atlas:
    """The atlas with one share row per voxel of ``mask`` (a subset of ``atlas_mask``)."""
    position = np.full(atlas_mask.shape, -1, dtype=np.int64)
    position[atlas_mask] = np.arange(int(atlas_mask.sum()))
    rows = position[mask]
    if (rows < 0).any():
        raise ValueError("the analysis mask reaches outside the atlas mask")
    return replace(atlas, shares=atlas.shares[rows])


def region_data(
    atlas: Atlas,
    atlas_mask: np.ndarray,
    mask: np.ndarray,
    y: np.ndarray,
    variance: np.ndarray | None,
    estimate_run_variance: bool,
    chunk_rows: int | None = None,
) -> RegionData:
    """Average every run over every region (leaves and parents).

    When σ² is estimated, the region averages enter the model without first-level
    variances: their exact first-level variance is unknown (noise is spatially
    correlated within a region), and the run-to-run spread that σ² captures already
    contains it. With ``run_variance = "known"`` (σ² = 0) the conservative bound of
    fully correlated noise is used (:func:`grouplevel.regions.region_variances`).
    ``chunk_rows`` runs are averaged together (default all; see
    :func:`grouplevel.anatomy.regions.region_values`).
    """
    restricted = restrict_atlas(atlas, atlas_mask, mask)
    present = np.isfinite(y)
    values, _coverage = region_values(y, present, restricted.shares, chunk_rows=chunk_rows)
    variances = None
    if variance is not None and not estimate_run_variance:
        variances = region_variances(variance, present, restricted.shares, chunk_rows=chunk_rows)
    return RegionData(atlas=restricted, values=values, variances=variances)


def _grid(values: np.ndarray, mask: np.ndarray, fill: float = 0.0) -> np.ndarray:
    out = np.full(mask.shape, fill, dtype=float)
    out[mask] = values
    return out


def surviving_voxels(gm: GroupMap, alpha: float) -> dict[str, np.ndarray]:
    """In-mask boolean maps of the voxels surviving each method that was run."""
    inf = gm.inference
    out = {"fdr": np.nan_to_num(inf.q, nan=1.0) <= alpha}
    perm = inf.permutation
    if perm is not None:
        out["voxel"] = perm.p_fwe_voxel <= alpha
        labels = perm.clusters.labels[gm.mask]
        for key, p in (
            ("cluster_extent", perm.p_fwe_cluster_extent),
            ("cluster_mass", perm.p_fwe_cluster_mass),
        ):
            ok = np.concatenate([[False], p <= alpha])
            out[key] = ok[labels]
        if perm.tfce is not None:
            out["tfce"] = perm.p_fwe_tfce <= alpha
    return out


def _significant_clusters(
    gm, method: str, surviving: dict[str, np.ndarray], settings: Settings
) -> tuple[Clusters, np.ndarray, np.ndarray | None, np.ndarray | None]:
    inf = gm.inference
    perm = inf.permutation
    alpha = settings.inference.alpha
    if method in ("cluster_extent", "cluster_mass"):
        p = perm.p_fwe_cluster_extent if method == "cluster_extent" else perm.p_fwe_cluster_mass
        return perm.clusters, p <= alpha, perm.p_fwe_cluster_extent, perm.p_fwe_cluster_mass
    z = _grid(np.where(surviving[method], gm.z, 0.0), gm.mask)
    groups = find_clusters(
        z,
        gm.mask,
        0.0,
        connectivity=settings.inference.connectivity,
        voxel_volume_mm3=gm.grid.voxel_volume,
        sided=inf.sided,
    )
    significant = np.ones(groups.n_clusters, dtype=bool)
    if perm is None:
        return groups, significant, None, None
    # each group of surviving voxels takes the cluster-level p of the cluster (at the
    # cluster-forming threshold) that holds its peak; 1 when the peak is in none
    labels = perm.clusters.labels
    at_peak = labels[tuple(groups.peak_index.T)] if groups.n_clusters else np.zeros(0, int)
    pad_extent = np.concatenate([[1.0], perm.p_fwe_cluster_extent])
    pad_mass = np.concatenate([[1.0], perm.p_fwe_cluster_mass])
    return groups, significant, pad_extent[at_peak], pad_mass[at_peak]


def region_tables(
    gm: GroupMap,
    data: RegionData,
    design: Design,
    c: np.ndarray,
    settings: Settings,
    *,
    model: RegionModel | None = None,
) -> RegionTables:
    """clusters.tsv, regions.tsv and animals.tsv of one group map, as DataFrames.

    ``model``: how the regions are fitted and tested when the voxel model goes beyond
    one random intercept per animal (:class:`~grouplevel.anatomy.regions.RegionModel`).
    """
    inf_settings = settings.inference
    method = settings.clusters.resolved_method(inf_settings)
    surviving = surviving_voxels(gm, inf_settings.alpha)
    clusters, significant, p_extent, p_mass = _significant_clusters(gm, method, surviving, settings)
    perm = gm.inference.permutation
    mask = gm.mask
    cluster_df = cluster_table(
        clusters,
        _grid(gm.z, mask),
        _grid(gm.t, mask),
        _grid(gm.effect, mask),
        mask,
        data.atlas,
        gm.grid,
        settings.space.origin_mm,
        significant=significant,
        p_extent=p_extent,
        p_mass=p_mass,
        p_voxel3d=None if perm is None else _grid(perm.p_fwe_voxel, mask, 1.0),
        p_tfce3d=None
        if perm is None or perm.p_fwe_tfce is None
        else _grid(perm.p_fwe_tfce, mask, 1.0),
        q3d=_grid(np.nan_to_num(gm.inference.q, nan=1.0), mask, 1.0),
        subpeak_distance_mm=settings.clusters.subpeak_distance_mm,
        top_regions=settings.clusters.top_regions,
    )
    regions_df = region_table(
        data.atlas,
        data.values,
        data.variances,
        design.matrix,
        design.animal,
        c,
        estimate_run_variance=settings.model.run_variance == "estimate",
        alpha=inf_settings.alpha,
        fdr_method=inf_settings.fdr,
        surviving=surviving,
        model=model,
    )
    animals_df = animal_table(
        data.atlas,
        data.values,
        data.variances,
        design.animal_ids,
        design.animal,
        regions_df["var_run"].to_numpy(dtype=float),
    )
    return RegionTables(
        clusters=cluster_df,
        regions=regions_df,
        animals=animals_df,
        method=method,
        n_significant_clusters=int(significant.sum()),
    )
