"""Compiled union-find kernels behind :mod:`.tfce` and :mod:`.clusters`.

These loops visit single voxels and cannot be vectorised, so they are compiled with numba.
They work on C-ordered flat indices into a 3-D grid of shape ``(nx, ny, nz)`` and on a
list of neighbour offsets ``(K, 3)``; the public modules validate inputs and build those.

The pure-Python reference versions that check these kernels live in the tests.
"""

from __future__ import annotations

import numpy as np

from grouplevel.compiled import lazy_njit


@lazy_njit(cache=True, nogil=True)
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


#: Bits of the key sorted in each pass of :func:`sort_descending` (2048 buckets: the
#: counts stay in the fastest cache).
RADIX_BITS = 11

#: Radix passes over the top of the key before the insertion pass (3 × 11 bits: the sign,
#: the exponent and the first 20 bits of the mantissa).
TOP_PASSES = 3


@lazy_njit(cache=True, nogil=True)
def _radix_passes(n, order, keys, spare_order, spare_keys, counts, first_shift):
    """Stable LSD radix sort of ``(keys, order)`` by the key bits from ``first_shift`` up.

    ``RADIX_BITS`` per pass; a pass whose digit is the same for every key is skipped.
    The result is left in ``order`` and ``keys``.
    """
    n_buckets = 1 << RADIX_BITS
    digit_mask = np.uint64(n_buckets - 1)
    src_o, src_k, dst_o, dst_k = order, keys, spare_order, spare_keys
    shift = first_shift
    while shift < 64:
        sh = np.uint64(shift)
        for d in range(n_buckets + 1):
            counts[d] = 0
        for i in range(n):
            counts[((src_k[i] >> sh) & digit_mask) + 1] += 1
        if n == 0 or counts[((src_k[0] >> sh) & digit_mask) + 1] == n:
            shift += RADIX_BITS
            continue  # one digit for all keys: this pass would not move anything
        for d in range(n_buckets):
            counts[d + 1] += counts[d]
        for i in range(n):
            d = (src_k[i] >> sh) & digit_mask
            j = counts[d]
            counts[d] = j + 1
            dst_o[j] = src_o[i]
            dst_k[j] = src_k[i]
        src_o, src_k, dst_o, dst_k = dst_o, dst_k, src_o, src_k
        shift += RADIX_BITS
    if src_o is not order:
        for i in range(n):
            order[i] = src_o[i]
            keys[i] = src_k[i]


@lazy_njit(cache=True, nogil=True)
def sort_descending(order, keys, n, spare_order, spare_keys, counts):
    """Sort ``(keys[:n], order[:n])`` by key, stably: the heights then descend.

    Each key is the complemented bit pattern of a positive float64 height (a positive
    float64 sorts like its bits read as an unsigned integer, so the complement sorts
    descending heights first); ``order`` carries what each key belongs to.
    ``spare_order`` and ``spare_keys`` are workspaces of at least ``n`` entries,
    ``counts`` of ``2**RADIX_BITS + 1``.

    Least-significant-digit radix sort, ``RADIX_BITS`` per pass, over the top
    ``TOP_PASSES`` digits only; keys equal in those bits (heights equal to about six
    significant digits) are then put in order by one insertion pass. Both are stable, so
    the result is the stable sort by the whole key. If that pass has to move more than
    ``n`` entries (heights crowded in a narrow band), the remaining low digits are
    radix-sorted as well and the top digits again: the same result, in at most nine
    passes. O(n) per pass.

    References
    ----------
    Knuth DE (1998). The Art of Computer Programming, Vol. 3: Sorting and Searching,
    2nd ed., sections 5.2.1 (insertion sort) and 5.2.5 (radix sorting). Addison-Wesley.
    """
    top = 64 - TOP_PASSES * RADIX_BITS
    _radix_passes(n, order, keys, spare_order, spare_keys, counts, top)
    moves = 0
    for i in range(1, n):
        k = keys[i]
        if k >= keys[i - 1]:
            continue
        o = order[i]
        j = i - 1
        while j >= 0 and keys[j] > k:
            keys[j + 1] = keys[j]
            order[j + 1] = order[j]
            j -= 1
        moves += i - 1 - j
        keys[j + 1] = k
        order[j + 1] = o
        if moves > n:
            # Too many near-ties: sort every digit. Equal keys have kept their input
            # order through the stable steps so far, so the result is the same.
            _radix_passes(n, order, keys, spare_order, spare_keys, counts, 0)
            return


