"""Threshold-free cluster enhancement (TFCE), computed exactly.

TFCE scores a voxel by how much cluster support it has at every height below its own
value: with ``e(h)`` the extent (mm³) of the cluster that contains voxel ``v`` when the
map is thresholded at ``h``,

    TFCE(v) = ∫_0^{stat(v)} e(h)^E h^H dh.

No cluster-forming threshold is needed. Usual weights are E = 0.5 and H = 2 (Smith &
Nichols 2009).

Rather than thresholding at many heights, the integral is computed exactly in one sweep:
voxels enter from the highest value down and join their already-entered neighbours in a
union-find forest (path compression, union by size). Each component keeps its extent and
a lazily updated integral, brought down from the height it was last touched only when it
changes; a component that is absorbed hangs below the voxel that absorbed it, and a
voxel's TFCE is the sum of the integrals along that chain, so every score is a sum of
non-negative terms (see :func:`grouplevel.inference._tfce_kernel._sweep`).
This is the component tree of the thresholded map (Salembier et al. 1998; Najman &
Couprie 2006), traversed once. The cost is O(V log V) for sorting V voxels plus nearly
linear time for the merges.

References
----------
Smith SM, Nichols TE (2009). Threshold-free cluster enhancement: addressing problems of
smoothing, threshold dependence and localisation in cluster inference. NeuroImage 44:83-98.

Salembier P, Oliveras A, Garrido L (1998). Antiextensive connected operators for image
and sequence processing. IEEE Trans Image Process 7:555-570.

Najman L, Couprie M (2006). Building the component tree in quasi-linear time. IEEE Trans
Image Process 15:3531-3539.
"""

from __future__ import annotations

import numpy as np

from grouplevel.errors import ArgumentError
from grouplevel.inference import _tfce_kernel
from grouplevel.inference.clusters import (
    DEFAULT_CONNECTIVITY,
    PaddedGrid,
    _as_grid,
    _check_sided,
)

#: Extent weight E (Smith & Nichols 2009, NeuroImage 44:83).
DEFAULT_TFCE_E = 0.5

#: Height weight H (Smith & Nichols 2009, NeuroImage 44:83).
DEFAULT_TFCE_H = 2.0


def tfce(
    stat: np.ndarray,
    mask: np.ndarray | None,
    *,
    connectivity: int = DEFAULT_CONNECTIVITY,
    E: float = DEFAULT_TFCE_E,
    H: float = DEFAULT_TFCE_H,
    voxel_volume_mm3: float = 1.0,
    sided: str = "two",
) -> np.ndarray:
    """Exact threshold-free cluster enhancement of a statistic map.

    Parameters
    ----------
    stat
        2-D or 3-D statistic map (a 2-D map is one slice). Voxels that are NaN are left
        out (they neither score nor connect others).
    mask
        Boolean map of the same shape; ``None`` means the whole grid.
    connectivity
        6, 18 or 26 (see :func:`grouplevel.inference.clusters.neighbourhood`).
    E
        Extent weight (>= 0).
    H
        Height weight (>= 0).
    voxel_volume_mm3
        Volume of one voxel; extents are measured in mm³, so the result scales with
        ``voxel_volume_mm3 ** E``.
    sided
        ``"positive"``: TFCE of ``stat`` (voxels <= 0 score 0); ``"negative"``: TFCE
        of ``-stat``, returned negative; ``"two"``: both, the positive part from
        ``stat`` and the negative part from ``-stat``, so the result carries the sign
        of ``stat``.

    Returns
    -------
    numpy.ndarray
        float64 map of the input's shape; 0 outside the mask and where no score applies.

    Raises
    ------
    ArgumentError
        For an unknown ``sided`` or connectivity, mismatched shapes, negative weights,
        a non-positive voxel volume, or infinite values in the mask.

    Notes
    -----
    Exact up to floating-point rounding: each score is a sum of non-negative pieces
    ``e^E (F(h_upper) - F(h_lower))`` with ``F(h) = h^(H+1)/(H+1)``; no large
    accumulated integrals are subtracted, so small scores inside large clusters keep their
    relative precision. Tied values need no special care
    (clusters that meet at one height add nothing over an empty interval).

    References
    ----------
    Smith SM, Nichols TE (2009). NeuroImage 44:83-98.
    """
    name = "tfce"
    _check_sided(sided, name)
    input_shape = np.shape(stat)
    stat3, mask3 = _as_grid(stat, mask, name)
    inside = mask3.ravel()
    values = stat3.ravel()[inside]
    if np.isinf(values).any():
        raise ArgumentError(
            f"{name}: the statistic map has infinite values inside the mask; TFCE needs "
            "finite values (replace them, or leave those voxels out of the mask)."
        )
    scratch = TfceWorkspace(
        mask3, connectivity=connectivity, E=E, H=H, voxel_volume_mm3=voxel_volume_mm3
    )
    scores = np.zeros(values.size)
    scratch.scores(values, sided, scores)
    out = np.zeros(inside.size)
    out[inside] = scores
    return out.reshape(input_shape)


