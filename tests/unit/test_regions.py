"""Cluster tables and region statistics (grouplevel.regions) against outside references.

Outside references used here:
- scipy.ndimage ``label``, ``maximum_position`` and ``center_of_mass`` (Virtanen et al.
  2020, Nat Methods 17:261) for cluster extents, peaks and centres;
- nilearn ``reporting.get_clusters_table`` (Abraham et al. 2014, Front Neuroinform
  8:14) on the statistical image nilearn ships with its package data
  (``datasets.load_sample_motor_activation_image``, a "left vs right button press" map);
- a brute-force pure-Python search of 26-neighbourhood local maxima (the reference for
  the vectorised version, as the conventions ask);
- plain numpy means over label masks, and shares counted by hand on an atlas twice as
  fine as the statistics;
- statsmodels ``MixedLM`` (REML; Seabold & Perktold 2010, Proc 9th Python in Science
  Conf) and ``WLS`` with a fixed scale (inverse-variance weighted mean), statsmodels
  ``multipletests`` (Benjamini & Hochberg 1995, J R Stat Soc B 57:289);
- the variance of a weighted sum of correlated variables, Var(Σ a z) = Σ Σ a_i a_j ρ_ij
  s_i s_j (Borenstein et al. 2009, Introduction to Meta-Analysis, ch. 24; from memory),
  checked by simulation;
- the invented example cohort (grouplevel.example), whose ground truth places the sound
  effects in both auditory cortices and inferior colliculi and the paw effect in the
  right forelimb area (checked on the fitted example in end_to_end/test_example_fit.py).
"""

from __future__ import annotations

import itertools
import math
import warnings

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import ndimage, stats
from statsmodels.regression.linear_model import WLS
from statsmodels.regression.mixed_linear_model import MixedLM
from statsmodels.stats.multitest import multipletests

from grouplevel.atlas import build_atlas
from grouplevel.images import Grid
from grouplevel.inference.clusters import find_clusters
from grouplevel.regions import (
    CLUSTER_COLUMNS,
    UNLABELLED,
    animal_table,
    cluster_table,
    local_maxima,
    region_table,
    region_values,
    region_variances,
)

# --------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------


def _grid(shape, voxel, origin) -> Grid:
    affine = np.diag([*voxel, 1.0])
    affine[:3, 3] = origin
    return Grid(tuple(shape), affine)


def _smooth_field(rng, shape, sigma) -> np.ndarray:
    field = ndimage.gaussian_filter(rng.standard_normal(shape), sigma)
    return field / field.std()


def _world(grid: Grid) -> np.ndarray:
    ijk = np.indices(grid.shape).reshape(3, -1)
    return (grid.affine[:3, :3] @ ijk + grid.affine[:3, 3:4]).reshape(3, *grid.shape)


def _box_atlas(grid: Grid, mask: np.ndarray):
    """Same-grid atlas: four leaves (front/back × left/right) under two parents."""
    x, y, _ = _world(grid)
    labels = np.zeros(grid.shape, dtype=np.int32)
    labels[(x < 0) & (y >= 0)] = 3
    labels[(x < 0) & (y < 0)] = 4
    labels[(x > 0) & (y >= 0)] = 5
    labels[(x > 0) & (y < 0)] = 6
    table = pd.DataFrame(
        [
            (1, "left half", "LH", "left", ""),
            (2, "right half", "RH", "right", ""),
            (3, "front", "F", "left", 1),
            (4, "back", "B", "left", 1),
            (5, "front", "F", "right", 2),
            (6, "back", "B", "right", 2),
        ],
        columns=["index", "name", "abbreviation", "hemisphere", "parent"],
    )
    atlas = build_atlas(labels, grid.affine, table, grid, mask, midline_mm=0.0, min_coverage=0.0)
    return atlas, labels


# a grid with anisotropic voxels, centred so that x = 0 lies between two voxel columns
SHAPE = (20, 22, 16)
VOXEL = (0.3, 0.3, 0.5)
GRID = _grid(SHAPE, VOXEL, [-0.3 * 9.5, -0.3 * 10.5, -0.5 * 7.5])


