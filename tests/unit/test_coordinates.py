"""Voxel ↔ mm conversion, stereotaxic coordinates and orientation words."""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest
from nibabel.affines import apply_affine

from grouplevel.coordinates import (
    STEREOTAXIC_COLUMNS,
    describe_orientation,
    mm_to_voxel,
    to_stereotaxic,
    voxel_to_mm,
)


def _oblique_affine(rng: np.random.Generator) -> np.ndarray:
    q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    affine = np.eye(4)
    affine[:3, :3] = q @ np.diag([0.1, 0.12, 0.3])
    affine[:3, 3] = rng.normal(0, 5, size=3)
    return affine


def test_voxel_to_mm_matches_nibabel_apply_affine():
    rng = np.random.default_rng(1)
    affine = _oblique_affine(rng)
    ijk = rng.uniform(0, 50, size=(20, 3))
    # Reference: nibabel.affines.apply_affine (NiBabel).
    np.testing.assert_allclose(voxel_to_mm(ijk, affine), apply_affine(affine, ijk), atol=1e-12)
    np.testing.assert_allclose(voxel_to_mm(ijk[0], affine), apply_affine(affine, ijk[0]))
    # mm_to_voxel inverts it (nibabel: apply_affine with the inverse affine).
    xyz = apply_affine(affine, ijk)
    np.testing.assert_allclose(mm_to_voxel(xyz, affine), ijk, atol=1e-9)
    np.testing.assert_allclose(
        mm_to_voxel(xyz, affine), apply_affine(np.linalg.inv(affine), xyz), atol=1e-9
    )


def test_voxel_to_mm_rejects_wrong_shape():
    with pytest.raises(ValueError, match="shape"):
        voxel_to_mm(np.zeros((4, 2)), np.eye(4))


def test_stereotaxic_axes_and_signs():
    # Common practice in rodent stereotaxy: AP positive anterior of bregma, ML positive to
    # the right, and here DV positive dorsal (RAS+ world: y anterior, x right, z dorsal).
    bregma = np.array([0.5, -1.0, 2.0])
    point = bregma + np.array([2.0, 1.0, -3.0])  # 2 mm right, 1 mm anterior, 3 mm ventral
    ap, ml, dv = to_stereotaxic(point, bregma)
    assert STEREOTAXIC_COLUMNS == ("AP_mm", "ML_mm", "DV_mm")
    assert ap == pytest.approx(1.0, abs=1e-12)
    assert ml == pytest.approx(2.0, abs=1e-12)
    assert dv == pytest.approx(-3.0, abs=1e-12)
    many = to_stereotaxic(np.vstack([point, bregma]), bregma)
    np.testing.assert_allclose(many, [[1.0, 2.0, -3.0], [0.0, 0.0, 0.0]], atol=1e-12)


def test_stereotaxic_of_flipped_image_is_unchanged():
    # The same voxel of an image stored right-to-left has the same world position, so the
    # same stereotaxic coordinates (left/right never from array order; NIfTI-1 standard).
    shape = (11, 9, 7)
    affine = np.diag([0.2, 0.2, 0.2, 1.0])
    affine[:3, 3] = [-1.0, -0.8, -0.6]
    flip = np.eye(4)
    flip[0, 0] = -1.0
    flip[0, 3] = shape[0] - 1
    flipped = affine @ flip
    ijk = np.array([[2, 3, 4], [9, 1, 0]])
    ijk_flipped = ijk.copy()
    ijk_flipped[:, 0] = shape[0] - 1 - ijk[:, 0]
    origin = np.zeros(3)
    np.testing.assert_allclose(
        to_stereotaxic(voxel_to_mm(ijk, affine), origin),
        to_stereotaxic(voxel_to_mm(ijk_flipped, flipped), origin),
        atol=1e-12,
    )


