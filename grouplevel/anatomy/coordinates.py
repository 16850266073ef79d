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

from grouplevel.errors import ArgumentError

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


# --------------------------------------------------------------------------------------
# Headers that are scaled or whose axes are exchanged
# --------------------------------------------------------------------------------------

#: The words that say towards which side of the animal a header's world axis grows, and
#: the true RAS+ axis (0 = x, left→right; 1 = y, posterior→anterior; 2 = z,
#: ventral→dorsal) and sign each stands for.
HEADER_AXIS_WORDS = {
    "right": (0, 1.0),
    "left": (0, -1.0),
    "anterior": (1, 1.0),
    "posterior": (1, -1.0),
    "dorsal": (2, 1.0),
    "ventral": (2, -1.0),
}

#: What a header's world x, y and z mean when nothing is declared (NIfTI's RAS+).
TRUE_HEADER_AXES = ("right", "anterior", "dorsal")

#: True anatomical name of each RAS+ world axis, for messages.
AXIS_NAMES = ("left–right", "anterior–posterior", "dorsal–ventral")


def header_to_true(units_per_mm: float, axes: tuple[str, str, str] | list[str]) -> np.ndarray:
    """The 4 × 4 matrix from a header's world coordinates to true RAS+ millimetres.

    Some rodent images carry headers written for software made for human brains: every
    length multiplied by 10 (a 0.1 mm voxel stored as 1 mm), or the anterior–posterior
    and dorsal–ventral axes exchanged by a scanner that took the animal's long axis for
    the bore's. Given what the header's units and axes really are, this matrix turns its
    coordinates into true ones: ``true = M @ header`` (homogeneous coordinates), so a
    voxel → true-mm affine is ``M @ header_affine``.

    Parameters
    ----------
    units_per_mm
        How many of the header's length units make one true millimetre (10 for a header
        scaled ×10; 1 when the header is in true millimetres).
    axes
        Towards which side of the animal the header's world x, y and z grow, each one of
        :data:`HEADER_AXIS_WORDS` (``("right", "anterior", "dorsal")`` for a correct
        header); every true axis must appear once.

    Returns
    -------
    numpy.ndarray
        4 × 4 matrix: a signed permutation divided by ``units_per_mm`` (no translation:
        the scaling is about the header's origin).

    Raises
    ------
    ArgumentError
        For a scale that is not a positive finite number, an unknown word, or a true
        axis named twice.

    Examples
    --------
    >>> header_to_true(10, ("right", "dorsal", "anterior"))[:3, :3]
    array([[0.1, 0. , 0. ],
           [0. , 0. , 0.1],
           [0. , 0.1, 0. ]])
    """
    scale = float(units_per_mm)
    if not (np.isfinite(scale) and scale > 0):
        raise ArgumentError(f"units_per_mm must be a positive number, got {units_per_mm!r}")
    words = [str(a).strip().lower() for a in axes]
    if len(words) != 3 or any(w not in HEADER_AXIS_WORDS for w in words):
        raise ArgumentError(
            f"axes must be three of {', '.join(HEADER_AXIS_WORDS)}; got {list(axes)!r}"
        )
    targets = [HEADER_AXIS_WORDS[w][0] for w in words]
    if sorted(targets) != [0, 1, 2]:
        raise ArgumentError(
            f"axes must name each of left/right, anterior/posterior and dorsal/ventral "
            f"once; got {list(axes)!r}"
        )
    matrix = np.eye(4)
    matrix[:3, :3] = 0.0
    for header_axis, word in enumerate(words):
        true_axis, sign = HEADER_AXIS_WORDS[word]
        matrix[true_axis, header_axis] = sign / scale
    return matrix


def mask_extent_mm(mask: np.ndarray, affine: np.ndarray) -> np.ndarray | None:
    """Extent (mm) of a mask along the world x, y and z axes.

    The extent is that of the mask's bounding box in voxel indices, voxel boxes
    included (a one-voxel mask of an axis-aligned grid spans one voxel size); for an
    oblique grid the box's corners may reach a little beyond the mask itself.

    Parameters
    ----------
    mask
        3-D boolean mask.
    affine
        Its 4 × 4 voxel → mm affine.

    Returns
    -------
    numpy.ndarray or None
        ``(3,)`` extents along world x, y, z; None for an empty mask.
    """
    mask = np.asarray(mask, dtype=bool)
    if not mask.any():
        return None
    affine = np.asarray(affine, dtype=float)
    # the bounding box in voxel indices, its corners taken to world mm
    ijk = np.argwhere(mask)
    low, high = ijk.min(axis=0), ijk.max(axis=0)
    corners = np.array(np.meshgrid(*zip(low, high, strict=True), indexing="ij")).reshape(3, -1)
    xyz = affine[:3, :3] @ corners + affine[:3, 3:4]
    # a voxel box adds half a voxel step along every array axis at both ends
    half_box = np.abs(affine[:3, :3]).sum(axis=1)
    return xyz.max(axis=1) - xyz.min(axis=1) + half_box
