"""User-supplied atlases: table checks, hemispheres, midline, resampling and shares."""

from __future__ import annotations

import itertools
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import ndimage

from grouplevel.atlas import (
    DEFAULT_ATLAS_MIN_COVERAGE,
    MIDLINE_FITTED,
    MIDLINE_GIVEN,
    MIDLINE_MIRROR,
    RESAMPLING_FRACTIONAL,
    RESAMPLING_NEAREST,
    RESAMPLING_REORDERED,
    RESAMPLING_SAME,
    build_atlas,
    find_midline,
    mirror_dice,
    read_atlas,
)
from grouplevel.errors import UserError
from grouplevel.images import Grid


def _affine(voxel: float, origin, flip_x: bool = False) -> np.ndarray:
    affine = np.diag([voxel, voxel, voxel, 1.0])
    affine[:3, 3] = origin
    if flip_x:
        affine[0, 0] = -voxel
    return affine


def _centred_grid(shape, voxel: float) -> Grid:
    """RAS grid whose centre is at world (0, 0, 0)."""
    origin = [-voxel * (n - 1) / 2.0 for n in shape]
    return Grid(tuple(shape), _affine(voxel, origin))


def _world(grid_shape, affine) -> np.ndarray:
    ijk = np.indices(grid_shape).reshape(3, -1)
    return (affine[:3, :3] @ ijk + affine[:3, 3:4]).reshape(3, *grid_shape)


def _table(rows) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=["index", "name", "abbreviation", "hemisphere", "parent"])


# --------------------------------------------------------------------------------------
# Mirror symmetry and left/right on a real template
# --------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def mni_mask():
    datasets = pytest.importorskip("nilearn.datasets")
    # nilearn ships the ICBM 2009a nonlinear symmetric template in its package data
    # (nilearn/datasets/data/mni_icbm152_*_09a_converted.nii.gz); loading it downloads
    # nothing. Fonov VS et al. (2011), NeuroImage 54:313 describe the symmetric template.
    img = datasets.load_mni152_brain_mask(resolution=2)
    return np.asarray(img.get_fdata() > 0), np.asarray(img.affine, dtype=float)


def test_mni_brain_mask_mirrors_onto_itself(mni_mask):
    mask, affine = mni_mask
    # The template is symmetric about x = 0 mm by construction (Fonov et al. 2011,
    # NeuroImage 54:313), so the brain mask mirrored about x = 0 overlaps itself almost
    # perfectly: Dice ≥ 0.95.
    assert mirror_dice(mask, affine, 0.0) >= 0.95
    # A plane 10 mm off the midline is clearly worse (a check that the plane matters).
    assert mirror_dice(mask, affine, 10.0) < 0.9


def test_mirror_dice_of_one_hemisphere_is_zero():
    grid = _centred_grid((10, 6, 5), 0.2)
    x = _world(grid.shape, grid.affine)[0]
    # Dice (1945), Ecology 26:297: disjoint sets have coefficient 0, equal sets 1.
    assert mirror_dice(x < 0, grid.affine, 0.0) == pytest.approx(0.0, abs=1e-12)
    assert mirror_dice(np.abs(x) < 0.5, grid.affine, 0.0) == pytest.approx(1.0, abs=1e-12)


def _mni_left_right_atlas(mask: np.ndarray, affine: np.ndarray):
    x, y, _ = _world(mask.shape, affine)
    labels = np.zeros(mask.shape, dtype=np.int16)
    labels[mask & (x < 0) & (y > -20)] = 1
    labels[mask & (x > 0) & (y > -20)] = 2
    labels[mask & (y <= -20)] = 3  # a bilateral region (split by the atlas code)
    table = _table(
        [
            (1, "front left", "FL", "left", ""),
            (2, "front right", "FR", "right", ""),
            (3, "back", "B", "", ""),
        ]
    )
    return labels, table