@pytest.mark.parametrize(
    ("permutation", "signs", "expected"),
    [
        ((0, 1, 2), (1, 1, 1), "RAS: i left→right, j posterior→anterior, k ventral→dorsal"),
        ((0, 1, 2), (-1, 1, 1), "LAS: i right→left, j posterior→anterior, k ventral→dorsal"),
        ((1, 2, 0), (1, -1, 1), "AIR: i posterior→anterior, j dorsal→ventral, k left→right"),
        ((0, 2, 1), (1, 1, -1), "RSP: i left→right, j ventral→dorsal, k anterior→posterior"),
    ],
)
def test_describe_orientation_follows_nibabel_axcodes(permutation, signs, expected):
    affine = np.zeros((4, 4))
    affine[3, 3] = 1.0
    for axis, (world, sign) in enumerate(zip(permutation, signs, strict=True)):
        affine[world, axis] = 0.15 * sign
    text = describe_orientation(affine)
    # Reference: nibabel.aff2axcodes gives the axis codes (NiBabel orientations module).
    assert text.split(":")[0] == "".join(nib.aff2axcodes(affine))
    assert text == expected


def test_header_to_true_against_nibabel_affine_tools():
    from nibabel.affines import voxel_sizes
    from nibabel.orientations import aff2axcodes

    from grouplevel.anatomy.coordinates import header_to_true

    true = np.diag([0.1, 0.1, 0.1, 1.0])
    true[:3, 3] = [-2.0, -5.0, -3.0]
    # a ×10 header: nibabel.affines.voxel_sizes reads 1 mm voxels; declared, 0.1 mm
    tenfold = np.diag([10.0, 10.0, 10.0, 1.0]) @ true
    fixed = header_to_true(10, ("right", "anterior", "dorsal")) @ tenfold
    np.testing.assert_allclose(voxel_sizes(tenfold), [1.0, 1.0, 1.0])
    np.testing.assert_allclose(voxel_sizes(fixed), [0.1, 0.1, 0.1])
    np.testing.assert_allclose(fixed, true, atol=1e-12)
    # a header whose y is dorsal and z anterior: nibabel.orientations.aff2axcodes says
    # R, S, A; declared, the true affine is R, A, S again and maps voxels as before
    exchange = header_to_true(1, ("right", "dorsal", "anterior"))
    header = np.linalg.inv(exchange) @ true
    assert aff2axcodes(header) == ("R", "S", "A")
    assert aff2axcodes(exchange @ header) == ("R", "A", "S")
    ijk = np.array([[3.0, 7.0, 2.0], [0.0, 0.0, 0.0]])
    np.testing.assert_allclose(apply_affine(exchange @ header, ijk), apply_affine(true, ijk))
    # a header whose x grows to the left (and y posterior): signs are turned back
    flipped = header_to_true(1, ("left", "posterior", "dorsal"))
    np.testing.assert_allclose(np.diag(flipped), [-1.0, -1.0, 1.0, 1.0])


def test_header_to_true_refuses_bad_declarations():
    from grouplevel.anatomy.coordinates import header_to_true
    from grouplevel.errors import ArgumentError

    with pytest.raises(ArgumentError, match="positive"):
        header_to_true(0, ("right", "anterior", "dorsal"))
    with pytest.raises(ArgumentError, match="once"):
        header_to_true(1, ("right", "left", "dorsal"))
    with pytest.raises(ArgumentError, match="three of"):
        header_to_true(1, ("right", "up", "dorsal"))


def test_mask_extent_matches_voxel_boxes():
    from grouplevel.anatomy.coordinates import mask_extent_mm

    mask = np.zeros((5, 6, 7), bool)
    mask[1:3, 2:6, 3] = True
    # 2 × 4 × 1 voxels of 0.1 × 0.2 × 0.3 mm (common practice: extent of voxel boxes)
    np.testing.assert_allclose(mask_extent_mm(mask, np.diag([0.1, 0.2, 0.3, 1])), [0.2, 0.8, 0.3])
    assert mask_extent_mm(np.zeros((2, 2, 2), bool), np.eye(4)) is None
