"""The brain's own midline: the best mirror plane of a mask, and a swapped label table.

Geometry references: nibabel's affine tools (``nibabel.affines.apply_affine`` maps
voxel indices to world mm; ``nibabel.orientations.aff2axcodes`` names where each array
axis points). Dice (1945), Ecology 26:297, defines the overlap score.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nibabel.affines import apply_affine
from nibabel.orientations import aff2axcodes

from grouplevel.anatomy.atlas import (
    MIDLINE_GIVEN,
    MIDLINE_MIRROR,
    RESAMPLING_NEAREST_SAME_SIZE,
    RESAMPLING_REORDERED,
    build_atlas,
)
from grouplevel.anatomy.midplane import best_mirror_plane
from grouplevel.errors import ArgumentError
from grouplevel.intake.images import Grid

VOXEL = 0.2
SHAPE = (17, 21, 11)
TRUE_MIDLINE = 0.3  # mm; not the grid centre (x = 0), on a half-voxel position


def _affine(flip_x: bool = False) -> np.ndarray:
    affine = np.diag([VOXEL, VOXEL, VOXEL, 1.0])
    affine[:3, 3] = [-VOXEL * (n - 1) / 2.0 for n in SHAPE]
    if flip_x:  # the same world box stored right-to-left
        affine[0, 0] = -VOXEL
        affine[0, 3] = VOXEL * (SHAPE[0] - 1) / 2.0
    return affine


def _world(affine: np.ndarray) -> np.ndarray:
    ijk = np.indices(SHAPE).reshape(3, -1).T
    # Reference: nibabel.affines.apply_affine (NiBabel)
    return apply_affine(affine, ijk).T.reshape(3, *SHAPE)


def _brain(affine: np.ndarray) -> np.ndarray:
    """An ellipsoid brain, longest anterior-posterior, symmetric about TRUE_MIDLINE, with
    a one-sided notch on its far right edge that a mirror plane must tolerate."""
    x, y, z = _world(affine)
    brain = ((x - TRUE_MIDLINE) / 1.35) ** 2 + (y / 1.9) ** 2 + (z / 0.9) ** 2 < 1.0
    return brain & ~((x > TRUE_MIDLINE + 1.0) & (y > 1.0))


def _reference_dice(mask: np.ndarray, affine: np.ndarray, plane: float) -> float:
    """Dice of a mask with its mirror about x = plane, from world points (nibabel)."""
    ijk = np.argwhere(mask)
    xyz = apply_affine(affine, ijk)
    xyz[:, 0] = 2 * plane - xyz[:, 0]
    back = np.rint(apply_affine(np.linalg.inv(affine), xyz)).astype(int)
    inside = np.all((back >= 0) & (back < np.asarray(mask.shape)), axis=1)
    hits = mask[tuple(back[inside].T)].sum()
    return 2.0 * hits / (mask.sum() + inside.sum())


@pytest.mark.parametrize("flip_x", [False, True])
def test_best_mirror_plane_is_the_best_of_all_half_voxel_planes(flip_x):
    affine = _affine(flip_x)
    # aff2axcodes (nibabel) confirms which way the array runs in each case
    assert aff2axcodes(affine)[0] == ("L" if flip_x else "R")
    mask = _brain(affine)
    found = best_mirror_plane(mask, affine)
    planes = np.arange(-1.5, 1.5 + 1e-9, VOXEL / 2)
    reference = np.array([_reference_dice(mask, affine, p) for p in planes])
    assert found.x_mm == pytest.approx(TRUE_MIDLINE, abs=1e-9)
    assert found.dice == pytest.approx(reference.max(), abs=1e-12)
    assert found.dice == pytest.approx(_reference_dice(mask, affine, found.x_mm), abs=1e-12)
    assert found.dice > 0.95


def test_best_mirror_plane_on_an_oblique_header():
    angle = np.deg2rad(3.0)  # a slightly turned header: x no longer along one array axis
    turn = np.eye(4)
    turn[:2, :2] = [[np.cos(angle), -np.sin(angle)], [np.sin(angle), np.cos(angle)]]
    affine = turn @ _affine()
    x, y, z = _world(affine)
    mask = ((x - TRUE_MIDLINE) / 1.35) ** 2 + (y / 1.9) ** 2 + (z / 0.9) ** 2 < 1.0
    found = best_mirror_plane(mask, affine)
    # within half a voxel of the true plane (our requirement for a midline)
    assert found.x_mm == pytest.approx(TRUE_MIDLINE, abs=VOXEL / 2)
    assert found.dice == pytest.approx(_reference_dice(mask, affine, found.x_mm), abs=0.02)


def test_best_mirror_plane_bad_arguments():
    assert best_mirror_plane(np.zeros(SHAPE, bool), _affine()) is None
    with pytest.raises(ArgumentError, match="3-D"):
        best_mirror_plane(np.ones((3, 3), bool), _affine())
    with pytest.raises(ArgumentError, match="invertible"):
        best_mirror_plane(np.ones(SHAPE, bool), np.diag([0.0, 1, 1, 1]))


def _swapped_atlas(affine: np.ndarray, mask: np.ndarray):
    """Two lateral regions per side, named by a table whose left and right are the
    header's right and left (the header's x grows towards the animal's right)."""
    x, y, _ = _world(affine)
    labels = np.zeros(SHAPE, dtype=np.int16)
    right_of_header = x > TRUE_MIDLINE + 1e-6
    left_of_header = x < TRUE_MIDLINE - 1e-6
    labels[mask & right_of_header & (y >= 0)] = 1
    labels[mask & right_of_header & (y < 0)] = 2
    labels[mask & left_of_header & (y >= 0)] = 3
    labels[mask & left_of_header & (y < 0)] = 4
    labels[mask & ~right_of_header & ~left_of_header] = 5
    table = pd.DataFrame(
        [
            (1, "front", "F", "left", ""),  # lies on the header's right
            (2, "back", "B", "left", ""),
            (3, "front", "F", "right", ""),  # lies on the header's left
            (4, "back", "B", "right", ""),
            (5, "septum", "S", "both", ""),
        ],
        columns=["index", "name", "abbreviation", "hemisphere", "parent"],
    )
    return labels, table