def test_flipped_array_and_affine_keep_world_sides(mni_mask):
    mask, affine = mni_mask
    grid = Grid(mask.shape, affine)
    labels, table = _mni_left_right_atlas(mask, affine)
    direct = build_atlas(labels, affine, table, grid, mask)
    # The same image stored right-to-left: array flipped along axis 0, affine flipped to
    # match (NIfTI-1: world position = affine · index, so the two describe one image).
    flip = np.eye(4)
    flip[0, 0] = -1.0
    flip[0, 3] = mask.shape[0] - 1
    flipped = build_atlas(labels[::-1].copy(), affine @ flip, table, grid, mask)
    assert direct.resampling == RESAMPLING_SAME
    # the same voxels stored the other way round: an exact copy, said as such
    assert flipped.resampling == f"{RESAMPLING_REORDERED} (reversed along study axis i)"
    for atlas in (direct, flipped):
        assert atlas.midline_source == MIDLINE_FITTED
        # The fitted plane lies in the unlabelled x = 0 column (2 mm voxels).
        assert atlas.midline_mm == pytest.approx(0.0, abs=1.0)
        x = _world(mask.shape, affine)[0]
        regions = atlas.regions.set_index("index")
        for index, row in regions[regions["is_leaf"]].iterrows():
            where = atlas.label_volume == index
            assert where.any()
            # Voxels centred on the plane (x = 0) give half of themselves to each side of
            # the split region "back"; on that tie the label goes to the left row.
            if row["hemisphere"] == "left":
                assert x[where].max() <= 0 and np.median(x[where]) < 0
            else:
                assert row["hemisphere"] == "right"
                assert x[where].min() > 0
    np.testing.assert_array_equal(direct.label_volume, flipped.label_volume)
    assert abs(direct.shares - flipped.shares).max() == 0
    back = direct.regions[direct.regions["abbreviation"] == "B"]
    assert sorted(back["hemisphere"]) == ["both", "left", "right"]
    assert direct.hemisphere_of([[-3.0, 0, 0], [3.0, 0, 0], [0.0, 5, 5]]).tolist() == [
        "left",
        "right",
        "midline",
    ]


def test_flipped_study_grid_keeps_world_sides():
    # Atlas stored RAS, statistics stored LAS on the same voxels: labels must follow the
    # world, i.e. appear mirrored in array order.
    shape = (8, 4, 3)
    grid_ras = _centred_grid(shape, 0.2)
    x = _world(shape, grid_ras.affine)[0]
    labels = np.where(x < 0, 1, 2).astype(np.int16)
    table = _table([(1, "left part", "Lp", "left", ""), (2, "right part", "Rp", "right", "")])
    flip = np.eye(4)
    flip[0, 0] = -1.0
    flip[0, 3] = shape[0] - 1
    grid_las = Grid(shape, grid_ras.affine @ flip)
    mask = np.ones(shape, dtype=bool)
    atlas = build_atlas(labels, grid_ras.affine, table, grid_las, mask)
    assert atlas.orientation.startswith("LAS")
    np.testing.assert_array_equal(atlas.label_volume, labels[::-1])


# --------------------------------------------------------------------------------------
# Resampling against outside references
# --------------------------------------------------------------------------------------


def _brute_force_shares(labels, label_affine, grid_shape, grid_affine, leaf_values):
    """Count atlas voxel centres inside each statistical voxel, one voxel at a time."""
    to_grid = np.linalg.inv(grid_affine) @ label_affine
    counts = np.zeros((*grid_shape, len(leaf_values)))
    total = np.zeros(grid_shape)
    for ijk in itertools.product(*[range(n) for n in labels.shape]):
        c = to_grid[:3, :3] @ np.asarray(ijk, float) + to_grid[:3, 3]
        v = tuple(int(np.floor(ci + 0.5)) for ci in c)  # the voxel whose box holds c
        if all(0 <= vi < n for vi, n in zip(v, grid_shape, strict=True)):
            total[v] += 1
            value = labels[ijk]
            if value in leaf_values:
                counts[v][leaf_values.index(value)] += 1
    with np.errstate(invalid="ignore"):
        return np.where(total[..., None] > 0, counts / total[..., None], 0.0)


