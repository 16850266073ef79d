"""Voxel indices, world millimetres and stereotaxic coordinates.

Every image of a study carries a 4 × 4 affine that maps voxel indices ``(i, j, k)`` to
world coordinates ``(x, y, z)`` in millimetres. grouplevel reads world axes in the RAS+
convention of NIfTI: x increases towards the animal's right, y towards its nose
(anterior) and z towards its back (dorsal; "superior" for an upright human). Left and
right are therefore always decided from world x, never from the order of the array.

Rodent studies report positions as stereotaxic coordinates from a landmark of the skull
such as bregma: anterior–posterior (AP, positive anterior), medial–lateral (ML, positive
to the right) and dorsal–ventral (DV, positive dorsal), in millimetres of the template.
This module turns world millimetres into those three numbers and describes an affine's
orientation in words, for ``check`` and the report to print.
"""

from __future__ import annotations

import numpy as np
from nibabel.orientations import aff2axcodes

#: Column names of stereotaxic coordinates, in the order of :func:`to_stereotaxic`.
STEREOTAXIC_COLUMNS = ("AP_mm", "ML_mm", "DV_mm")

#: A point this close to the midline plane counts as on it (the tolerance used for
#: comparing affines, grouplevel.intake.images.AFFINE_TOLERANCE_MM: far below a rodent
#: voxel of 0.05-0.3 mm, above float32 round-off of header coordinates).
MIDLINE_TOLERANCE_MM = 1e-3

# What each axis code of nibabel.aff2axcodes means along an array axis of a rodent image:
# the code names the world direction towards which the index increases.
_AXIS_WORDS = {
    "R": "left→right",
    "L": "right→left",
    "A": "posterior→anterior",
    "P": "anterior→posterior",
    "S": "ventral→dorsal",
    "I": "dorsal→ventral",
}


def _as_points(values: np.ndarray | list | tuple, what: str) -> tuple[np.ndarray, bool]:
    points = np.asarray(values, dtype=float)
    single = points.ndim == 1
    points = np.atleast_2d(points)
    if points.ndim != 2 or points.shape[1] != 3:
        raise ValueError(f"{what} must have shape (3,) or (n, 3), got {np.shape(values)}")
    return points, single


def voxel_to_mm(ijk: np.ndarray | list | tuple, affine: np.ndarray) -> np.ndarray:
    """World coordinates (mm) of voxel indices.

    Parameters
    ----------
    ijk
        One voxel ``(3,)`` or many ``(n, 3)``; fractional indices are allowed (index 0 is
        the centre of the first voxel).
    affine
        4 × 4 voxel → mm affine of the image.

    Returns
    -------
    numpy.ndarray
        ``(3,)`` or ``(n, 3)`` world coordinates ``x, y, z`` in mm.
    """
    points, single = _as_points(ijk, "ijk")
    affine = np.asarray(affine, dtype=float)
    xyz = points @ affine[:3, :3].T + affine[:3, 3]
    return xyz[0] if single else xyz


def mm_to_voxel(xyz_mm: np.ndarray | list | tuple, affine: np.ndarray) -> np.ndarray:
    """Fractional voxel indices of world coordinates (the inverse of :func:`voxel_to_mm`).

    Parameters
    ----------
    xyz_mm
        One point ``(3,)`` or many ``(n, 3)`` in world mm.
    affine
        4 × 4 voxel → mm affine of the image.

    Returns
    -------
    numpy.ndarray
        ``(3,)`` or ``(n, 3)`` fractional indices; round them (``floor(v + 0.5)``) for the
        nearest voxel.
    """
    points, single = _as_points(xyz_mm, "xyz_mm")
    inverse = np.linalg.inv(np.asarray(affine, dtype=float))
    ijk = points @ inverse[:3, :3].T + inverse[:3, 3]
    return ijk[0] if single else ijk


def to_stereotaxic(
    xyz_mm: np.ndarray | list | tuple, origin_mm: np.ndarray | list | tuple
) -> np.ndarray:
    """Stereotaxic coordinates of world points relative to an origin such as bregma.

    Parameters
    ----------
    xyz_mm
        One point ``(3,)`` or many ``(n, 3)`` in world mm (RAS+).
    origin_mm
        World coordinates ``(x, y, z)`` of the origin (e.g. bregma) in the template.

    Returns
    -------
    numpy.ndarray
        ``(3,)`` or ``(n, 3)`` with columns :data:`STEREOTAXIC_COLUMNS`: AP (positive
        anterior), ML (positive right) and DV (positive dorsal) in mm from the origin.

    Notes
    -----
    With RAS+ world axes AP is ``y - y0``, ML is ``x - x0`` and DV is ``z - z0``. The
    signs follow the usual reading of rodent stereotaxic atlases (anterior of bregma
    positive, right of the midline positive); DV is counted positive upwards here, so a
    point below the origin has a negative DV.
    """
    points, single = _as_points(xyz_mm, "xyz_mm")
    origin = np.asarray(origin_mm, dtype=float)
    if origin.shape != (3,):
        raise ValueError(f"origin_mm must have shape (3,), got {origin.shape}")
    offset = points - origin
    stereotaxic = offset[:, [1, 0, 2]]
    return stereotaxic[0] if single else stereotaxic


def describe_orientation(affine: np.ndarray) -> str:
    """Say in words where each array axis of an image points.

    Parameters
    ----------
    affine
        4 × 4 voxel → mm affine.

    Returns
    -------
    str
        For example ``"RAS: i left→right, j posterior→anterior, k ventral→dorsal"``; the
        leading code is the one nibabel's ``aff2axcodes`` gives (the world direction of
        increasing ``i``, ``j``, ``k``).
    """
    codes = aff2axcodes(np.asarray(affine, dtype=float))
    words = ", ".join(
        f"{axis} {_AXIS_WORDS.get(code, 'undetermined')}"
        for axis, code in zip("ijk", codes, strict=True)
    )
    return f"{''.join(str(c) for c in codes)}: {words}"