@pytest.fixture(scope="module")
def field():
    rng = np.random.default_rng(11)
    stat = _smooth_field(rng, SHAPE, 1.5)
    x, y, z = _world(GRID)
    mask = (x / 3.0) ** 2 + (y / 3.2) ** 2 + (z / 3.8) ** 2 <= 1.0
    return stat, mask


# --------------------------------------------------------------------------------------
# 1. clusters and peaks against scipy.ndimage
# --------------------------------------------------------------------------------------


def test_cluster_table_matches_scipy_ndimage(field):
    stat, mask = field
    threshold = 1.2
    clusters = find_clusters(
        stat, mask, threshold, connectivity=26, voxel_volume_mm3=GRID.voxel_volume, sided="two"
    )
    assert clusters.n_clusters >= 6
    atlas, _ = _box_atlas(GRID, mask)
    table = cluster_table(
        clusters,
        stat,
        2.0 * stat,
        0.5 * stat,
        mask,
        atlas,
        GRID,
        (0.0, 1.0, 2.0),
        significant=np.ones(clusters.n_clusters, bool),
        p_extent=np.linspace(0.01, 0.5, clusters.n_clusters),
        p_mass=None,
        max_subpeaks=0,
    )
    assert list(table.columns) == list(CLUSTER_COLUMNS)
    assert len(table) == clusters.n_clusters and (table["peak"] == 1).all()
    inverse = np.linalg.inv(GRID.affine)
    structure = np.ones((3, 3, 3), bool)  # 26-connectivity
    checked = 0
    for sign in (1, -1):
        # scipy.ndimage.label on the same thresholded map (Virtanen et al. 2020)
        labels, n = ndimage.label(mask & (sign * stat > threshold), structure)
        ids = np.arange(1, n + 1)
        sizes = ndimage.sum(np.ones(SHAPE), labels, ids)
        peaks = ndimage.maximum_position(sign * stat, labels, ids)
        centres = ndimage.center_of_mass(np.ones(SHAPE), labels, ids)
        rows = table[table["sign"] == sign]
        assert sorted(rows["voxels"]) == sorted(sizes.astype(int))
        for _, row in rows.iterrows():
            peak_mm = row[["peak_x_mm", "peak_y_mm", "peak_z_mm"]].to_numpy(float)
            voxel = tuple(np.rint(inverse[:3, :3] @ peak_mm + inverse[:3, 3]).astype(int))
            k = labels[voxel] - 1
            assert row["voxels"] == sizes[k]
            assert tuple(peaks[k]) == voxel
            assert row["volume_mm3"] == pytest.approx(sizes[k] * 0.045, rel=1e-12)
            centre = GRID.affine[:3, :3] @ np.asarray(centres[k]) + GRID.affine[:3, 3]
            got = row[["centre_x_mm", "centre_y_mm", "centre_z_mm"]].to_numpy(float)
            assert np.allclose(got, centre, atol=1e-9)
            # the map values at the peak; stereotaxic = offset from the origin (AP = y)
            assert row["z"] == pytest.approx(stat[voxel], abs=1e-12)
            assert row["t"] == pytest.approx(2.0 * stat[voxel], abs=1e-12)
            assert row["effect"] == pytest.approx(0.5 * stat[voxel], abs=1e-12)
            assert row["peak_AP_mm"] == pytest.approx(peak_mm[1] - 1.0, abs=1e-12)
            assert row["peak_ML_mm"] == pytest.approx(peak_mm[0], abs=1e-12)
            assert row["peak_DV_mm"] == pytest.approx(peak_mm[2] - 2.0, abs=1e-12)
            checked += 1
    assert checked == clusters.n_clusters
    assert table["p_fwe_cluster_mass"].isna().all()
    assert np.allclose(table["p_fwe_cluster_extent"], np.linspace(0.01, 0.5, clusters.n_clusters))