def test_fractional_shares_equal_brute_force_count():
    rng = np.random.default_rng(3)
    grid = Grid((4, 3, 3), _affine(0.2, [0.0, 0.0, 0.0]))
    # A finer atlas (0.05 mm), its axes permuted and shifted by a fraction of a voxel so
    # that no centre lies on a statistical voxel boundary.
    fine_shape = (14, 18, 14)
    fine_affine = np.zeros((4, 4))
    fine_affine[3, 3] = 1.0
    fine_affine[1, 0] = 0.05  # i → y
    fine_affine[0, 1] = 0.05  # j → x
    fine_affine[2, 2] = 0.05  # k → z
    fine_affine[:3, 3] = [-0.13, -0.12, -0.11]
    labels = rng.integers(0, 5, size=fine_shape).astype(np.int32)
    # Two tiny structures smaller than a statistical voxel.
    labels[3:5, 5:7, 2:4] = 5
    labels[10, 12, 9] = 6
    table = _table([(k, f"region {k}", f"R{k}", "left", "") for k in range(1, 7)])
    mask = np.ones(grid.shape, dtype=bool)
    mask[0, 0, 0] = False
    # midline far to the right: every region is left of it, no splitting.
    atlas = build_atlas(labels, fine_affine, table, grid, mask, midline_mm=50.0)
    assert atlas.resampling == RESAMPLING_FRACTIONAL
    expected = _brute_force_shares(labels, fine_affine, grid.shape, grid.affine, list(range(1, 7)))
    columns = [atlas.region_rows(f"R{k}")[0] for k in range(1, 7)]
    got = atlas.shares[:, columns].toarray()
    # Reference: a direct count, voxel by voxel, of atlas centres in each voxel's box.
    np.testing.assert_allclose(got, expected[mask], atol=1e-12)
    assert atlas.shares[:, atlas.region_rows("R6")[0]].sum() > 0  # the 1-voxel structure


def test_nearest_neighbour_equals_scipy_map_coordinates():
    rng = np.random.default_rng(4)
    grid = Grid((10, 8, 6), _affine(0.2, [0.0, 0.0, 0.0]))
    # Coarser atlas (0.4 mm), shifted by 0.07 mm so no centre falls half-way.
    coarse_affine = _affine(0.4, [-0.33, -0.33, -0.33])
    coarse = rng.integers(0, 4, size=(8, 7, 6)).astype(np.int16)
    table = _table([(k, f"r{k}", f"r{k}", "right", "") for k in range(1, 4)])
    mask = rng.random(grid.shape) < 0.8
    atlas = build_atlas(coarse, coarse_affine, table, grid, mask, midline_mm=-50.0)
    assert atlas.resampling == RESAMPLING_NEAREST
    to_atlas = np.linalg.inv(coarse_affine) @ grid.affine
    ijk = np.indices(grid.shape).reshape(3, -1).astype(float)
    coords = to_atlas[:3, :3] @ ijk + to_atlas[:3, 3:4]
    # Reference: scipy.ndimage.map_coordinates with order=0 (nearest neighbour).
    expected = ndimage.map_coordinates(coarse, coords, order=0, mode="constant", cval=0)
    expected = expected.reshape(grid.shape)
    np.testing.assert_array_equal(atlas.label_volume[mask], expected[mask])
    assert (atlas.label_volume[~mask] == 0).all()
    leaf_sums = np.asarray(atlas.shares.sum(axis=1)).ravel()
    np.testing.assert_array_equal(leaf_sums, (expected[mask] > 0).astype(float))


# --------------------------------------------------------------------------------------
# Hierarchy, volumes, hemisphere splitting
# --------------------------------------------------------------------------------------


def _hierarchy_case():
    shape = (12, 6, 4)
    grid = _centred_grid(shape, 0.2)
    x, y, z = _world(shape, grid.affine)
    labels = np.zeros(shape, dtype=np.int32)
    labels[(y < 0) & (z < 0)] = 11  # bilateral leaf
    labels[(y < 0) & (z >= 0)] = 12  # bilateral leaf
    labels[(y >= 0) & (x < 0)] = 21  # left leaf
    labels[(y >= 0) & (x > 0) & (z < 0)] = 22  # right leaf
    labels[(y >= 0) & (x > 0) & (z >= 0)] = 2  # a parent painted itself
    table = pd.DataFrame(
        {
            "index": [1, 11, 12, 2, 21, 22, 30],
            "name": ["posterior", "ventral p", "dorsal p", "anterior", "a left", "a right", "gone"],
            "hemisphere": ["", "", "both", "", "left", "right", ""],
            "parent": ["", "1", "posterior", "", "2", "anterior", "1"],
        }
    )
    return labels, table, grid


