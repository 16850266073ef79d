"""Clusters against scipy.ndimage.label and hand-computed values."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from grouplevel.errors import UserError
from grouplevel.inference import find_clusters, max_cluster_extent_and_mass, neighbourhood

RANK_OF = {6: 1, 18: 2, 26: 3}  # scipy.ndimage.generate_binary_structure(3, rank)


def smooth_map(shape, seed, sigma=1.3):
    rng = np.random.default_rng(seed)
    stat = ndimage.gaussian_filter(rng.standard_normal(shape), sigma)
    return stat / stat.std()


def same_partition(ours: np.ndarray, theirs: np.ndarray) -> bool:
    """True when two label images split the same voxels into the same sets."""
    if not np.array_equal(ours > 0, theirs > 0):
        return False
    inside = ours > 0
    pairs = np.unique(np.stack([ours[inside], theirs[inside]]), axis=1)
    n_ours = np.unique(ours[inside]).size
    n_theirs = np.unique(theirs[inside]).size
    return pairs.shape[1] == n_ours == n_theirs


@pytest.mark.parametrize("connectivity", [6, 18, 26])
def test_neighbourhood_equals_scipy(connectivity):
    # Reference: scipy.ndimage.generate_binary_structure(3, 1/2/3).
    want = ndimage.generate_binary_structure(3, RANK_OF[connectivity])
    np.testing.assert_array_equal(neighbourhood(connectivity), want)
    assert neighbourhood(connectivity).sum() == connectivity + 1


@pytest.mark.parametrize("connectivity", [6, 18, 26])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_labels_and_sizes_equal_scipy(connectivity, seed):
    # Reference: scipy.ndimage.label with generate_binary_structure(3, 1/2/3).
    stat = smooth_map((24, 20, 16), seed)
    mask = np.ones(stat.shape, dtype=bool)
    mask[:, :, :2] = False
    mask[10:12] = False
    structure = ndimage.generate_binary_structure(3, RANK_OF[connectivity])
    threshold = 0.8
    clusters = find_clusters(stat, mask, threshold, connectivity=connectivity, sided="positive")
    theirs, n = ndimage.label(mask & (stat > threshold), structure)
    assert clusters.n_clusters == n
    assert same_partition(clusters.labels, theirs)
    sizes = np.bincount(theirs.ravel())[1:]
    np.testing.assert_array_equal(np.sort(clusters.extent_voxels)[::-1], np.sort(sizes)[::-1])
    # Ours are ordered largest first, and the size of label k is the count of label k.
    assert np.all(np.diff(clusters.extent_voxels) <= 0)
    np.testing.assert_array_equal(
        np.bincount(clusters.labels.ravel(), minlength=n + 1)[1:], clusters.extent_voxels
    )
    # Mass of each cluster: scipy.ndimage.sum of (stat - threshold) over its label.
    mass = ndimage.sum(stat - threshold, clusters.labels, index=np.arange(1, n + 1))
    np.testing.assert_allclose(clusters.mass, mass, rtol=1e-12)
    assert max_cluster_extent_and_mass(
        stat, mask, threshold, connectivity=connectivity, sided="positive"
    ) == (int(sizes.max()), pytest.approx(float(mass.max()), rel=1e-12))


@pytest.mark.parametrize("connectivity", [6, 26])
def test_two_sided_equals_scipy_per_sign(connectivity):
    # Reference: scipy.ndimage.label of stat > t and of stat < -t, each on its own.
    stat = smooth_map((22, 22, 14), 7)
    mask = np.ones(stat.shape, dtype=bool)
    structure = ndimage.generate_binary_structure(3, RANK_OF[connectivity])
    t = 0.7
    clusters = find_clusters(stat, mask, t, connectivity=connectivity, sided="two")
    pos, n_pos = ndimage.label(stat > t, structure)
    neg, n_neg = ndimage.label(stat < -t, structure)
    combined = np.where(pos > 0, pos, np.where(neg > 0, neg + n_pos, 0))
    assert clusters.n_clusters == n_pos + n_neg
    assert same_partition(clusters.labels, combined)
    assert np.sum(clusters.sign > 0) == n_pos and np.sum(clusters.sign < 0) == n_neg
    # Each cluster's sign is the sign of every one of its voxels.
    for k in range(clusters.n_clusters):
        assert np.all(np.sign(stat[clusters.labels == k + 1]) == clusters.sign[k])
    extent, mass = max_cluster_extent_and_mass(stat, mask, t, connectivity=connectivity)
    assert extent == clusters.extent_voxels.max()
    assert mass == pytest.approx(clusters.mass.max(), rel=1e-12)


def test_positive_and_negative_regions_never_merge():
    # Hand-built: a +3 block and a -3 block share a face; 26-connected they would be one
    # set in scipy.ndimage.label of |stat| > 2 (checked), but they are two clusters here.
    stat = np.zeros((6, 6, 6))
    stat[1:3, 1:4, 1:4] = 3.0
    stat[3:5, 1:4, 1:4] = -3.0
    _, n_abs = ndimage.label(np.abs(stat) > 2, ndimage.generate_binary_structure(3, 3))
    assert n_abs == 1
    clusters = find_clusters(stat, None, 2.0)
    assert clusters.n_clusters == 2
    np.testing.assert_array_equal(clusters.extent_voxels, [18, 18])
    # Equal extents: the cluster whose first voxel comes first in C order is label 1.
    np.testing.assert_array_equal(clusters.sign, [1, -1])
    assert clusters.labels[1, 1, 1] == 1 and clusters.labels[3, 1, 1] == 2
    np.testing.assert_array_equal(clusters.mass, [18.0, 18.0])
    assert max_cluster_extent_and_mass(stat, None, 2.0) == (18, 18.0)
    assert max_cluster_extent_and_mass(stat, None, 2.0, sided="negative") == (18, 18.0)


def test_mass_peak_and_mm3_by_hand():
    # Hand computation on a small map with anisotropic 0.2 x 0.3 x 0.5 mm voxels.
    stat = np.zeros((5, 5, 5))
    stat[0, 0, 0:3] = [2.5, 4.0, 2.2]  # 3 voxels, mass 0.5 + 2 + 0.2 = 2.7, peak 4.0
    stat[4, 4, 4] = -2.9  # 1 voxel, mass 0.9
    stat[4, 0, 0] = 2.0  # not above threshold 2 (strict)
    stat[2, 2, 2] = 1e3  # outside the mask
    mask = np.ones(stat.shape, dtype=bool)
    mask[2, 2, 2] = False
    volume = 0.2 * 0.3 * 0.5
    clusters = find_clusters(stat, mask, 2.0, voxel_volume_mm3=volume)
    np.testing.assert_array_equal(clusters.extent_voxels, [3, 1])
    np.testing.assert_allclose(clusters.extent_mm3, [3 * volume, volume], rtol=1e-15)
    np.testing.assert_allclose(clusters.mass, [2.7, 0.9], rtol=1e-12)
    np.testing.assert_array_equal(clusters.sign, [1, -1])
    np.testing.assert_array_equal(clusters.peak_index, [[0, 0, 1], [4, 4, 4]])
    np.testing.assert_array_equal(clusters.peak_value, [4.0, -2.9])
    assert clusters.labels.dtype == np.int32
    assert clusters.labels[2, 2, 2] == 0 and clusters.labels[4, 0, 0] == 0
    positive = find_clusters(stat, mask, 2.0, sided="positive")
    assert positive.n_clusters == 1 and positive.sign[0] == 1
    negative = find_clusters(stat, mask, 2.0, sided="negative")
    assert negative.n_clusters == 1 and negative.peak_value[0] == -2.9


def test_peak_ties_and_no_cluster():
    # Ties at the peak: the first voxel in C order is the peak (documented rule).
    stat = np.zeros((3, 3, 3))
    stat[1, 2, 0] = 5.0
    stat[1, 2, 1] = 5.0
    stat[1, 1, 1] = 4.0
    clusters = find_clusters(stat, None, 1.0)
    assert clusters.n_clusters == 1
    np.testing.assert_array_equal(clusters.peak_index, [[1, 2, 0]])
    empty = find_clusters(np.zeros((4, 4, 4)), None, 1.0)
    assert empty.n_clusters == 0 and empty.peak_index.shape == (0, 3)
    assert not empty.labels.any()
    assert max_cluster_extent_and_mass(np.zeros((4, 4, 4)), None, 1.0) == (0, 0.0)


def test_2d_map_equals_scipy_2d():
    # Reference: scipy.ndimage.label with generate_binary_structure(2, 1) on one slice;
    # a 2-D map is one slice of the 3-D grid, so 6-connectivity is 4-connectivity in-plane.
    stat = smooth_map((40, 30), 4, sigma=2.0)
    clusters = find_clusters(stat, None, 0.5, connectivity=6, sided="positive")
    theirs, n = ndimage.label(stat > 0.5, ndimage.generate_binary_structure(2, 1))
    assert clusters.labels.shape == stat.shape
    assert clusters.n_clusters == n and same_partition(clusters.labels, theirs)


def test_bad_input_gives_clear_errors():
    stat = np.zeros((4, 4, 4))
    with pytest.raises(UserError, match="connectivity"):
        find_clusters(stat, None, 1.0, connectivity=4)
    with pytest.raises(UserError, match="connectivity"):
        neighbourhood(10)
    with pytest.raises(UserError, match="sided"):
        max_cluster_extent_and_mass(stat, None, 1.0, sided="up")
    with pytest.raises(UserError, match="threshold"):
        find_clusters(stat, None, -1.0)
    with pytest.raises(UserError, match="same grid"):
        find_clusters(stat, np.ones((4, 4), bool), 1.0)
    with pytest.raises(UserError, match="2-D or 3-D"):
        find_clusters(np.zeros((2, 2, 2, 2)), None, 1.0)
    with pytest.raises(UserError, match="voxel volume"):
        find_clusters(stat, None, 1.0, voxel_volume_mm3=-1.0)


@pytest.mark.parametrize("sided", ["two", "positive", "negative"])
def test_reused_workspace_equals_scipy_and_find_clusters(sided):
    # Reference: scipy.ndimage.label of stat > t and of stat < -t inside the mask (the
    # largest label count, and the largest sum of |stat| - t by ndimage.sum, 1e-12); the
    # largest mass is also the one find_clusters reports, bit for bit (the observed map
    # and the permutation maxima must compare equal for the identity rearrangement). One
    # workspace serves every map, so nothing may carry over from one to the next.
    from grouplevel.inference.clusters import ClusterWorkspace

    rng = np.random.default_rng(12)
    shape = (16, 14, 9)
    mask = ndimage.gaussian_filter(rng.standard_normal(shape), 2.0) > -0.3
    structure = ndimage.generate_binary_structure(3, RANK_OF[26])
    scratch = ClusterWorkspace(mask, connectivity=26)
    for seed in range(5):
        stat = smooth_map(shape, 20 + seed)
        stat[rng.random(shape) < 0.02] = np.nan
        t = 0.6
        want_extent, want_mass = 0, 0.0
        for sign in (1, -1):
            if (sign > 0 and sided == "negative") or (sign < 0 and sided == "positive"):
                continue
            labels, n = ndimage.label(mask & (sign * np.nan_to_num(stat) > t), structure)
            if n:
                index = np.arange(1, n + 1)
                want_extent = max(want_extent, int(np.bincount(labels.ravel())[1:].max()))
                masses = ndimage.sum(np.abs(np.nan_to_num(stat)) - t, labels, index)
                want_mass = max(want_mass, float(masses.max()))
        extent, mass = scratch.maxima(stat[mask], t, sided)
        assert extent == want_extent
        assert mass == pytest.approx(want_mass, rel=1e-12)
        clusters = find_clusters(np.nan_to_num(stat, nan=0.0), mask, t, sided=sided)
        assert mass == (clusters.mass.max() if clusters.n_clusters else 0.0)