def test_cluster_regions_and_minima(field):
    """Peak region, region shares and map minima, counted directly with numpy."""
    stat, mask = field
    clusters = find_clusters(stat, mask, 1.2, voxel_volume_mm3=GRID.voxel_volume)
    atlas, labels = _box_atlas(GRID, mask)
    rng = np.random.default_rng(3)
    q3d = rng.uniform(size=SHAPE)
    q3d[0, 0, 0] = np.nan
    significant = clusters.extent_voxels >= 5
    table = cluster_table(
        clusters,
        stat,
        stat,
        stat,
        mask,
        atlas,
        GRID,
        None,
        significant=significant,
        p_extent=None,
        p_mass=None,
        q3d=q3d,
        top_regions=2,
    )
    assert set(table["cluster"]) == set(np.flatnonzero(significant) + 1)
    assert table[["peak_AP_mm", "centre_DV_mm"]].isna().all().all()  # no origin given
    # the abbreviation stands beside the name
    names = {
        3: "front [F] (left)",
        4: "back [B] (left)",
        5: "front [F] (right)",
        6: "back [B] (right)",
    }
    region_size = {k: int(((labels == k) & mask).sum()) for k in names}
    for _, row in table[table["peak"] == 1].iterrows():
        inside = clusters.labels == row["cluster"]
        assert row["q_min"] == pytest.approx(np.nanmin(q3d[inside]), abs=0)
        counts = {k: int((inside & (labels == k)).sum()) for k in names}
        ranked = sorted((k for k in counts if counts[k]), key=lambda k: -counts[k])[:2]
        expected = "; ".join(
            f"{names[k]} {100 * counts[k] / inside.sum():.0f}% of cluster, "
            + (
                "<1%"
                if 100 * counts[k] / region_size[k] < 0.5
                else f"{100 * counts[k] / region_size[k]:.0f}%"
            )
            + " of region"
            for k in ranked
        )
        assert row["regions"] == expected
    for _, row in table.iterrows():
        voxel = tuple(
            np.rint(
                np.linalg.solve(
                    GRID.affine[:3, :3],
                    row[["peak_x_mm", "peak_y_mm", "peak_z_mm"]].to_numpy(float)
                    - GRID.affine[:3, 3],
                )
            ).astype(int)
        )
        leaf = labels[voxel]
        assert (row["peak_region"], row["peak_region_hemisphere"]) == (
            ("front" if leaf in (3, 5) else "back"),
            ("left" if leaf in (3, 4) else "right"),
        )
    # sub-peak rows repeat the cluster id and leave cluster-level columns empty
    sub = table[table["peak"] > 1]
    assert sub["voxels"].isna().all() and (sub["regions"] == "").all()
    assert (
        table.groupby("cluster")["peak"]
        .apply(lambda p: list(p) == list(range(1, len(p) + 1)))
        .all()
    )


def test_unlabelled_peak_is_named_so():
    grid = _grid((8, 8, 8), (1.0, 1.0, 1.0), [-3.5, -3.5, -3.5])
    mask = np.ones(grid.shape, bool)
    stat = np.zeros(grid.shape)
    stat[1:3, 1:3, 1:3] = 5.0
    stat[1, 1, 1] = 6.0
    labels = np.zeros(grid.shape, np.int32)
    labels[:, 4:, :] = 1  # the blob at j = 1..2 is outside the only region
    table = pd.DataFrame(
        [(1, "front", "F", "both", "")],
        columns=["index", "name", "abbreviation", "hemisphere", "parent"],
    )
    atlas = build_atlas(labels, grid.affine, table, grid, mask, midline_mm=0.0, min_coverage=0.0)
    clusters = find_clusters(stat, mask, 1.0)
    out = cluster_table(
        clusters,
        stat,
        stat,
        stat,
        mask,
        atlas,
        grid,
        None,
        significant=np.ones(1, bool),
        p_extent=None,
        p_mass=None,
    )
    assert out.loc[0, "peak_region"] == UNLABELLED and out.loc[0, "regions"] == UNLABELLED
    assert out.loc[0, "voxels"] == 8


# --------------------------------------------------------------------------------------
# 2. local maxima against a brute-force search
# --------------------------------------------------------------------------------------