def test_parent_share_is_sum_of_children_and_volumes_add_up():
    labels, table, grid = _hierarchy_case()
    mask = np.ones(grid.shape, dtype=bool)
    atlas = build_atlas(labels, grid.affine, table, grid, mask)
    regions = atlas.regions
    shares = atlas.shares.toarray()
    positions = {int(v): p for p, v in enumerate(regions["index"])}
    for p, row in regions.iterrows():
        children = np.flatnonzero(regions["parent"].to_numpy() == row["index"])
        if children.size:
            # A parent is the union of its disjoint children (definition of the hierarchy).
            np.testing.assert_allclose(shares[:, p], shares[:, children].sum(axis=1), atol=1e-12)
            assert row["n_voxels"] == pytest.approx(regions["n_voxels"].iloc[children].sum())
            assert row["volume_mm3"] == pytest.approx(regions["volume_mm3"].iloc[children].sum())
    leaves = regions["is_leaf"].to_numpy()
    assert (shares[:, leaves].sum(axis=1) <= 1 + 1e-12).all()
    # Reference: np.bincount of the label image gives each painted value's voxel count.
    counts = np.bincount(labels.ravel())
    voxel = grid.voxel_volume
    for index in (1, 2):
        row = regions.iloc[positions[index]]
        painted = [v for v in (11, 12) if index == 1] or [21, 22, 2]
        assert row["n_voxels"] == counts[painted].sum()
        assert row["volume_mm3"] == pytest.approx(counts[painted].sum() * voxel, rel=1e-12)
    assert regions["n_voxels"][regions["depth"] == 0].sum() == np.count_nonzero(labels)
    # The parent painted itself got an "(other)" child holding those voxels.
    other = regions[regions["name"] == "anterior (other)"]
    assert len(other) == 1 and other["n_voxels"].iloc[0] == counts[2]
    assert other["parent"].iloc[0] == 2
    assert set(regions["index"]) >= {1, 11, 12, 2, 21, 22, 30}
    assert any("gone" in w for w in atlas.warnings)
    assert atlas.coverage == pytest.approx(1.0)


def test_bilateral_leaf_is_split_at_the_midline():
    labels, table, grid = _hierarchy_case()
    mask = np.ones(grid.shape, dtype=bool)
    atlas = build_atlas(labels, grid.affine, table, grid, mask)
    regions = atlas.regions
    x = _world(grid.shape, grid.affine)[0]
    assert atlas.midline_source == MIDLINE_FITTED
    assert atlas.midline_mm == pytest.approx(0.0, abs=0.1)
    rows = regions.iloc[atlas.region_rows("ventral p")]
    assert sorted(rows["hemisphere"]) == ["both", "left", "right"]
    both = rows[rows["hemisphere"] == "both"].iloc[0]
    assert both["index"] == 11 and not both["is_leaf"]
    sides = rows[rows["hemisphere"] != "both"]
    # New indices above the table's largest (30): "(other)" first, then left, right.
    assert (sides["index"] > 30).all()
    assert (sides["parent"] == 11).all()
    assert (sides["depth"] == both["depth"] + 1).all()
    left = sides[sides["hemisphere"] == "left"].iloc[0]
    expected_left = np.count_nonzero((labels == 11) & (x < 0))
    assert left["n_voxels"] == expected_left
    where = atlas.label_volume == left["index"]
    assert where.sum() == expected_left and x[where].max() < 0
    # A leaf labelled left stays one row; a parent with leaves on both sides is "both".
    assert regions.iloc[atlas.region_rows("a left")]["hemisphere"].tolist() == ["left"]
    assert regions.iloc[atlas.region_rows("anterior")]["hemisphere"].tolist() == ["both"]


