"""Compiled union-find kernels behind :mod:`.tfce` and :mod:`.clusters`.

These loops visit single voxels and cannot be vectorised, so they are compiled with numba.
They work on C-ordered flat indices into a 3-D grid of shape ``(nx, ny, nz)`` and on a
list of neighbour offsets ``(K, 3)``; the public modules validate inputs and build those.

The pure-Python reference versions that check these kernels live in the tests.
"""

from __future__ import annotations

import numpy as np

from grouplevel.compiled import lazy_njit


@lazy_njit(cache=True)
def _find(parent: np.ndarray, node: int) -> int:
    """Root of ``node`` in a union-find forest, with full path compression."""
    root = node
    while parent[root] != root:
        root = parent[root]
    while parent[node] != root:
        nxt = parent[node]
        parent[node] = root
        node = nxt
    return root


@lazy_njit(cache=True)
def tfce_sweep(
    order: np.ndarray,
    height_integrals: np.ndarray,
    shape: np.ndarray,
    offsets: np.ndarray,
    extent_weights: np.ndarray,
    out: np.ndarray,
    sign: float,
) -> None:
    """Exact TFCE of one sign, written into ``out`` (flat grid) at the voxels of ``order``.

    Parameters
    ----------
    order
        Flat grid indices of the voxels to enter, sorted so that ``heights`` descends.
    height_integrals
        ``F(h) = h^(H+1) / (H+1)`` of their (positive) statistic values ``h``, descending.
    shape
        ``(nx, ny, nz)`` of the grid.
    offsets
        ``(K, 3)`` neighbour offsets (the full neighbourhood, without the centre).
    extent_weights
        ``(len(order) + 1,)``: entry ``k`` is ``(k * voxel volume)^E``, the weight of a
        component of ``k`` voxels (extent in mm³).
    out
        Flat float64 grid; ``out[order[i]]`` is set to ``sign * TFCE``.
    sign
        +1.0 or -1.0.

    Notes
    -----
    Voxels enter one at a time from the highest value down (entry ``i`` is voxel
    ``order[i]``). A union-find forest (path compression, union by size) tells which
    component each entered voxel belongs to. Each component also has one *active* entry,
    which carries the component's integral since it last changed: ``own[a]`` is brought up
    to date lazily, storing in ``level[a]`` the value of F at the height down to which it
    is complete. Between two changes the extent ``e`` is constant, so bringing it from
    height ``l`` down to ``h`` adds ``e^E (F(l) - F(h))``.

    When entry ``i`` at height ``h`` touches an earlier component, that component's
    active entry is brought down to ``h`` and hung below ``i`` (``link``), and ``i``
    becomes the active entry of the merged component: from ``h`` downwards the integral is
    shared, and ``own[i]`` is still 0 at ``h``, so nothing already accumulated for one
    side leaks to the other. Merges at one height add nothing (the interval is empty), so
    ties and many-way merges need no special care. At the end every active entry is
    brought down to 0 and each voxel's TFCE is the sum of ``own`` along its chain of
    links, computed in one backward pass because every link points to a later entry.
    All terms are non-negative, so the result has no cancellation error.
    """
    n = order.size
    nx, ny, nz = shape[0], shape[1], shape[2]
    plane = ny * nz
    # Positions live on the grid padded by one voxel on every side, so a neighbour is
    # one fixed flat offset away and never outside: no bounds checks in the inner loop.
    prow = nz + 2
    pplane = (ny + 2) * prow
    position = np.full((nx + 2) * pplane, -1, dtype=np.int64)
    n_offsets = offsets.shape[0]
    flat_offsets = np.empty(n_offsets, dtype=np.int64)
    for k in range(n_offsets):
        flat_offsets[k] = offsets[k, 0] * pplane + offsets[k, 1] * prow + offsets[k, 2]
    parent = np.empty(n, dtype=np.int64)
    size = np.empty(n, dtype=np.int64)
    active = np.empty(n, dtype=np.int64)
    link = np.full(n, -1, dtype=np.int64)
    own = np.zeros(n, dtype=np.float64)
    level = np.empty(n, dtype=np.float64)

    for i in range(n):
        v = order[i]
        f_h = height_integrals[i]
        pv = (v // plane + 1) * pplane + ((v // nz) % ny + 1) * prow + v % nz + 1
        position[pv] = i
        parent[i] = i
        size[i] = 1
        active[i] = i
        level[i] = f_h
        a = i  # root of the new voxel's component, kept current through its merges
        for k in range(n_offsets):
            j = position[pv + flat_offsets[k]]
            if j < 0:
                continue
            b = _find(parent, j)
            if a == b:
                continue
            q = active[b]
            if level[q] != f_h:
                own[q] += extent_weights[size[b]] * (level[q] - f_h)
                level[q] = f_h
            link[q] = i
            if size[a] < size[b]:
                a, b = b, a
            parent[b] = a
            size[a] += size[b]
            active[a] = i

    for r in range(n):
        if parent[r] == r:
            q = active[r]
            own[q] += extent_weights[size[r]] * level[q]
    total = own  # reused in place: entries are finished from the last one backwards
    for i in range(n - 1, -1, -1):
        if link[i] >= 0:
            total[i] += total[link[i]]
        out[order[i]] = sign * total[i]


@lazy_njit(cache=True)
def label_components(signs: np.ndarray, shape: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Connected components of the nonzero voxels of ``signs``, one sign at a time.

    Parameters
    ----------
    signs
        Flat int8 grid: +1 / -1 for supra-threshold voxels of either sign, 0 elsewhere.
        Voxels of different signs are never joined.
    shape
        ``(nx, ny, nz)``.
    offsets
        ``(K, 3)`` neighbour offsets (the full neighbourhood, without the centre).

    Returns
    -------
    numpy.ndarray
        Flat int64 grid: -1 outside the components, otherwise the component number
        0..n-1, numbered in the order of each component's first voxel in C order.
    """
    nx, ny, nz = shape[0], shape[1], shape[2]
    plane = ny * nz
    total = nx * ny * nz
    parent = np.full(total, -1, dtype=np.int64)
    for v in range(total):
        s = signs[v]
        if s == 0:
            continue
        parent[v] = v
        x = v // plane
        y = (v // nz) % ny
        z = v % nz
        for k in range(offsets.shape[0]):
            xx = x + offsets[k, 0]
            yy = y + offsets[k, 1]
            zz = z + offsets[k, 2]
            if xx < 0 or xx >= nx or yy < 0 or yy >= ny or zz < 0 or zz >= nz:
                continue
            u = xx * plane + yy * nz + zz
            if u >= v or signs[u] != s:
                continue  # only neighbours already visited, of the same sign
            a = v
            while parent[a] != a:
                a = parent[a]
            b = u
            while parent[b] != b:
                b = parent[b]
            if a == b:
                continue
            # Keep the earlier voxel as root, so each root is its component's first voxel.
            if a < b:
                parent[b] = a
                root = a
            else:
                parent[a] = b
                root = b
            # Shorten both paths that were just walked.
            w = v
            while parent[w] != root:
                nxt = parent[w]
                parent[w] = root
                w = nxt
            w = u
            while parent[w] != root:
                nxt = parent[w]
                parent[w] = root
                w = nxt

    labels = np.full(total, -1, dtype=np.int64)
    count = 0
    for v in range(total):
        if parent[v] < 0:
            continue
        r = v
        while parent[r] != r:
            r = parent[r]
        parent[v] = r
        if r == v:
            labels[v] = count
            count += 1
        else:
            labels[v] = labels[r]  # r < v, so it is numbered already
    return labels


@lazy_njit(cache=True)
def max_extent_and_mass(
    signs: np.ndarray, excess: np.ndarray, shape: np.ndarray, offsets: np.ndarray
) -> tuple[int, float]:
    """Largest component extent (voxels) and largest mass over the components of ``signs``.

    ``excess`` is the flat grid of ``|stat| - threshold`` (used where ``signs != 0``).
    """
    labels = label_components(signs, shape, offsets)
    n = 0
    for v in range(labels.size):
        if labels[v] + 1 > n:
            n = labels[v] + 1
    if n == 0:
        return 0, 0.0
    extent = np.zeros(n, dtype=np.int64)
    mass = np.zeros(n, dtype=np.float64)
    for v in range(labels.size):
        c = labels[v]
        if c >= 0:
            extent[c] += 1
            mass[c] += excess[v]
    return extent.max(), mass.max()