def brute_force_maxima(stat, labels, cluster_id, affine, min_distance, sign):
    """Pure-Python reference: every voxel checked against its 26 neighbours."""
    shape = stat.shape
    candidates = []
    for i, j, k in itertools.product(*(range(n) for n in shape)):
        if labels[i, j, k] != cluster_id:
            continue
        value = sign * stat[i, j, k]
        is_max = True
        for di, dj, dk in itertools.product((-1, 0, 1), repeat=3):
            a, b, c = i + di, j + dj, k + dk
            if (di, dj, dk) == (0, 0, 0) or not (
                0 <= a < shape[0] and 0 <= b < shape[1] and 0 <= c < shape[2]
            ):
                continue
            if labels[a, b, c] == cluster_id and sign * stat[a, b, c] > value:
                is_max = False
        if is_max:
            candidates.append((-value, np.ravel_multi_index((i, j, k), shape), (i, j, k)))
    candidates.sort()
    kept = []
    for _, _, voxel in candidates:
        mm = affine[:3, :3] @ np.asarray(voxel, float) + affine[:3, 3]
        if all(math.dist(mm, other) >= min_distance - 1e-9 for other, _ in kept):
            kept.append((mm, voxel))
    return np.array([voxel for _, voxel in kept], dtype=np.int64).reshape(-1, 3)


@pytest.mark.parametrize("min_distance", [0.0, 0.7, 1.6])
def test_local_maxima_equal_brute_force(min_distance):
    rng = np.random.default_rng(5)
    stat = _smooth_field(rng, (14, 12, 10), 0.9)  # rough: many local maxima
    for sign in (1, -1):
        clusters = find_clusters(stat, None, 0.6, sided="positive" if sign > 0 else "negative")
        for cluster_id in range(1, min(clusters.n_clusters, 4) + 1):
            got = local_maxima(stat, clusters.labels, cluster_id, GRID.affine, min_distance, sign)
            want = brute_force_maxima(
                stat, clusters.labels, cluster_id, GRID.affine, min_distance, sign
            )
            assert np.array_equal(got, want), (sign, cluster_id)
            # the cluster peak comes first
            assert tuple(got[0]) == tuple(clusters.peak_index[cluster_id - 1])
        if min_distance == 0.0:
            assert len(local_maxima(stat, clusters.labels, 1, GRID.affine, 0.0, sign)) > 2


def test_local_maxima_plateau_and_absent_label():
    stat = np.zeros((5, 5, 5))
    stat[1:4, 1:4, 1:4] = 1.0
    stat[2, 2, 1] = stat[2, 2, 2] = 3.0  # a plateau of two voxels, 1 mm apart
    labels = (stat > 0).astype(int)
    affine = np.eye(4)
    # first in C order, the other suppressed within 1.5 mm, kept with no distance
    assert local_maxima(stat, labels, 1, affine, 1.5).tolist() == [[2, 2, 1]]
    assert local_maxima(stat, labels, 1, affine, 0.0).tolist() == [[2, 2, 1], [2, 2, 2]]
    assert local_maxima(stat, labels, 2, affine, 1.0).shape == (0, 3)


# --------------------------------------------------------------------------------------
# 3. nilearn's cluster table on the statistical image nilearn ships
# --------------------------------------------------------------------------------------