def test_swapped_table_is_diagnosed_and_the_midline_is_the_brains():
    affine = _affine()
    mask = _brain(affine)
    labels, table = _swapped_atlas(affine, mask)
    grid = Grid(SHAPE, affine)
    atlas = build_atlas(labels, affine, table, grid, mask, table_name="labels.tsv")
    assert atlas.midline_source == MIDLINE_MIRROR
    assert atlas.midline_mm == pytest.approx(TRUE_MIDLINE, abs=VOXEL / 2)
    # the mirror overlap about the chosen midline is high (reference Dice from nibabel)
    assert atlas.mirror_dice == pytest.approx(_reference_dice(mask, affine, TRUE_MIDLINE), 1e-12)
    assert atlas.mirror_dice > 0.95
    swapped = [w for w in atlas.warnings if "swapped" in w]
    assert len(swapped) == 1
    assert swapped[0].startswith("labels.tsv: the table's left and right are swapped")
    assert (
        "every region the table calls left lies on the header's right, and every region the "
        "table calls right lies on the header's left of the midline x = 0.300 mm"
    ) in swapped[0]
    assert "swap 'left' and 'right' in the table's hemisphere column" in swapped[0]
    # no half list of "wrong side" regions, no low-Dice warning
    assert not any("lie mostly on the other side" in w for w in atlas.warnings)
    assert not any("Dice of only" in w for w in atlas.warnings)


def test_a_given_midline_is_used_as_given():
    affine = _affine()
    mask = _brain(affine)
    labels, table = _swapped_atlas(affine, mask)
    grid = Grid(SHAPE, affine)
    atlas = build_atlas(labels, affine, table, grid, mask, midline_mm=0.1)
    assert atlas.midline_source == MIDLINE_GIVEN
    assert atlas.midline_mm == 0.1
    # nothing is guessed, but the mirror overlap about the given plane is reported as is
    assert atlas.mirror_dice == pytest.approx(_reference_dice(mask, affine, 0.1), abs=1e-12)


def test_flipped_atlas_on_the_same_grid_is_called_a_copy():
    affine = _affine()
    mask = _brain(affine)
    labels, table = _swapped_atlas(affine, mask)
    grid = Grid(SHAPE, affine)
    direct = build_atlas(labels, affine, table, grid, mask)
    flipped_affine = _affine(flip_x=True)
    flipped = build_atlas(labels[::-1].copy(), flipped_affine, table, grid, mask)
    assert flipped.resampling == f"{RESAMPLING_REORDERED} (reversed along study axis i)"
    np.testing.assert_array_equal(flipped.label_volume, direct.label_volume)
    # a grid shifted by a third of a voxel is a real nearest-neighbour resampling
    shifted = affine.copy()
    shifted[:3, 3] += VOXEL / 3
    moved = build_atlas(labels, shifted, table, grid, mask, midline_mm=TRUE_MIDLINE)
    assert moved.resampling == RESAMPLING_NEAREST_SAME_SIZE


@settings(max_examples=40, deadline=None)
@given(
    half_steps=st.integers(min_value=6, max_value=24),
    flip=st.booleans(),
    seed=st.integers(min_value=0, max_value=10_000),
)
def test_a_mask_symmetric_by_construction_is_found_on_its_plane(half_steps, flip, seed):
    """Property: a random mask made symmetric about index plane s/2 (s = half_steps) by
    taking it together with its mirror image is found on that plane, with Dice 1."""
    rng = np.random.default_rng(seed)
    shape = (16, 5, 4)
    half = rng.random(shape) < 0.3
    i = np.arange(shape[0])
    partner = half_steps - i  # the mirror of index i about s/2
    inside = (partner >= 0) & (partner < shape[0])
    mask = half.copy()
    mask[inside] |= half[partner[inside]]
    mask[~inside] = False  # voxels whose mirror leaves the grid
    if not mask.any():
        return
    affine = np.diag([-VOXEL if flip else VOXEL, VOXEL, VOXEL, 1.0])
    found = best_mirror_plane(mask, affine)
    # the plane's world x: nibabel.affines.apply_affine of the index plane's centre
    expected_x = apply_affine(affine, [half_steps / 2.0, 0, 0])[0]
    assert found.dice == pytest.approx(1.0, abs=1e-12)
    assert _reference_dice(mask, affine, expected_x) == pytest.approx(1.0, abs=1e-12)
    if found.x_mm != pytest.approx(expected_x, abs=1e-9):
        # another plane mirrors this mask perfectly too: only possible when the mask is
        # also symmetric about it (checked with the independent reference)
        assert _reference_dice(mask, affine, found.x_mm) == pytest.approx(1.0, abs=1e-12)
