"""Clusters of supra-threshold voxels in a statistic map.

A cluster is a set of in-mask voxels whose statistic exceeds a cluster-forming threshold
and that touch one another through the chosen neighbourhood (faces, faces and edges, or
faces, edges and corners). Positive and negative clusters are formed separately: a voxel
above ``+threshold`` never joins one below ``-threshold``.

For each cluster this module reports its extent (voxels and mm³), its mass (the summed
excess of ``|stat|`` over the threshold), its sign and its peak. The permutation engine
needs only the largest extent and mass of each map: :class:`ClusterWorkspace` (behind
:func:`max_cluster_extent_and_mass`) finds them from the supra-threshold voxels alone.

References
----------
Friston KJ, Worsley KJ, Frackowiak RSJ, Mazziotta JC, Evans AC (1994). Assessing the
significance of focal activations using their spatial extent. Hum Brain Mapp 1:210-220.

Bullmore ET, Suckling J, Overmeyer S, Rabe-Hesketh S, Taylor E, Brammer MJ (1999).
Global, voxel, and cluster tests, by theory and permutation, for a difference between two
groups of structural MR images of the brain. IEEE Trans Med Imaging 18:32-42 (cluster mass).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from grouplevel.errors import ArgumentError
from grouplevel.inference import _tfce_kernel
from grouplevel.inference.significance import check_sided

#: Neighbourhoods by the number of neighbours of a voxel: faces; + edges; + corners.
CONNECTIVITIES = (6, 18, 26)

#: Default neighbourhood: faces, edges and corners (common practice for cluster inference).
DEFAULT_CONNECTIVITY = 26

#: Which tails of the statistic form clusters.


def neighbourhood(connectivity: int) -> np.ndarray:
    """The 3x3x3 neighbourhood of a voxel for a given connectivity.

    Parameters
    ----------
    connectivity
        6 (voxels sharing a face), 18 (a face or an edge) or 26 (a face, an edge or a
        corner).

    Returns
    -------
    numpy.ndarray
        Boolean ``(3, 3, 3)`` array, True at the centre and at its neighbours.

    Raises
    ------
    ArgumentError
        For any other connectivity.
    """
    if connectivity not in CONNECTIVITIES:
        raise ArgumentError(
            f"connectivity = {connectivity!r} is not supported; use 6 (faces), "
            "18 (faces and edges) or 26 (faces, edges and corners)."
        )
    grid = np.indices((3, 3, 3)) - 1
    # Number of axes along which a neighbour is displaced: 1 face, 2 edge, 3 corner.
    displaced = np.abs(grid).sum(axis=0)
    max_displaced = {6: 1, 18: 2, 26: 3}[connectivity]
    return displaced <= max_displaced


def neighbour_offsets(connectivity: int) -> np.ndarray:
    """``(K, 3)`` int64 offsets of the neighbours (the centre left out)."""
    structure = neighbourhood(connectivity)
    structure[1, 1, 1] = False
    return (np.argwhere(structure) - 1).astype(np.int64)


@dataclass(frozen=True)
class Clusters:
    """Clusters of one statistic map at one threshold.

    Arrays indexed by cluster hold cluster ``k`` (label ``k + 1``) at position ``k``.
    Labels are ordered by extent, largest first; clusters of equal extent are ordered by
    the position (C order) of their first voxel.

    Attributes
    ----------
    labels
        int32 grid of the map's shape: 1 = largest cluster, 0 = no cluster.
    extent_voxels
        ``(n,)`` number of voxels per cluster.
    extent_mm3
        ``(n,)`` volume per cluster.
    mass
        ``(n,)`` sum over the cluster of ``|stat| - threshold``.
    sign
        ``(n,)`` +1 for clusters above ``+threshold``, -1 below ``-threshold``.
    peak_index
        ``(n, 3)`` voxel index of each cluster's largest ``|stat|`` (first in C order
        on ties).
    peak_value
        ``(n,)`` the statistic (signed) at the peak.
    threshold
        The cluster-forming threshold.
    connectivity
        6, 18 or 26.
    """

    labels: np.ndarray
    extent_voxels: np.ndarray
    extent_mm3: np.ndarray
    mass: np.ndarray
    sign: np.ndarray
    peak_index: np.ndarray
    peak_value: np.ndarray
    threshold: float
    connectivity: int

    @property
    def n_clusters(self) -> int:
        """Number of clusters."""
        return int(self.extent_voxels.size)


def _as_grid(stat: np.ndarray, mask: np.ndarray | None, name: str) -> tuple[np.ndarray, np.ndarray]:
    """Validate ``stat`` / ``mask`` and return them as 3-D float64 / bool arrays.

    A 2-D map is treated as a single slice ``(X, Y, 1)``.
    """
    stat = np.asarray(stat, dtype=np.float64)
    if stat.ndim not in (2, 3):
        raise ArgumentError(
            f"{name}: the statistic map must be a 2-D or 3-D grid; got shape {stat.shape}."
        )
    if mask is None:
        mask = np.ones(stat.shape, dtype=bool)
    mask = np.asarray(mask)
    if mask.shape != stat.shape:
        raise ArgumentError(
            f"{name}: the mask has shape {mask.shape} but the statistic map has shape "
            f"{stat.shape}; both must lie on the same grid."
        )
    mask = mask.astype(bool)
    if stat.ndim == 2:
        stat = stat[:, :, np.newaxis]
        mask = mask[:, :, np.newaxis]
    return np.ascontiguousarray(stat), np.ascontiguousarray(mask)


def _check_sided(sided: str, name: str) -> None:
    check_sided(sided, f"{name}: sided")


def _check_threshold(threshold: float, name: str) -> float:
    threshold = float(threshold)
    if not np.isfinite(threshold) or threshold < 0.0:
        raise ArgumentError(
            f"{name}: the cluster-forming threshold must be a finite number >= 0 (a "
            f"value of |stat|); got {threshold}."
        )
    return threshold


def _signs(stat: np.ndarray, mask: np.ndarray, threshold: float, sided: str) -> np.ndarray:
    """int8 grid: +1 above ``threshold``, -1 below ``-threshold`` (per ``sided``)."""
    signs = np.zeros(stat.shape, dtype=np.int8)
    if sided in ("two", "positive"):
        signs[mask & (stat > threshold)] = 1
    if sided in ("two", "negative"):
        signs[mask & (stat < -threshold)] = -1
    return signs


def find_clusters(
    stat: np.ndarray,
    mask: np.ndarray | None,
    threshold: float,
    *,
    connectivity: int = DEFAULT_CONNECTIVITY,
    voxel_volume_mm3: float = 1.0,
    sided: str = "two",
) -> Clusters:
    """Form clusters of supra-threshold voxels and describe each one.

    Parameters
    ----------
    stat
        2-D or 3-D statistic map (a 2-D map is one slice). NaN never exceeds a threshold.
    mask
        Boolean map of the same shape; voxels outside never join a cluster. ``None``
        means the whole grid.
    threshold
        Cluster-forming threshold on ``|stat|`` (>= 0).
    connectivity
        6, 18 or 26 (see :func:`neighbourhood`).
    voxel_volume_mm3
        Volume of one voxel, for ``extent_mm3``.
    sided
        ``"positive"``: clusters of ``stat > threshold``; ``"negative"``: of
        ``stat < -threshold``; ``"two"``: both, labelled separately.

    Returns
    -------
    Clusters
        Labels (largest cluster = 1) and per-cluster extent, mass, sign and peak. For a
        2-D input the labels are 2-D and ``peak_index`` has a third column of zeros.

    References
    ----------
    Friston KJ et al. (1994). Hum Brain Mapp 1:210-220 (cluster extent).

    Bullmore ET et al. (1999). IEEE Trans Med Imaging 18:32-42 (cluster mass).
    """
    name = "find_clusters"
    _check_sided(sided, name)
    threshold = _check_threshold(threshold, name)
    offsets = neighbour_offsets(connectivity)
    if not (np.isfinite(voxel_volume_mm3) and voxel_volume_mm3 > 0):
        raise ArgumentError(f"{name}: voxel volume must be > 0 mm³; got {voxel_volume_mm3}.")
    input_shape = np.shape(stat)
    stat3, mask3 = _as_grid(stat, mask, name)
    signs = _signs(stat3, mask3, threshold, sided)
    shape = np.asarray(stat3.shape, dtype=np.int64)
    components = _tfce_kernel.label_components(signs.ravel(), shape, offsets)

    inside = np.flatnonzero(components >= 0)
    comp = components[inside]
    n = int(comp.max()) + 1 if comp.size else 0
    extent = np.bincount(comp, minlength=n).astype(np.int64)
    magnitude = np.abs(stat3.ravel()[inside])
    mass = np.bincount(comp, weights=magnitude - threshold, minlength=n)
    # Components are numbered by their first voxel in C order, so a stable sort by extent
    # (descending) breaks ties by position.
    rank = np.argsort(-extent, kind="stable")
    new_label = np.empty(n, dtype=np.int64)
    new_label[rank] = np.arange(n)
    # Peak: largest |stat|, first in C order on ties (inside is already in C order).
    by_peak = np.lexsort((inside, -magnitude, comp))
    first = np.ones(by_peak.size, dtype=bool)
    first[1:] = comp[by_peak[1:]] != comp[by_peak[:-1]]
    peak_flat = inside[by_peak[first]]  # one per component, in component order

    labels = np.zeros(stat3.size, dtype=np.int32)
    labels[inside] = (new_label[comp] + 1).astype(np.int32)
    peak_flat = peak_flat[rank]
    peak_index = np.column_stack(np.unravel_index(peak_flat, stat3.shape)).astype(np.int64)
    peak_index = peak_index.reshape(n, 3)
    extent = extent[rank]
    return Clusters(
        labels=labels.reshape(input_shape),
        extent_voxels=extent,
        extent_mm3=extent * float(voxel_volume_mm3),
        mass=mass[rank],
        sign=signs.ravel()[peak_flat].astype(np.int64),
        peak_index=peak_index,
        peak_value=stat3.ravel()[peak_flat],
        threshold=threshold,
        connectivity=int(connectivity),
    )


def max_cluster_extent_and_mass(
    stat: np.ndarray,
    mask: np.ndarray | None,
    threshold: float,
    *,
    connectivity: int = DEFAULT_CONNECTIVITY,
    sided: str = "two",
) -> tuple[int, float]:
    """Largest cluster extent (voxels) and largest cluster mass of one map.

    The fast path for permutations: the same clusters as :func:`find_clusters`, without
    sorting, peaks or labels. The two maxima may come from different clusters.

    Parameters
    ----------
    stat, mask, threshold, connectivity, sided
        As for :func:`find_clusters`.

    Returns
    -------
    tuple of (int, float)
        Largest extent in voxels and largest mass; ``(0, 0.0)`` when there is no cluster.

    References
    ----------
    Bullmore ET et al. (1999). IEEE Trans Med Imaging 18:32-42.
    """
    name = "max_cluster_extent_and_mass"
    _check_sided(sided, name)
    threshold = _check_threshold(threshold, name)
    stat3, mask3 = _as_grid(stat, mask, name)
    scratch = ClusterWorkspace(mask3, connectivity=connectivity)
    return scratch.maxima(stat3[mask3], threshold, sided)


@dataclass(frozen=True)
class PaddedGrid:
    """The in-mask voxels of a 3-D mask addressed on the grid padded by one voxel on
    every side, where a neighbour is one fixed flat offset away and never outside.

    Attributes
    ----------
    padded_of
        int32 flat padded index of each in-mask voxel (C order).
    voxel_at
        int32 map from a padded index back to the voxel (-1 outside the mask).
    flat_offsets
        int64 flat offsets of the neighbours on the padded grid.
    """

    padded_of: np.ndarray
    voxel_at: np.ndarray
    flat_offsets: np.ndarray

    @classmethod
    def of(cls, mask: np.ndarray, connectivity: int) -> PaddedGrid:
        """The padded addressing of ``mask`` (3-D) for one connectivity."""
        offsets = neighbour_offsets(connectivity)
        mask = np.asarray(mask, dtype=bool)
        if mask.ndim != 3:
            raise ArgumentError(f"the mask must be a 3-D grid; got shape {mask.shape}.")
        padded_shape = np.asarray(mask.shape, dtype=np.int64) + 2
        inside = np.zeros(padded_shape, dtype=bool)
        inside[1:-1, 1:-1, 1:-1] = mask
        padded_of = np.flatnonzero(inside.ravel()).astype(np.int32)
        voxel_at = np.full(inside.size, -1, dtype=np.int32)
        voxel_at[padded_of] = np.arange(padded_of.size, dtype=np.int32)
        strides = np.array([padded_shape[1] * padded_shape[2], padded_shape[2], 1])
        return cls(padded_of, voxel_at, (offsets @ strides).astype(np.int64))

    def empty_positions(self) -> np.ndarray:
        """A workspace over the padded grid, all -1 (as the union-find kernels want it)."""
        return np.full(self.voxel_at.size, -1, dtype=np.int32)


class ClusterWorkspace:
    """Largest cluster extent and mass of maps on one mask, with buffers kept from one
    map to the next (one thread at a time), for permutations.

    Parameters
    ----------
    mask
        3-D boolean mask; maps are given as the vector of its voxels (C order).
    connectivity
        6, 18 or 26.
    """

    def __init__(self, mask: np.ndarray, *, connectivity: int = DEFAULT_CONNECTIVITY) -> None:
        self.grid = PaddedGrid.of(mask, connectivity)
        n = self.grid.padded_of.size
        self._buffers = (
            self.grid.empty_positions(),
            np.empty(n, dtype=np.int32),  # members
            np.empty(n, dtype=np.int32),  # parent
            np.empty(n, dtype=np.int32),  # size
            np.empty(n),  # mass
        )

    def maxima(self, values: np.ndarray, threshold: float, sided: str) -> tuple[int, float]:
        """Largest extent (voxels) and largest mass of the clusters of one map.

        ``values`` is the statistic at the mask's voxels; ``threshold`` and ``sided`` as
        for :func:`find_clusters` (already checked by the caller). ``(0, 0.0)`` when
        there is no cluster.
        """
        extent, mass = _tfce_kernel.max_extent_and_mass(
            np.ascontiguousarray(values, dtype=np.float64),
            float(threshold),
            sided in ("two", "positive"),
            sided in ("two", "negative"),
            self.grid.padded_of,
            self.grid.flat_offsets,
            *self._buffers,
        )
        return int(extent), float(mass)