def test_matches_nilearn_get_clusters_table_on_its_sample_image():
    from nilearn.datasets import load_sample_motor_activation_image
    from nilearn.reporting import get_clusters_table

    path = load_sample_motor_activation_image()  # in nilearn's package data, no download
    img = nib.load(path)
    stat = np.nan_to_num(np.asarray(img.dataobj, dtype=float))
    threshold = 4.0
    # nilearn labels clusters with generate_binary_structure(3, 1): 6-connectivity (faces)
    with warnings.catch_warnings():  # nilearn warns about a plateau peak outside its cluster
        warnings.simplefilter("ignore")
        reference = get_clusters_table(img, stat_threshold=threshold, two_sided=True)
    main = reference[reference["Cluster ID"].astype(str).str.isdigit()].copy()
    main["Peak Stat"] = main["Peak Stat"].astype(float)
    grid = Grid(stat.shape, np.asarray(img.affine, float))
    mask = np.ones(stat.shape, bool)
    clusters = find_clusters(
        stat, mask, threshold, connectivity=6, voxel_volume_mm3=grid.voxel_volume, sided="two"
    )
    x = _world(grid)[0]
    labels = np.where(x < 0, 1, 2)
    atlas = build_atlas(
        labels,
        grid.affine,
        pd.DataFrame(
            [(1, "left", "L", "left", ""), (2, "right", "R", "right", "")],
            columns=["index", "name", "abbreviation", "hemisphere", "parent"],
        ),
        grid,
        mask,
        midline_mm=0.0,
    )
    ours = cluster_table(
        clusters,
        stat,
        stat,
        stat,
        mask,
        atlas,
        grid,
        None,
        significant=np.ones(clusters.n_clusters, bool),
        p_extent=None,
        p_mass=None,
        max_subpeaks=0,
    )
    assert len(ours) == len(main) >= 10
    # Cluster sizes (nilearn "Cluster Size (mm3)") and peak values ("Peak Stat"), as
    # multisets: nilearn sorts clusters by peak value, grouplevel by extent.
    assert sorted(
        zip(
            main["Cluster Size (mm3)"].astype(float),
            main["Peak Stat"].astype(float).round(5),
            strict=True,
        )
    ) == sorted(zip(ours["volume_mm3"], ours["z"].round(5), strict=True))
    # Peak coordinates (nilearn X/Y/Z) where the peak value is unique within its cluster;
    # on a plateau nilearn reports the plateau's centre of mass instead of one voxel.
    compared = 0
    for _, row in ours.iterrows():
        inside = clusters.labels == row["cluster"]
        if np.sum(stat[inside] == row["z"]) != 1:
            continue
        match = main[(main["Peak Stat"] - row["z"]).abs() < 1e-5]
        match = match[match["Cluster Size (mm3)"].astype(float) == row["volume_mm3"]]
        assert len(match) == 1
        assert np.allclose(
            match[["X", "Y", "Z"]].to_numpy(float)[0],
            row[["peak_x_mm", "peak_y_mm", "peak_z_mm"]].to_numpy(float),
        )
        compared += 1
    assert compared >= 5


# --------------------------------------------------------------------------------------
# 4. region values
# --------------------------------------------------------------------------------------


def test_region_values_equal_numpy_means_over_label_masks(field):
    _, mask = field
    atlas, labels = _box_atlas(GRID, mask)
    rng = np.random.default_rng(8)
    n_runs, n_vox = 5, int(mask.sum())
    y = rng.normal(size=(n_runs, n_vox))
    present = rng.uniform(size=y.shape) > 0.1
    y[~present] = np.nan  # absent voxels hold NaN, as in the study arrays
    present[0, :5] = True  # a NaN marked present still counts as absent
    values, coverage = region_values(y, present, atlas.shares)
    label_in_mask = labels[mask]
    leaves = {3: [3], 4: [4], 5: [5], 6: [6], 1: [3, 4], 2: [5, 6]}
    for column, index in enumerate(atlas.regions["index"]):
        members = np.isin(label_in_mask, leaves[int(index)])
        for k in range(n_runs):
            assert values[k, column] == pytest.approx(np.nanmean(y[k, members]), rel=1e-12)
            ok = np.isfinite(y[k, members])
            assert coverage[k, column] == pytest.approx(ok.mean(), rel=1e-12)
    # a run without data in a region gives NaN there
    y2 = y.copy()
    y2[2, label_in_mask == 3] = np.nan
    values2, coverage2 = region_values(y2, np.isfinite(y2), atlas.shares)
    column = int(np.flatnonzero(atlas.regions["index"].to_numpy() == 3)[0])
    assert np.isnan(values2[2, column]) and coverage2[2, column] == 0.0