@lazy_njit(cache=True, nogil=True)
def _height_integral(h, h1):
    """``F(h) = h^(H+1) / (H+1)`` with ``h1 = H + 1`` (h·h·h / 3 for the usual H = 2)."""
    if h1 == 3.0:
        return h * h * h / 3.0
    return h**h1 / h1


@lazy_njit(cache=True, nogil=True)
def _sweep(
    order, keys, n, h1, flat_offsets, extent_weights,
    position, parent, size, active, link, own, level,
    beat, best, tail, roots,
):  # fmt: skip
    """Exact TFCE of the ``n`` voxels of ``order``; entry i's score is left in ``own[i]``.

    Returns the number of entries swept: ``n``, or fewer when ``beat > 0`` and the sweep
    stopped early because no score can exceed ``beat`` (see Notes; ``own`` then holds
    nothing of use).

    Parameters
    ----------
    order
        The voxels to enter, as flat indices into the grid padded by one voxel on every
        side, sorted so that their heights descend.
    keys
        The complemented bit pattern of each entry's height (see
        :func:`sort_descending`): the heights are read from here, in entry order.
    h1
        ``H + 1``: heights enter through ``F(h) = h^(H+1) / (H+1)``.
    flat_offsets
        The neighbourhood (without the centre) as flat offsets on the padded grid.
    extent_weights
        Entry ``k`` is ``(k * voxel volume)^E``, the weight of a component of ``k``
        voxels (extent in mm³); at least ``n + 1`` entries.
    position
        Workspace over the padded grid: -1 everywhere on entry, and left so on return.
    parent, size, active, link, own, level
        Workspaces of at least ``n`` entries (nothing needs to be set on entry).
    beat
        When > 0: stop as soon as it is certain that no score exceeds ``beat``.
        0 (or less): sweep everything.
    best, tail, roots
        Workspaces of at least ``n`` entries, used only when ``beat > 0``.

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

    **Stopping early** (used for the maximum of a two-sided map: once one sign's maximum
    is known, the other sign matters only if it can exceed it). Every score is a
    partial integral down to the current height ``h_i`` plus the rest below it, and
    below ``h_i`` no extent exceeds ``N(h)``, the number of voxels at or above ``h``. So
    with ``tail[i] = ∫_0^{h_i} (N(h) · voxel volume)^E h^H dh`` (a suffix sum over the
    sorted heights) and ``best[a]`` the largest sum of ``own`` along a chain of links up
    to the active entry ``a`` (kept through the merges), no score can exceed
    ``max over components (best[a] + own[a] + e^E (level[a] - F(h_i))) + tail[i]``.
    This bound is checked about 64 times over the sweep, once ``tail`` alone is below
    ``beat``; the components are scanned from a shrinking list of roots.

    Everything read per entry comes in entry order (its padded position and its key);
    only the union-find arrays and the position grid are read out of order. The
    entered neighbours are first gathered without branching, so the unpredictable
    "entered or not" test does not stall the loop.
    """
    n_offsets = flat_offsets.size
    entered = np.empty(n_offsets, dtype=np.int64)
    bits = np.empty(1, dtype=np.uint64)
    height = bits.view(np.float64)
    bounded = beat > 0.0
    if bounded:
        # tail[j] = Σ_{k >= j} w(k + 1) (F(h_k) - F(h_{k+1})), with F(h_n) = 0
        total = 0.0
        f_next = 0.0
        for j in range(n - 1, -1, -1):
            bits[0] = ~keys[j]
            f_j = _height_integral(height[0], h1)
            total += extent_weights[j + 1] * (f_j - f_next)
            tail[j] = total
            f_next = f_j
    check_every = max(n // 64, 64)
    next_check = check_every
    n_roots = 0
    listed = 0  # entries before this one have been put on the roots list
    for i in range(n):
        pv = order[i]
        bits[0] = ~keys[i]
        f_h = _height_integral(height[0], h1)
        position[pv] = i
        parent[i] = i
        size[i] = 1
        active[i] = i
        link[i] = -1
        own[i] = 0.0
        level[i] = f_h
        count = 0
        for k in range(n_offsets):
            j = position[pv + flat_offsets[k]]
            entered[count] = j
            count += j >= 0
        a = i  # root of the new voxel's component, kept current through its merges
        chain = 0.0
        for t in range(count):
            b = _find(parent, entered[t])
            if a == b:
                continue
            q = active[b]
            if level[q] != f_h:
                own[q] += extent_weights[size[b]] * (level[q] - f_h)
                level[q] = f_h
            if bounded and best[q] + own[q] > chain:
                chain = best[q] + own[q]
            link[q] = i
            if size[a] < size[b]:
                a, b = b, a
            parent[b] = a
            size[a] += size[b]
            active[a] = i
        if not bounded:
            continue
        best[i] = chain
        if i + 1 < next_check or tail[i] >= beat:
            continue
        next_check = i + 1 + check_every
        # the roots: survivors of the last scan, then the entries since
        kept = 0
        partial = 0.0
        for t in range(n_roots + i + 1 - listed):
            r = roots[t] if t < n_roots else listed + t - n_roots
            if parent[r] != r:
                continue
            roots[kept] = r
            kept += 1
            q = active[r]
            score = best[q] + own[q] + extent_weights[size[r]] * (level[q] - f_h)
            if score > partial:
                partial = score
        n_roots = kept
        listed = i + 1
        if (partial + tail[i]) * (1.0 + 1e-9) < beat:
            for j in range(i + 1):  # leave the workspace as it was found
                position[order[j]] = -1
            return i + 1

    for r in range(n):
        if parent[r] == r:
            q = active[r]
            own[q] += extent_weights[size[r]] * level[q]
    # totals, from the last entry backwards: every link points to a later entry
    for i in range(n - 1, -1, -1):
        if link[i] >= 0:
            own[i] += own[link[i]]
    for i in range(n):  # leave the workspace as it was found
        position[order[i]] = -1
    return n


@lazy_njit(cache=True, nogil=True)
def _signed_keys(stat, sign, padded_of, order, keys):
    """Entries where ``sign * stat > 0`` (NaN never counts): their padded positions into
    ``order`` and their sort keys (complemented height bits) into ``keys``; returns how
    many."""
    bits = np.empty(1, dtype=np.uint64)
    height = bits.view(np.float64)
    n = 0
    for v in range(stat.size):
        # written at slot n every time and kept only when h > 0: no branch to mispredict
        # on a map whose signs alternate at random (the slot after the last is spare:
        # ``order`` and ``keys`` have ``stat.size`` entries and n < stat.size until the
        # last voxel)
        h = sign * stat[v]
        height[0] = h
        slot = min(n, stat.size - 1)
        order[slot] = padded_of[v]
        keys[slot] = ~bits[0]
        n += h > 0.0
    return n


@lazy_njit(cache=True, nogil=True)
def tfce_signed(
    stat, padded_of, voxel_at, flat_offsets, extent_weights, h1, sign, out, beat,
    ws_order, ws_keys, ws_spare_order, ws_spare_keys, ws_counts,
    position, parent, size, active, link, own, level, best, tail, roots,
):  # fmt: skip
    """TFCE of ``sign * stat`` (voxels where it is > 0) and the largest score.

    ``stat`` holds the statistic of the voxels whose flat indices on the grid padded by
    one voxel are ``padded_of``; ``voxel_at`` maps a padded index back to the voxel.
    When ``out`` has the size of ``stat``, ``out[v]`` is set to ``sign * TFCE`` at those
    voxels (others are left alone); pass an empty ``out`` for the maximum only, and
    then ``beat > 0`` lets the sweep stop once no score can exceed ``beat``: the result
    is then -1 (meaning "not more than ``beat``"). The ``ws_*`` and the union-find
    arrays are workspaces of ``stat``'s size (``ws_counts``: ``2**RADIX_BITS + 1``;
    ``position``: the padded grid, all -1).
    """
    write = out.size == stat.size
    n = _signed_keys(stat, sign, padded_of, ws_order, ws_keys)
    sort_descending(ws_order, ws_keys, n, ws_spare_order, ws_spare_keys, ws_counts)
    swept = _sweep(
        ws_order, ws_keys, n, h1, flat_offsets, extent_weights,
        position, parent, size, active, link, own, level,
        0.0 if write else beat, best, tail, roots,
    )  # fmt: skip
    if swept < n:
        return -1.0
    largest = 0.0
    for i in range(n):
        if own[i] > largest:
            largest = own[i]
    if write:
        for i in range(n):
            out[voxel_at[ws_order[i]]] = sign * own[i]
    return largest


@lazy_njit(cache=True, nogil=True)
def larger_side(stat):
    """+1.0 when the largest positive value of ``stat`` is at least the largest
    magnitude of its negative values, else -1.0 (NaN ignored)."""
    top = 0.0
    bottom = 0.0
    for v in range(stat.size):  # selections, not branches (random signs mispredict)
        x = stat[v]
        top = x if x > top else top
        bottom = -x if -x > bottom else bottom
    return 1.0 if top >= bottom else -1.0


@lazy_njit(cache=True, nogil=True)
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


@lazy_njit(cache=True, nogil=True)
def max_extent_and_mass(
    stat, threshold, positive, negative, padded_of, flat_offsets,
    position, members, parent, size, mass,
):  # fmt: skip
    """Largest cluster extent (voxels) and largest mass of one map, from its
    supra-threshold voxels only.

    Parameters
    ----------
    stat
        The statistic at the mask's voxels (C order; NaN is never supra-threshold).
    threshold
        Cluster-forming threshold (>= 0): voxels with ``stat > threshold`` (when
        ``positive``) or ``stat < -threshold`` (when ``negative``) form clusters; voxels
        of different signs are never joined.
    padded_of, flat_offsets
        Each voxel's flat index on the grid padded by one voxel on every side, and the
        neighbourhood as flat offsets there.
    position
        Workspace over the padded grid: -1 everywhere on entry, and left so on return.
    members, parent, size, mass
        Workspaces of at least as many entries as ``stat``.

    Notes
    -----
    The supra-threshold voxels are gathered in C order and joined with their
    supra-threshold neighbours of the same sign in a union-find forest (path compression,
    union by size). Each cluster's mass is then summed over its voxels in C order, the
    order :func:`label_components` gives, so a mass here equals the one
    ``find_clusters`` reports bit for bit. Work grows with the number of
    supra-threshold voxels, not with the grid.
    """
    n = 0
    for v in range(stat.size):
        x = stat[v]
        if (positive and x > threshold) or (negative and x < -threshold):
            members[n] = v
            n += 1
    n_offsets = flat_offsets.size
    for i in range(n):
        pv = padded_of[members[i]]
        position[pv] = i
        parent[i] = i
        size[i] = 1
    for i in range(n):
        v = members[i]
        pv = padded_of[v]
        up = stat[v] > 0.0
        a = _find(parent, i)
        for k in range(n_offsets):
            j = position[pv + flat_offsets[k]]
            if j < 0 or (stat[members[j]] > 0.0) != up:
                continue
            b = _find(parent, j)
            if a == b:
                continue
            if size[a] < size[b]:
                a, b = b, a
            parent[b] = a
            size[a] += size[b]
    largest_extent = 0
    for i in range(n):
        mass[i] = 0.0
        if parent[i] == i and size[i] > largest_extent:
            largest_extent = size[i]
    for i in range(n):  # C order, as label_components numbers them
        v = members[i]
        mass[_find(parent, i)] += abs(stat[v]) - threshold
    largest_mass = 0.0
    for i in range(n):
        if parent[i] == i and mass[i] > largest_mass:
            largest_mass = mass[i]
        position[padded_of[members[i]]] = -1
    return largest_extent, largest_mass
