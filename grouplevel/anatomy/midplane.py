"""The brain's own mid-sagittal plane: the plane about which a mask best mirrors itself.

A label table's left and right can disagree with the image header (rodent files written
by small-bore scanners and converted more than once often carry a left-right flip in one
of them). The plane that best separates left- from right-labelled voxels is then
meaningless. The brain itself still knows where its middle is: a brain is close to
mirror-symmetric, so the plane ``x = c`` about which the analysis mask overlaps its own
mirror image best is its midline, whatever a table says.

The search is exhaustive over every plane that maps voxel centres onto voxel centres
(steps of half a voxel along world x). When world x runs along one array axis (every
usual rodent header, flipped or not), the overlap at all plane positions at once is one
autoconvolution per line along that axis, summed over lines, which the fast Fourier
transform gives for the whole volume in a few passes over the data. Oblique headers fall
back to evaluating the candidate planes one by one on the mask's voxel centres.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from grouplevel.errors import ArgumentError

#: An affine whose world-x row or array-axis column has entries below this share of the
#: voxel size off the x axis counts as aligned with world x (float32 header round-off
#: stays far below it; our own choice).
ALIGNED_TOLERANCE = 1e-6

#: Lines (array columns along the x axis) transformed at once in the aligned search, so
#: that the complex work array stays near 32 MB whatever the mask's size.
LINES_PER_CHUNK = 8192

#: Most mask voxels used per candidate plane in the oblique search (an even stride
#: through the mask; plenty to place a plane to half a voxel, and bounded time).
OBLIQUE_MAX_POINTS = 200_000


@dataclass(frozen=True)
class MirrorPlane:
    """The best mirror plane of a mask.

    Attributes
    ----------
    x_mm
        World x of the plane ``x = x_mm`` (mm).
    dice
        Dice coefficient of the mask with its mirror image about that plane.
    """

    x_mm: float
    dice: float


def _aligned_axis(affine: np.ndarray) -> int | None:
    """The array axis along which world x runs, when it is the only one."""
    linear = affine[:3, :3]
    axis = int(np.argmax(np.abs(linear[0])))
    size = abs(float(linear[0, axis]))
    if size == 0:
        return None
    off_row = np.delete(linear[0], axis)
    off_column = np.delete(linear[:, axis], 0)
    if np.abs(off_row).max() > ALIGNED_TOLERANCE * size:
        return None
    if np.abs(off_column).max() > ALIGNED_TOLERANCE * size:
        return None
    return axis


def _autoconvolution(mask: np.ndarray, axis: int) -> np.ndarray:
    """``overlap[s] = Σ M[i] M[s - i]`` along ``axis``, summed over all other axes."""
    lines = np.moveaxis(mask, axis, 0).reshape(mask.shape[axis], -1)
    lines = lines[:, lines.any(axis=0)]
    n = mask.shape[axis]
    size = 2 * n
    spectrum = np.zeros(size // 2 + 1, dtype=np.complex128)
    for start in range(0, lines.shape[1], LINES_PER_CHUNK):
        block = np.fft.rfft(lines[:, start : start + LINES_PER_CHUNK], n=size, axis=0)
        spectrum += (block * block).sum(axis=1)
    return np.rint(np.fft.irfft(spectrum, n=size)[: 2 * n - 1])


def _aligned_search(mask: np.ndarray, affine: np.ndarray, axis: int) -> MirrorPlane:
    """Every plane at once: reflecting index ``i`` to ``s - i`` along the x axis."""
    n = mask.shape[axis]
    overlap = _autoconvolution(mask, axis)
    per_slice = mask.sum(axis=tuple(d for d in range(3) if d != axis)).astype(float)
    # mask voxels whose mirror falls inside the grid, for each shift s = 0 .. 2n - 2
    mirrored = np.convolve(per_slice, np.ones(n))
    total = float(per_slice.sum())
    dice = 2.0 * overlap / (total + mirrored)
    shift = _middle_of_best(dice)
    # index s/2 is on the plane: world x = x0 + step * s / 2
    x_mm = float(affine[0, 3] + affine[0, axis] * shift / 2.0)
    return MirrorPlane(x_mm=x_mm, dice=float(dice[int(round(shift))]))


def _middle_of_best(score: np.ndarray) -> float:
    """Position of the maximum; the middle of the run when several are equally best."""
    best = np.flatnonzero(score >= score.max() - 1e-12)
    runs = np.split(best, np.flatnonzero(np.diff(best) > 1) + 1)
    longest = max(runs, key=len)
    return float(longest[len(longest) // 2])


def _oblique_search(mask: np.ndarray, affine: np.ndarray) -> MirrorPlane:
    """Candidate planes every half voxel across the mask, evaluated one by one."""
    ijk = np.argwhere(mask)
    stride = max(1, ijk.shape[0] // OBLIQUE_MAX_POINTS)
    points = ijk[::stride].astype(np.float64)
    world = points @ affine[:3, :3].T + affine[:3, 3]
    inverse = np.linalg.inv(affine)
    step = float(np.abs(affine[0, :3]).max()) / 2.0
    candidates = np.arange(world[:, 0].min(), world[:, 0].max() + step, step)
    shape = np.asarray(mask.shape)
    dice = np.empty(candidates.size)
    for k, c in enumerate(candidates):  # one pass over the points per candidate plane
        mirrored = world.copy()
        mirrored[:, 0] = 2.0 * c - mirrored[:, 0]
        index = np.floor(mirrored @ inverse[:3, :3].T + inverse[:3, 3] + 0.5).astype(np.int64)
        inside = np.all((index >= 0) & (index < shape), axis=1)
        hit = np.zeros(points.shape[0], dtype=bool)
        hit[inside] = mask[index[inside, 0], index[inside, 1], index[inside, 2]]
        # mirrored voxels inside the grid: those that land on the grid at all
        dice[k] = 2.0 * hit.sum() / (points.shape[0] + inside.sum())
    best = _middle_of_best(dice)
    return MirrorPlane(x_mm=float(candidates[int(round(best))]), dice=float(dice[int(best)]))


def best_mirror_plane(mask: np.ndarray, affine: np.ndarray) -> MirrorPlane | None:
    """The sagittal plane ``x = c`` about which a mask overlaps its mirror image best.

    Every plane that maps voxel centres onto voxel centres is tried (steps of half a
    voxel along world x); the Dice coefficient of the mask with its mirror image about
    each is computed, mirror voxels outside the grid counting as outside the mask, and
    the best plane is returned (the middle one when several tie).

    Parameters
    ----------
    mask
        3-D boolean mask (a brain mask or an analysis mask).
    affine
        Its 4 × 4 voxel → mm affine (RAS+ world axes: x towards the animal's right).

    Returns
    -------
    MirrorPlane or None
        The plane and its Dice coefficient; None for an empty mask.

    Raises
    ------
    ArgumentError
        When the mask is not 3-D or the affine not a finite invertible 4 × 4 matrix.

    Notes
    -----
    With world x along array axis ``a`` (``x = x0 + d·i``), the mirror of index ``i``
    about ``x = x0 + d·s/2`` is ``s - i``; the overlap for every ``s`` at once is the
    autoconvolution of each line of the mask along ``a``, summed over lines, computed
    with real FFTs of length ``2n`` (no wrap-around) and rounded back to counts.

    References
    ----------
    Dice LR (1945). Measures of the amount of ecologic association between species.
    Ecology 26:297-302.
    """
    mask = np.asarray(mask, dtype=bool)
    affine = np.asarray(affine, dtype=float)
    if mask.ndim != 3:
        raise ArgumentError(f"mask must be 3-D, got shape {mask.shape}")
    if affine.shape != (4, 4) or not np.all(np.isfinite(affine)):
        raise ArgumentError("affine must be a finite 4 x 4 matrix")
    if abs(np.linalg.det(affine[:3, :3])) == 0:
        raise ArgumentError("affine must be invertible")
    if not mask.any():
        return None
    axis = _aligned_axis(affine)
    if axis is None:
        return _oblique_search(mask, affine)
    return _aligned_search(mask, affine, axis)