def test_region_values_with_fractional_shares_equal_hand_computation():
    # statistics on 0.4 mm voxels, atlas on 0.2 mm voxels: each statistical voxel holds
    # 2 × 2 × 2 atlas voxels, so the shares are counts / 8 (counted here by reshaping)
    shape = (10, 8, 6)
    grid = _grid(shape, (0.4, 0.4, 0.4), [-1.8, -1.4, -1.0])
    fine_affine = np.diag([0.2, 0.2, 0.2, 1.0])
    fine_affine[:3, 3] = grid.affine[:3, 3] - 0.1
    fine_shape = tuple(2 * n for n in shape)
    ii, jj, kk = np.indices(fine_shape)
    fine = np.where(ii < fine_shape[0] // 2, 1, 2)  # left / right
    fine[(jj + kk) % 3 == 0] = np.where(ii[(jj + kk) % 3 == 0] < fine_shape[0] // 2, 3, 4)
    fine[(ii * 7 + jj * 3 + kk) % 11 == 0] = 0  # some unlabelled atlas voxels
    table = pd.DataFrame(
        [
            (1, "a", "a", "left", ""),
            (2, "a", "a", "right", ""),
            (3, "b", "b", "left", ""),
            (4, "b", "b", "right", ""),
        ],
        columns=["index", "name", "abbreviation", "hemisphere", "parent"],
    )
    mask = np.ones(shape, bool)
    mask[0, 0, :] = False
    atlas = build_atlas(fine, fine_affine, table, grid, mask, midline_mm=0.0, min_coverage=0.0)
    blocks = fine.reshape(shape[0], 2, shape[1], 2, shape[2], 2)
    hand = np.stack(
        [(blocks == index).sum(axis=(1, 3, 5)) / 8.0 for index in atlas.regions["index"]], axis=-1
    )[mask]
    assert 0 < np.mean((hand > 0) & (hand < 1))  # truly fractional
    assert np.allclose(atlas.shares.toarray(), hand)
    rng = np.random.default_rng(2)
    y = rng.normal(size=(3, int(mask.sum())))
    present = rng.uniform(size=y.shape) > 0.2
    values, coverage = region_values(np.where(present, y, np.nan), present, atlas.shares)
    for r in range(hand.shape[1]):
        for k in range(3):
            w = hand[:, r] * present[k]
            assert values[k, r] == pytest.approx(np.sum(w * y[k]) / np.sum(w), rel=1e-12)
            assert coverage[k, r] == pytest.approx(np.sum(w) / np.sum(hand[:, r]), rel=1e-12)


def test_region_variances_bound_the_variance_of_a_region_average(field):
    """Fully correlated noise gives exactly (mean s)²; independent noise less."""
    _, mask = field
    atlas, labels = _box_atlas(GRID, mask)
    rng = np.random.default_rng(4)
    n_vox = int(mask.sum())
    s = rng.uniform(0.5, 2.0, size=n_vox)
    present = np.ones((1, n_vox), bool)
    bound = region_variances(s[None] ** 2, present, atlas.shares)[0]
    # 5000 draws: a sample variance within ±2 % (1 SD, √(2/5000)); 8 % is 4 SD
    draws = 5000
    # ρ = 1: every voxel of a draw shares one standard normal value
    common = rng.standard_normal(draws)[:, None] * s[None]
    averages, _ = region_values(common, np.ones_like(common, bool), atlas.shares)
    # Var(Σ a_v s_v z) = (Σ a_v s_v)² (Borenstein et al. 2009, ch. 24, r = 1)
    assert np.allclose(averages.var(axis=0), bound, rtol=0.08)
    independent = rng.standard_normal((draws, n_vox)) * s[None]
    averages, _ = region_values(independent, np.ones_like(independent, bool), atlas.shares)
    assert np.all(averages.var(axis=0) < 0.2 * bound)  # far below the bound


# --------------------------------------------------------------------------------------
# 5. region statistics against statsmodels
# --------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def cohort(field):
    _, mask = field
    atlas, labels = _box_atlas(GRID, mask)
    rng = np.random.default_rng(2026)
    runs = [3, 2, 4, 3, 5, 2, 4, 3]
    animal = np.repeat(np.arange(len(runs)), runs)
    n, n_vox = animal.size, int(mask.sum())
    label_in_mask = labels[mask]
    truth = np.where(np.isin(label_in_mask, [3, 5]), 2.0, 0.0)
    u = rng.normal(0.0, 0.6, size=(len(runs), 4))[:, np.clip(label_in_mask - 3, 0, 3)]
    y = (
        truth[None]
        + u[animal]
        + rng.normal(0.0, 0.5, size=(n, 4))[:, np.clip(label_in_mask - 3, 0, 3)]
    )
    y = y + rng.normal(0.0, 1.0, size=(n, n_vox))
    values, _ = region_values(y, np.ones_like(y, bool), atlas.shares)
    return atlas, values, animal, mask


def test_region_table_matches_statsmodels_mixedlm(cohort):
    atlas, values, animal, mask = cohort
    n = animal.size
    X = np.ones((n, 1))
    surviving = {"voxel": np.zeros(int(mask.sum()), bool)}
    surviving["voxel"][::3] = True
    table = region_table(
        atlas,
        values,
        None,
        X,
        animal,
        np.array([1.0]),
        estimate_run_variance=True,
        alpha=0.05,
        fdr_method="bh",
        surviving=surviving,
    )
    assert len(table) == len(atlas.regions)
    m = animal.max() + 1
    checked = 0
    for r, row in table.iterrows():
        frame = pd.DataFrame({"y": values[:, r], "animal": animal})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = MixedLM.from_formula("y ~ 1", frame, groups="animal").fit(reml=True)
        tau2 = float(res.cov_re.iloc[0, 0])
        if not res.converged or tau2 < 1e-3 * res.scale:
            continue  # statsmodels stops early near τ² = 0 (see tests/unit/test_reml.py)
        # statsmodels MixedLM, REML (Seabold & Perktold 2010)
        assert row["effect"] == pytest.approx(res.fe_params.iloc[0], rel=1e-4)
        assert row["var_animal"] == pytest.approx(tau2, rel=1e-4)
        assert row["var_run"] == pytest.approx(res.scale, rel=1e-4)
        # model-based SE √((XᵀV̂⁻¹X)⁻¹) with a dense V̂ from statsmodels' estimates (as in
        # tests/unit/test_reml.py; statsmodels' own bse_fe comes from its observed information)
        Z = (animal[:, None] == np.arange(m)[None, :]).astype(float)
        V = tau2 * Z @ Z.T + res.scale * np.eye(n)
        se = float(np.sqrt(1.0 / (X.T @ np.linalg.solve(V, X))[0, 0]))
        assert row["se"] == pytest.approx(se, rel=1e-4)
        # t on the between-animal df (animals − 1), its p and 95 % interval (scipy.stats.t)
        assert row["df"] == m - 1
        effect = res.fe_params.iloc[0]
        assert row["p"] == pytest.approx(2 * stats.t.sf(abs(effect / se), m - 1), rel=1e-3)
        half = stats.t.ppf(0.975, m - 1) * se
        # relative to the interval's scale: an end near 0 has no relative precision
        scale = 1e-4 * (abs(effect) + half)
        assert row["ci_low"] == pytest.approx(effect - half, abs=scale)
        assert row["ci_high"] == pytest.approx(effect + half, abs=scale)
        assert row["runs"] == n and row["animals"] == m
        checked += 1
    assert checked >= 4
    # q: Benjamini–Hochberg across the regions (statsmodels multipletests)
    q = multipletests(table["p"], method="fdr_bh")[1]
    assert np.allclose(table["q"], q, rtol=1e-12)
    assert (table["fdr_significant"] == (q <= 0.05)).all()
    # the fronts carry the effect, the backs do not
    front = table[table["name"] == "front"]
    assert (front["q"] < 0.05).all() and (front["ci_low"] > 0).all()
    # surviving share = fraction of the region's voxels marked, counted directly
    _, labels = _box_atlas(GRID, mask)
    label_in_mask = labels[mask]
    leaves = {3: [3], 4: [4], 5: [5], 6: [6], 1: [3, 4], 2: [5, 6]}
    for _, row in table.iterrows():
        members = np.isin(label_in_mask, leaves[int(row["index"])])
        assert row["surviving_voxel"] == pytest.approx(surviving["voxel"][members].mean())
        assert row["volume_mm3"] == pytest.approx(members.sum() * GRID.voxel_volume)


def test_animal_table_matches_weighted_least_squares(cohort):
    atlas, values, animal, _ = cohort
    rng = np.random.default_rng(9)
    variances = rng.uniform(0.05, 0.3, size=values.shape)
    var_run = rng.uniform(0.0, 0.2, size=values.shape[1])
    values = values.copy()
    values[0, 2] = np.nan  # one run without data in one region
    ids = [f"a{i}" for i in range(animal.max() + 1)]
    table = animal_table(atlas, values, variances, ids, animal, var_run)
    assert len(table) == len(ids) * len(atlas.regions)
    for _, row in table.iterrows():
        a = ids.index(row["animal"])
        r = int(np.flatnonzero(atlas.regions["index"].to_numpy() == row["index"])[0])
        runs = (animal == a) & np.isfinite(values[:, r])
        w = 1.0 / (var_run[r] + variances[runs, r])
        # inverse-variance weighted mean = WLS on a constant with known variances
        res = WLS(values[runs, r], np.ones(runs.sum()), weights=w).fit(
            cov_type="fixed scale", cov_kwds={"scale": 1.0}
        )
        assert row["effect"] == pytest.approx(res.params[0], rel=1e-12)
        assert row["se"] == pytest.approx(res.bse[0], rel=1e-10)
        assert row["runs"] == runs.sum()
    # no variances and σ̂² = 0: plain means, no standard error
    plain = animal_table(atlas, values, None, ids, animal, np.zeros(values.shape[1]))
    first = plain[(plain["animal"] == "a1")]
    assert np.allclose(first["effect"], np.nanmean(values[animal == 1], axis=0))
    assert first["se"].isna().all()


# --------------------------------------------------------------------------------------
# 6. regions without data, and misuse by the caller
# --------------------------------------------------------------------------------------


def _two_region_atlas():
    grid = _grid((6, 6, 6), (1.0, 1.0, 1.0), [-2.5, -2.5, -2.5])
    mask = np.ones(grid.shape, bool)
    labels = np.where(np.indices(grid.shape)[0] < 3, 1, 2)
    table = pd.DataFrame(
        [(1, "a", "a", "left", ""), (2, "b", "b", "right", ""), (3, "c", "c", "right", "")],
        columns=["index", "name", "abbreviation", "hemisphere", "parent"],
    )
    atlas = build_atlas(labels, grid.affine, table, grid, mask, midline_mm=0.0, min_coverage=0.0)
    return grid, mask, atlas


def test_region_without_data_has_no_test_and_no_q():
    _, mask, atlas = _two_region_atlas()
    rng = np.random.default_rng(0)
    animal = np.repeat(np.arange(5), 3)
    values = rng.normal(size=(15, 3))
    values[:, 2] = np.nan  # region "c" is in the table but not in the image
    table = region_table(
        atlas, values, None, np.ones((15, 1)), animal, np.array([1.0]),
        estimate_run_variance=True, alpha=0.05, fdr_method="bh",
        surviving={"fdr": np.ones(int(mask.sum()), bool)},
    )  # fmt: skip
    assert table.loc[2, ["effect", "se", "p", "q"]].isna().all()
    assert table.loc[2, "runs"] == 0 and not table.loc[2, "fdr_significant"]
    # BH over the two tested regions only (statsmodels multipletests)
    assert np.allclose(table["q"][:2], multipletests(table["p"][:2], method="fdr_bh")[1])
    assert np.allclose(table["surviving_fdr"][:2], 1.0)


def test_caller_mistakes_are_refused():
    grid, mask, atlas = _two_region_atlas()
    stat = np.zeros(grid.shape)
    stat[1:3, 1:3, 1:3] = 4.0
    clusters = find_clusters(stat, mask, 3.0)
    with pytest.raises(ValueError, match="significant has 2 values for 1 clusters"):
        cluster_table(
            clusters, stat, stat, stat, mask, atlas, grid, None,
            significant=np.ones(2, bool), p_extent=None, p_mass=None,
        )  # fmt: skip
    with pytest.raises(ValueError, match="t3d has shape"):
        cluster_table(
            clusters, stat, stat[:-1], stat, mask, atlas, grid, None,
            significant=np.ones(1, bool), p_extent=None, p_mass=None,
        )  # fmt: skip
    with pytest.raises(ValueError, match="sign must be"):
        local_maxima(stat, clusters.labels, 1, grid.affine, 1.0, sign=0)
    n_vox = int(mask.sum())
    with pytest.raises(ValueError, match="voxels"):
        region_values(np.zeros((2, n_vox - 1)), np.ones((2, n_vox - 1), bool), atlas.shares)
    with pytest.raises(ValueError, match="negative"):
        region_variances(-np.ones((1, n_vox)), np.ones((1, n_vox), bool), atlas.shares)
    with pytest.raises(ValueError, match="surviving"):
        region_table(
            atlas, np.ones((4, 3)), None, np.ones((4, 1)), np.array([0, 0, 1, 1]),
            np.array([1.0]), estimate_run_variance=True, alpha=0.05, fdr_method="bh",
            surviving={"tfce": np.ones(3, bool)},
        )  # fmt: skip