class TfceWorkspace:
    """TFCE of maps on one mask, with its buffers kept from one map to the next.

    Permutations score thousands of maps on the same mask: the sorting and union-find
    buffers, the neighbour offsets and the extent weights are made once here. The
    buffers are written by every call, so a workspace serves one thread at a time.

    Parameters
    ----------
    mask
        3-D boolean mask; maps are given as the vector of its voxels (C order).
    connectivity, E, H, voxel_volume_mm3
        As for :func:`tfce`.

    Raises
    ------
    ArgumentError
        For an unknown connectivity, negative weights or a non-positive voxel volume.
    """

    def __init__(
        self,
        mask: np.ndarray,
        *,
        connectivity: int = DEFAULT_CONNECTIVITY,
        E: float = DEFAULT_TFCE_E,
        H: float = DEFAULT_TFCE_H,
        voxel_volume_mm3: float = 1.0,
    ) -> None:
        name = "tfce"
        if not (np.isfinite(E) and E >= 0.0 and np.isfinite(H) and H >= 0.0):
            raise ArgumentError(f"{name}: the weights E and H must be >= 0; got E = {E}, H = {H}.")
        if not (np.isfinite(voxel_volume_mm3) and voxel_volume_mm3 > 0):
            raise ArgumentError(f"{name}: voxel volume must be > 0 mm³; got {voxel_volume_mm3}.")
        grid = PaddedGrid.of(mask, connectivity)
        self.padded_of, self.voxel_at = grid.padded_of, grid.voxel_at
        self.flat_offsets = grid.flat_offsets
        n = self.padded_of.size
        self.h1 = float(H) + 1.0
        self.extent_weights = (np.arange(n + 1) * float(voxel_volume_mm3)) ** float(E)
        self._buffers = (
            np.empty(n, dtype=np.int32),  # order: padded positions
            np.empty(n, dtype=np.uint64),  # sort keys
            np.empty(n, dtype=np.int32),  # spare order
            np.empty(n, dtype=np.uint64),  # spare keys
            np.empty((1 << _tfce_kernel.RADIX_BITS) + 1, dtype=np.int64),  # counts
            grid.empty_positions(),  # position on the padded grid
            np.empty(n, dtype=np.int32),  # parent
            np.empty(n, dtype=np.int32),  # size
            np.empty(n, dtype=np.int32),  # active
            np.empty(n, dtype=np.int32),  # link
            np.empty(n),  # own
            np.empty(n),  # level
            np.empty(n),  # best chain sums (stopping early)
            np.empty(n),  # tail integrals (stopping early)
            np.empty(n, dtype=np.int32),  # roots (stopping early)
        )
        self._no_output = np.empty(0)

    def scores(self, values: np.ndarray, sided: str, out: np.ndarray | None = None) -> float:
        """Largest |TFCE| of one map; its TFCE into ``out`` when given.

        Parameters
        ----------
        values
            The statistic at the mask's voxels (float64, finite or NaN; NaN neither
            scores nor connects).
        sided
            As for :func:`tfce`.
        out
            Optional float64 vector of the same size, set to the signed TFCE where a
            score applies (other entries are left alone).
        """
        values = np.ascontiguousarray(values, dtype=np.float64)
        target = self._no_output if out is None else out
        signs = {"positive": (1.0,), "negative": (-1.0,)}.get(sided)
        if signs is None:
            # Both: the side with the higher peak first; for the maximum alone, the other
            # side's sweep may stop once it cannot beat the first (an exact maximum).
            first = _tfce_kernel.larger_side(values)
            signs = (first, -first)
        largest = 0.0
        for sign in signs:
            score = _tfce_kernel.tfce_signed(
                values,
                self.padded_of,
                self.voxel_at,
                self.flat_offsets,
                self.extent_weights,
                self.h1,
                sign,
                target,
                largest,
                *self._buffers,
            )
            largest = max(largest, score)
        return largest