def test_midline_voxels_count_half_to_each_side_and_midline_structures_stay_whole():
    shape = (9, 4, 3)  # odd: the centre column lies on x = 0
    grid = _centred_grid(shape, 0.2)
    x = _world(shape, grid.affine)[0]
    labels = np.zeros(shape, dtype=np.int16)
    labels[:, :2] = 1  # crosses the midline: split
    labels[np.abs(x) < 0.25] = 2  # within one voxel of the plane: a midline structure
    labels[(x > 0.3) & (np.arange(shape[1])[None, :, None] >= 2)] = 3  # one side only
    table = _table(
        [(1, "band", "Ba", "", ""), (2, "septum", "Se", "both", ""), (3, "lump", "Lu", "", "")]
    )
    atlas = build_atlas(labels, grid.affine, table, grid, np.ones(shape, bool), midline_mm=0.0)
    assert atlas.midline_source == MIDLINE_GIVEN
    regions = atlas.regions
    band = regions.iloc[atlas.region_rows("band")].set_index("hemisphere")
    # Column x = 0 holds no band voxel now (septum painted over it).
    assert band.loc["left", "n_voxels"] == band.loc["right", "n_voxels"]
    septum = regions.iloc[atlas.region_rows("septum")]
    assert septum["hemisphere"].tolist() == ["both"] and septum["is_leaf"].all()
    lump = regions.iloc[atlas.region_rows("lump")]
    assert lump["hemisphere"].tolist() == ["right"]
    # Shift the plane onto a column of band voxels: each counts half to each side.
    labels2 = np.zeros(shape, dtype=np.int16)
    labels2[:, :2] = 1
    table2 = _table([(1, "band", "Ba", "", "")])
    atlas2 = build_atlas(labels2, grid.affine, table2, grid, np.ones(shape, bool), midline_mm=0.0)
    band2 = atlas2.regions.iloc[atlas2.region_rows("Ba")].set_index("hemisphere")
    per_column = 2 * shape[2]
    assert band2.loc["left", "n_voxels"] == pytest.approx(4 * per_column + per_column / 2)
    assert band2.loc["both", "n_voxels"] == 9 * per_column
    centre = np.flatnonzero(np.isclose(x[:, 0, 0], 0.0))[0]
    left_col = atlas2.region_rows("Ba")[1]
    mask_rows = np.ravel_multi_index(np.nonzero(np.ones(shape, bool)), shape)
    at_centre = np.ravel_multi_index((centre, 0, 0), shape) == mask_rows
    assert atlas2.shares[np.flatnonzero(at_centre)[0], left_col] == pytest.approx(0.5)


@pytest.mark.parametrize("offset", [0.37, -0.52, 1.05])
def test_fitted_midline_recovers_known_shift(offset):
    # A symmetric two-sided atlas centred on x = 0, shifted in world space by `offset`.
    shape = (20, 6, 5)
    voxel = 0.2
    base = _centred_grid(shape, voxel)
    x = _world(shape, base.affine)[0]
    labels = np.zeros(shape, dtype=np.int16)
    labels[(x < -0.15)] = 1
    labels[(x > 0.15)] = 2
    shifted = base.affine.copy()
    shifted[0, 3] += offset
    found = find_midline(labels, shifted, labels == 1, labels == 2)
    # Within half a voxel of the true plane (our requirement).
    assert found == pytest.approx(offset, abs=voxel / 2)
    by_value = find_midline(labels, shifted, np.array([1]), np.array([2]))
    assert by_value == pytest.approx(found, abs=1e-12)
    table = _table([(1, "l", "l", "left", ""), (2, "r", "r", "right", "")])
    grid = Grid(shape, shifted)
    atlas = build_atlas(labels, shifted, table, grid, labels > 0)
    assert atlas.midline_mm == pytest.approx(offset, abs=voxel / 2)
    assert atlas.mirror_dice > 0.95


def test_find_midline_without_both_sides_is_none_and_mask_mirror_plane_used():
    shape = (6, 4, 3)
    grid = Grid(shape, _affine(0.2, [1.0, 0.0, 0.0]))
    labels = np.ones(shape, dtype=np.int16)
    assert find_midline(labels, grid.affine, labels == 1, labels == 2) is None
    table = _table([(1, "all", "A", "", "")])
    atlas = build_atlas(labels, grid.affine, table, grid, np.ones(shape, bool))
    # A full box mirrors onto itself about its centre only (x = 1.0 + 0.2 * 2.5 mm).
    assert atlas.midline_source == MIDLINE_MIRROR
    assert atlas.midline_mm == pytest.approx(1.0 + 0.2 * 2.5)
    assert any("mirrors itself best" in w for w in atlas.warnings)


def test_left_region_on_the_right_warns_about_the_affine():
    shape = (8, 3, 3)
    grid = _centred_grid(shape, 0.2)
    x = _world(shape, grid.affine)[0]
    labels = np.where(x < 0, 2, 1).astype(np.int16)  # table says 1 = left: it is right
    table = _table([(1, "l", "l", "left", ""), (2, "r", "r", "right", "")])
    atlas = build_atlas(labels, grid.affine, table, grid, np.ones(shape, bool), midline_mm=0.0)
    # every lateral region on the other side: one plain sentence, not a list
    assert any("left and right are swapped against the header" in w for w in atlas.warnings)
    assert not any("check the atlas affine" in w for w in atlas.warnings)
    # one of two left regions on the wrong side: the list that names it
    labels3 = np.where(x < -0.4, 3, labels).astype(np.int16)
    table3 = _table(
        [(1, "l", "l", "left", ""), (2, "r", "r", "left", ""), (3, "far", "f", "left", "")]
    )
    atlas = build_atlas(labels3, grid.affine, table3, grid, np.ones(shape, bool), midline_mm=0.0)
    assert any("check the atlas affine" in w and "1 (l, left)" in w for w in atlas.warnings)


def test_region_rows_and_unknown_name_suggestion():
    labels, table, grid = _hierarchy_case()
    atlas = build_atlas(labels, grid.affine, table, grid, np.ones(grid.shape, bool))
    assert atlas.region_rows("ANTERIOR") == [int(np.flatnonzero(atlas.regions["index"] == 2)[0])]
    with pytest.raises(UserError, match=r"'anterio' is not in the atlas.*'anterior'"):
        atlas.region_rows("anterio")


# --------------------------------------------------------------------------------------
# Bad inputs
# --------------------------------------------------------------------------------------


def _small():
    shape = (6, 4, 3)
    grid = _centred_grid(shape, 0.2)
    labels = np.zeros(shape, dtype=np.int16)
    labels[:3] = 1
    labels[3:] = 2
    table = _table([(1, "l", "l", "left", ""), (2, "r", "r", "right", "")])
    return labels, table, grid, np.ones(shape, bool)


def test_non_integer_labels_are_refused():
    labels, table, grid, mask = _small()
    data = labels.astype(np.float32)
    data[1, 2, 0] = 1.5
    with pytest.raises(UserError, match=r"img\.nii: .*non-integer values .*1\.5.*\(1, 2, 0\)"):
        build_atlas(data, grid.affine, table, grid, mask, image_name="img.nii")


def test_labels_missing_from_table_are_listed():
    labels, table, grid, mask = _small()
    labels[0, 0, 0] = 7
    labels[5, 3, 2] = 9
    with pytest.raises(UserError, match=r"2 label value\(s\).*missing from t\.tsv: 7, 9"):
        build_atlas(labels, grid.affine, table, grid, mask, table_name="t.tsv")


def test_duplicated_index_names_lines():
    labels, table, grid, mask = _small()
    table = pd.concat([table, table.iloc[[1]]], ignore_index=True)
    with pytest.raises(UserError, match="duplicated index") as err:
        build_atlas(labels, grid.affine, table, grid, mask, table_name="t.tsv")
    assert "index 2 appears on lines 3, 4" in str(err.value)


def test_missing_parent_is_named():
    labels, table, grid, mask = _small()
    table.loc[0, "parent"] = "5"
    with pytest.raises(UserError, match="parent") as err:
        build_atlas(labels, grid.affine, table, grid, mask, table_name="t.tsv")
    assert "t.tsv, line 2: parent 5 of index 1" in str(err.value)
    table.loc[0, "parent"] = "rr"
    with pytest.raises(UserError) as err:
        build_atlas(labels, grid.affine, table, grid, mask, table_name="t.tsv")
    assert "parent 'rr' of index 1 (l) is neither an index nor a name" in str(err.value)


def test_parent_cycle_is_named():
    labels, table, grid, mask = _small()
    extra = _table([(3, "a", "a", "", "4"), (4, "b", "b", "", "c"), (5, "c", "c", "", "3")])
    table = pd.concat([table, extra], ignore_index=True)
    with pytest.raises(UserError, match=r"cycle: 3 \(a\) → 4 \(b\) → 5 \(c\) → 3 \(a\)"):
        build_atlas(labels, grid.affine, table, grid, mask)


@pytest.mark.parametrize(
    ("row", "message"),
    [
        ((3, "c", "c", "middle", ""), "line 4: hemisphere 'middle' of index 3 is not left, right"),
        (("x1", "c", "c", "", ""), "line 4: index 'x1' is not a whole number"),
        ((3, "", "c", "", ""), "line 4: index 3 has an empty name"),
    ],
)
def test_bad_table_cells_name_the_line(row, message):
    labels, table, grid, mask = _small()
    table = pd.concat([table, _table([row])], ignore_index=True)
    with pytest.raises(UserError) as err:
        build_atlas(labels, grid.affine, table, grid, mask, table_name="t.tsv")
    assert f"t.tsv, {message}" in str(err.value)


@pytest.mark.parametrize("column", ["index", "name"])
def test_missing_required_column(column):
    labels, table, grid, mask = _small()
    with pytest.raises(UserError, match=f"no '{column}' column"):
        build_atlas(labels, grid.affine, table.drop(columns=column), grid, mask, table_name="t")


def test_atlas_covering_too_little_of_the_mask_is_refused():
    labels, table, grid, mask = _small()
    labels[:, 1:] = 0  # covers a quarter
    with pytest.raises(UserError, match=r"cover 25\.0% of the analysis mask, less than the 50%"):
        build_atlas(labels, grid.affine, table, grid, mask)
    assert DEFAULT_ATLAS_MIN_COVERAGE == 0.5
    elsewhere = grid.affine.copy()
    elsewhere[:3, 3] += 100.0
    with pytest.raises(UserError, match="does not overlap the study grid"):
        build_atlas(labels, elsewhere, table, grid, mask)


def test_read_atlas_from_files_and_name_parent_by_name(tmp_path: Path):
    labels, _, grid, mask = _small()
    image = tmp_path / "lab_atlas.nii.gz"
    nib.save(nib.Nifti1Image(labels.astype(np.int16), grid.affine), str(image))
    (tmp_path / "lab_atlas.tsv").write_text(
        "index\tname\tabbreviation\themisphere\tparent\tcolor\n"
        "1\tleft half\tNA\tleft\thalves\t#ff0000\n"
        "2\tright half\tRH\tright\t10\t#00ff00\n"
        "10\thalves\tH\tn/a\tn/a\t\n"
        "11\tnowhere\tNW\t\t\t\n"
    )
    atlas = read_atlas(image, tmp_path / "lab_atlas.tsv", grid, mask)
    regions = atlas.regions.set_index("index")
    assert regions.loc[1, "abbreviation"] == "NA"  # not read as a missing value
    assert regions.loc[1, "parent"] == 10 and regions.loc[2, "parent"] == 10
    assert regions.loc[10, "n_voxels"] == labels.size
    assert regions.loc[1, "color"] == "#ff0000"
    assert any("lab_atlas.tsv" in w and "11 (nowhere)" in w for w in atlas.warnings)
    bad = tmp_path / "bad.nii.gz"
    nib.save(nib.Nifti1Image((labels + 0.25).astype(np.float32), grid.affine), str(bad))
    with pytest.raises(UserError, match=r"bad\.nii\.gz: the atlas image holds non-integer"):
        read_atlas(bad, tmp_path / "lab_atlas.tsv", grid, mask)
    with pytest.raises(UserError, match="atlas label table not found"):
        read_atlas(image, tmp_path / "none.tsv", grid, mask)
