"""Exact TFCE against references outside the compiled kernel.

Sources:
- the definition TFCE(v) = ∫_0^{h_v} e(h)^E h^H dh of Smith SM, Nichols TE (2009),
  NeuroImage 44:83-98 (analytic cases and the threshold-step reference below);
- scipy.ndimage.label for the clusters at each threshold of the slow reference;
- nilearn's TFCE used by its permutation routine
  (nilearn.mass_univariate._utils.calculate_tfce).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from grouplevel.errors import UserError
from grouplevel.inference import tfce
from grouplevel.inference.clusters import neighbour_offsets

# --------------------------------------------------------------------------------------
# Pure-Python reference of the same one-pass union-find algorithm (no numba).
# --------------------------------------------------------------------------------------


def _python_sweep(heights: dict, neighbours, E: float, H: float, vv: float) -> dict:
    """Exact TFCE of one sign; ``heights`` maps voxel -> value > 0.

    Voxels enter from the highest down. ``component`` (union-find without path
    compression) gives each entered voxel's component; each component has an active voxel
    whose integral ``own`` is brought down lazily from ``level``. A voxel that touches a
    component hangs that component's active voxel below itself (``link``) and becomes the
    merged component's active voxel. TFCE = sum of ``own`` along the chain of links.
    """
    order = sorted(heights, key=lambda v: -heights[v])
    component, size, active, own, level, link = {}, {}, {}, {}, {}, {}

    def F(h):
        return h ** (H + 1.0) / (H + 1.0)

    def find(v):
        while component[v] != v:
            v = component[v]
        return v

    def bring_down(root, h):
        a = active[root]
        own[a] += (vv * size[root]) ** E * (F(level[a]) - F(h))
        level[a] = h

    for v in order:
        h = heights[v]
        component[v], size[v], active[v], own[v], level[v], link[v] = v, 1, v, 0.0, h, None
        for u in neighbours(v):
            if u not in component:
                continue
            a, b = find(v), find(u)
            if a == b:
                continue
            bring_down(b, h)
            link[active[b]] = v
            if size[a] < size[b]:
                a, b = b, a
            component[b] = a
            size[a] += size[b]
            active[a] = v
    for root in [v for v in component if component[v] == v]:
        bring_down(root, 0.0)
    result = {}
    for v in reversed(order):  # every link points to a voxel that entered later
        result[v] = own[v] + (result[link[v]] if link[v] is not None else 0.0)
    return result


def python_tfce(stat, mask, connectivity, E, H, vv):
    offsets = [tuple(o) for o in neighbour_offsets(connectivity)]
    shape = stat.shape

    def neighbours(v):
        for d in offsets:
            u = (v[0] + d[0], v[1] + d[1], v[2] + d[2])
            if all(0 <= u[k] < shape[k] for k in range(3)):
                yield u

    out = np.zeros(shape)
    for sign in (1.0, -1.0):
        heights = {
            tuple(int(c) for c in idx): float(sign * stat[tuple(idx)])
            for idx in np.argwhere(mask & (sign * stat > 0))
        }
        for v, value in _python_sweep(heights, neighbours, E, H, vv).items():
            out[v] = sign * value
    return out


# --------------------------------------------------------------------------------------
# Slow reference: threshold steps with scipy.ndimage.label.
# --------------------------------------------------------------------------------------


def structure_for(connectivity):
    return ndimage.generate_binary_structure(3, {6: 1, 18: 2, 26: 3}[connectivity])


def extent_above_zero(stat, mask, connectivity, vv):
    """e(0+): volume of each voxel's cluster among the in-mask voxels with stat > 0."""
    labels, _ = ndimage.label(mask & (stat > 0), structure_for(connectivity))
    counts = np.bincount(labels.ravel()).astype(float)
    counts[0] = 0.0
    return vv * counts[labels]


def step_bracket(stat, mask, connectivity, E, H, vv, dh):
    """Lower and upper bounds of the positive-part TFCE from thresholds 0, dh, 2dh, ...

    On each step (a, b] the extent of a voxel's cluster lies between its extent at b and
    at a (extents only shrink as the threshold rises), while ∫ h^H dh is integrated
    exactly. Hence lower <= TFCE <= upper exactly, and
    upper - lower <= dh * e(0+)^E * h_v^H (the extents' decrease telescopes).
    """
    structure = structure_for(connectivity)
    x = np.where(mask, stat, 0.0)

    def extent(threshold, strict):
        supra = (x > threshold) if strict else (x >= threshold)
        labels, _ = ndimage.label(supra, structure)
        counts = np.bincount(labels.ravel()).astype(float)
        counts[0] = 0.0
        return vv * counts[labels]

    levels = np.arange(0.0, x.max() + dh, dh)
    lower = np.zeros(x.shape)
    upper = np.zeros(x.shape)
    previous = extent(0.0, strict=True)
    e0 = extent_above_zero(stat, mask, connectivity, vv)
    for a, b in zip(levels[:-1], levels[1:], strict=True):
        current = extent(b, strict=False)
        top = np.clip(x, a, b)
        piece = (top ** (H + 1) - a ** (H + 1)) / (H + 1)
        lower += current**E * piece
        upper += previous**E * piece
        previous = current
    return lower, upper, e0


def blob_map(shape, centres, widths, amplitudes, rng, noise=0.3):
    grid = np.indices(shape).astype(float)
    out = noise * ndimage.gaussian_filter(rng.standard_normal(shape), 1.0)
    for c, w, a in zip(centres, widths, amplitudes, strict=True):
        d2 = sum((grid[k] - c[k]) ** 2 for k in range(len(shape)))
        out += a * np.exp(-d2 / (2 * w**2))
    return out


# --------------------------------------------------------------------------------------
# Tests
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("connectivity", [6, 18, 26])
@pytest.mark.parametrize("seed", [0, 1])
def test_kernel_equals_python_reference(connectivity, seed):
    # Reference: the pure-Python union-find above (same algorithm, no numba); 1e-10 relative.
    rng = np.random.default_rng(seed)
    stat = ndimage.gaussian_filter(rng.standard_normal((11, 9, 7)), 1.2)
    stat /= stat.std()
    # Quantise part of the map to create ties (plateaus and equal values across clusters).
    stat[:5] = np.round(stat[:5] * 4) / 4
    mask = np.ones(stat.shape, dtype=bool)
    mask[0, 0, :] = False
    mask[5, :, 3] = False
    E, H, vv = 0.6, 1.7, 0.35
    got = tfce(stat, mask, connectivity=connectivity, E=E, H=H, voxel_volume_mm3=vv)
    want = python_tfce(stat, mask, connectivity, E, H, vv)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=0)
    assert np.all(got[~mask] == 0.0)


@pytest.mark.parametrize("connectivity", [6, 26])
def test_equals_threshold_step_reference(connectivity):
    # Reference: the definition (Smith & Nichols 2009, NeuroImage 44:83) evaluated by
    # thresholding at steps of dh and labelling with scipy.ndimage.label. Tolerance derived
    # from the step: the exact value must lie in [lower, upper] (up to 1e-9 relative
    # rounding) and upper - lower <= dh * e(0+)^E * h^H.
    rng = np.random.default_rng(3)
    stat = blob_map((16, 14, 10), [(4, 4, 5), (11, 9, 4)], [2.0, 1.5], [3.0, -2.5], rng)
    mask = np.ones(stat.shape, dtype=bool)
    mask[:, :, 0] = False
    E, H, vv, dh = 0.5, 2.0, 0.2, 0.01
    got = tfce(stat, mask, connectivity=connectivity, voxel_volume_mm3=vv)
    for sign in (1.0, -1.0):
        lower, upper, e0 = step_bracket(sign * stat, mask, connectivity, E, H, vv, dh)
        part = np.where(sign * got > 0, sign * got, 0.0)
        slack = 1e-9 * part.max()
        assert np.all(part >= lower - slack)
        assert np.all(part <= upper + slack)
        height = np.where(mask, np.maximum(sign * stat, 0.0), 0.0)
        assert np.all(upper - lower <= dh * e0**E * height**H + slack)
        # The bracket is narrow where it matters: the largest score is pinned to 2%.
        peak = np.argmax(part)
        assert (upper.flat[peak] - lower.flat[peak]) / part.flat[peak] < 0.02


def test_agrees_with_nilearn():
    # Reference: nilearn.mass_univariate._utils.calculate_tfce, the TFCE function of
    # nilearn's permuted_ols, with its defaults: dh="auto" = 100 equal steps up to
    # max|stat|, 6-connectivity (generate_binary_structure(3, 1)), E = 0.5, H = 2,
    # two-sided, extents in voxels, and no multiplication by dh (documented in its Notes).
    # nilearn sums e(t_i)^E t_i^H over thresholds t_i = i*dh <= |stat|; times dh this
    # is a right Riemann sum of the exact integral. Per voxel, replacing h^H by t_i^H on
    # each step costs at most e(0+)^E dh (t_i^H - t_(i-1)^H), replacing e(h) by e(t_i)
    # costs at most dh |stat|^H (e(t_(i-1))^E - e(t_i)^E), and the unfinished last step
    # at most dh e(0+)^E |stat|^H; both sums telescope, so
    # |dh * nilearn - exact| <= 2 * dh * e(0+)^E * |stat|^H.
    calculate_tfce = pytest.importorskip("nilearn.mass_univariate._utils").calculate_tfce
    rng = np.random.default_rng(5)
    stat = blob_map((20, 18, 12), [(6, 6, 6), (14, 12, 5)], [2.2, 1.6], [3.5, -3.0], rng)
    mask = np.ones(stat.shape, dtype=bool)
    structure = ndimage.generate_binary_structure(3, 1)
    theirs = calculate_tfce(
        stat[..., np.newaxis],
        bin_struct=structure,
        E=0.5,
        H=2,
        dh="auto",
        two_sided_test=True,
    )[..., 0]
    dh = np.abs(stat).max() / 100
    ours = tfce(stat, mask, connectivity=6)
    bound = np.zeros(stat.shape)
    for sign in (1.0, -1.0):
        e0 = extent_above_zero(sign * stat, mask, 6, 1.0)
        height = np.maximum(sign * stat, 0.0)
        bound += 2 * dh * e0**0.5 * height**2
    assert np.all(np.sign(theirs[theirs != 0]) == np.sign(ours[theirs != 0]))
    assert np.all(np.abs(dh * theirs - ours) <= bound + 1e-9 * np.abs(ours).max())
    # At the two blob peaks the relative difference is a few per cent at most.
    for peak in (np.argmax(ours), np.argmin(ours)):
        assert abs(dh * theirs.flat[peak] - ours.flat[peak]) / abs(ours.flat[peak]) < 0.05


def test_single_voxel_and_plateau_are_analytic():
    # Source: the definition (Smith & Nichols 2009, NeuroImage 44:83). An isolated voxel of
    # height x has e(h) = v for all h < x: TFCE = v^E x^(H+1)/(H+1). Two touching voxels of
    # heights 2 and 1: the lower one sees 2 voxels on (0, 1]: (2v)^E / (H+1); the higher one
    # adds v^E (2^(H+1) - 1)/(H+1) on (1, 2].
    E, H, v = 0.5, 2.0, 0.3
    stat = np.zeros((5, 5, 5))
    stat[0, 0, 0] = 1.7
    stat[3, 3, 3] = 2.0
    stat[3, 3, 4] = 1.0
    stat[0, 4, 0] = -1.2
    got = tfce(stat, None, E=E, H=H, voxel_volume_mm3=v)
    np.testing.assert_allclose(got[0, 0, 0], v**E * 1.7**3 / 3, rtol=1e-13)
    np.testing.assert_allclose(got[0, 4, 0], -(v**E) * 1.2**3 / 3, rtol=1e-13)
    np.testing.assert_allclose(got[3, 3, 4], (2 * v) ** E / 3, rtol=1e-13)
    np.testing.assert_allclose(got[3, 3, 3], (2 * v) ** E / 3 + v**E * (8 - 1) / 3, rtol=1e-13)
    assert np.count_nonzero(got) == 4


def test_many_way_merge_and_ties_are_analytic():
    # Source: the definition (Smith & Nichols 2009, NeuroImage 44:83). A voxel of height 1
    # joins five separate peaks of height 2 (6-connectivity): below 1 the six form one
    # cluster, above 1 each peak is alone. Peak: 6^E/3 + (8 - 1)/3; centre: 6^E/3.
    # A plus shape whose centre ties with its arms (all at 2) is one cluster of 5
    # throughout: every voxel scores 5^E * 8/3.
    stat = np.zeros((7, 3, 3))
    stat[1, 1, 1] = 1.0
    stat[0, 1, 1] = stat[2, 1, 1] = stat[1, 0, 1] = stat[1, 2, 1] = 2.0
    stat[1, 1, 0] = 2.0  # a fifth arm
    stat[5, 1, 1] = stat[4, 1, 1] = stat[6, 1, 1] = stat[5, 0, 1] = stat[5, 2, 1] = 2.0
    got = tfce(stat, None, connectivity=6)
    np.testing.assert_allclose(got[1, 1, 1], 6**0.5 / 3, rtol=1e-13)
    for arm in [(0, 1, 1), (2, 1, 1), (1, 0, 1), (1, 2, 1), (1, 1, 0)]:
        np.testing.assert_allclose(got[arm], 6**0.5 / 3 + 7 / 3, rtol=1e-13)
    for voxel in [(5, 1, 1), (4, 1, 1), (6, 1, 1), (5, 0, 1), (5, 2, 1)]:
        np.testing.assert_allclose(got[voxel], 5**0.5 * 8 / 3, rtol=1e-13)
    assert np.count_nonzero(got) == 11


def test_voxel_volume_scales_by_power_e():
    # Source: the definition (Smith & Nichols 2009): extents in mm³ enter as e^E, so the
    # map for voxels of volume v is v^E times the map in voxel counts (relative 1e-12).
    rng = np.random.default_rng(8)
    stat = ndimage.gaussian_filter(rng.standard_normal((15, 12, 10)), 1.5)
    stat /= stat.std()
    mask = np.ones(stat.shape, dtype=bool)
    volume = 0.2 * 0.3 * 0.5  # anisotropic 0.2 x 0.3 x 0.5 mm voxels
    for E in (0.5, 0.8):
        unit = tfce(stat, mask, E=E)
        scaled = tfce(stat, mask, E=E, voxel_volume_mm3=volume)
        np.testing.assert_allclose(scaled, volume**E * unit, rtol=1e-12, atol=0)


def test_sided_options_and_2d_input():
    # Source: definition of the two-sided score (positive part from stat, negative part
    # from -stat); a 2-D map is a single slice, so it equals the (X, Y, 1) map exactly.
    rng = np.random.default_rng(9)
    stat = ndimage.gaussian_filter(rng.standard_normal((30, 25)), 2.0)
    stat /= stat.std()
    two = tfce(stat, None, connectivity=26)
    pos = tfce(stat, None, connectivity=26, sided="positive")
    neg = tfce(stat, None, connectivity=26, sided="negative")
    np.testing.assert_array_equal(two, pos + neg)
    assert np.all(pos >= 0) and np.all(neg <= 0)
    np.testing.assert_array_equal(tfce(-stat, None, sided="positive"), -neg)
    np.testing.assert_array_equal(two, tfce(stat[:, :, np.newaxis], None)[:, :, 0])


def test_nan_is_left_out():
    # A NaN voxel separates the two voxels it sits between (definition: it never exceeds a
    # threshold), so each remaining voxel is isolated: v^E x^(H+1)/(H+1).
    stat = np.array([[[2.0, np.nan, 2.0]]])
    got = tfce(stat, None)
    np.testing.assert_allclose(got[0, 0, [0, 2]], 8 / 3, rtol=1e-13)
    assert got[0, 0, 1] == 0.0


def test_bad_input_gives_clear_errors():
    stat = np.zeros((4, 4, 4))
    with pytest.raises(UserError, match="sided"):
        tfce(stat, None, sided="both")
    with pytest.raises(UserError, match="connectivity"):
        tfce(stat, None, connectivity=8)
    with pytest.raises(UserError, match="same grid"):
        tfce(stat, np.ones((4, 4, 3), bool))
    with pytest.raises(UserError, match="E and H"):
        tfce(stat, None, E=-1.0)
    with pytest.raises(UserError, match="voxel volume"):
        tfce(stat, None, voxel_volume_mm3=0.0)
    stat[1, 1, 1] = np.inf
    with pytest.raises(UserError, match="infinite"):
        tfce(stat, None)


@pytest.mark.parametrize("crowded", [False, True])
def test_radix_order_equals_numpy_argsort(crowded):
    # Reference: numpy.argsort (stable, descending via the negated values); ties, values
    # over many binades, subnormals and the largest double all sort the same way. The
    # crowded case puts thousands of heights in one band narrower than the top radix
    # digits resolve, so the sort has to fall back on every digit.
    from grouplevel.inference import _tfce_kernel as kernel

    rng = np.random.default_rng(4)
    values = np.concatenate(
        [
            rng.exponential(size=500),
            np.round(rng.uniform(0, 3, 300), 1),  # ties
            10.0 ** rng.uniform(-300, 300, 100),
            [5e-324, 1e-310, np.finfo(float).max, 1.0, 1.0],
            -rng.uniform(0, 1, 50),  # not candidates
        ]
    )
    if crowded:
        values = np.concatenate([values, 2.0 + 1e-9 * rng.standard_normal(3000)])
    n_all = values.size
    order = np.empty(n_all, dtype=np.int32)
    keys = np.empty(n_all, dtype=np.uint64)
    spare_order, spare_keys = np.empty_like(order), np.empty_like(keys)
    counts = np.empty((1 << kernel.RADIX_BITS) + 1, dtype=np.int64)
    tags = np.arange(n_all, dtype=np.int32)  # what each key belongs to
    n = kernel._signed_keys(values, 1.0, tags, order, keys)
    kernel.sort_descending(order, keys, n, spare_order, spare_keys, counts)
    candidates = np.flatnonzero(values > 0)
    want = candidates[np.argsort(-values[candidates], kind="stable")]
    np.testing.assert_array_equal(order[:n], want)
    np.testing.assert_array_equal((~keys[:n]).view(np.float64), values[want])


@pytest.mark.parametrize("sided", ["two", "positive", "negative"])
def test_workspace_reused_for_many_maps_equals_fresh_maps(sided):
    # Reference: the pure-Python union-find above, map by map (1e-10 relative); the
    # same workspace scores every map, so nothing may carry over from one to the next.
    from grouplevel.inference.tfce import TfceWorkspace

    rng = np.random.default_rng(7)
    shape = (9, 8, 6)
    mask = ndimage.gaussian_filter(rng.standard_normal(shape), 2.0) > -0.2
    scratch = TfceWorkspace(mask, connectivity=18, E=0.5, H=2.0, voxel_volume_mm3=0.5)
    for _ in range(4):
        stat = ndimage.gaussian_filter(rng.standard_normal(shape), 1.0)
        stat /= stat.std()
        stat[rng.random(shape) < 0.05] = np.nan
        values = stat[mask]
        out = np.zeros(values.size)
        largest = scratch.scores(values, sided, out)
        want = python_tfce(
            np.nan_to_num(stat, nan=0.0), mask & np.isfinite(stat), 18, 0.5, 2.0, 0.5
        )
        if sided == "positive":
            want = np.where(stat > 0, want, 0.0)
        elif sided == "negative":
            want = np.where(stat < 0, want, 0.0)
        np.testing.assert_allclose(out, want[mask], rtol=1e-10, atol=0)
        assert largest == pytest.approx(np.abs(want).max(), rel=1e-10)


def test_two_sided_maximum_stops_early_only_when_it_cannot_change():
    # Reference: the pure-Python union-find above (largest |TFCE| over both signs, 1e-10).
    # The sweep of the second sign may stop once no score can beat the first sign's
    # maximum; called directly with a bar above or below that sign's own maximum, the
    # kernel must return the exact maximum whenever it exceeds the bar, and must stop
    # (return -1) when the bar is well above it.
    from grouplevel.inference import _tfce_kernel as kernel
    from grouplevel.inference.tfce import TfceWorkspace

    rng = np.random.default_rng(21)
    shape = (20, 18, 12)
    mask = np.ones(shape, dtype=bool)
    scratch = TfceWorkspace(mask, connectivity=26)
    stopped = 0
    for seed in range(4):
        stat = ndimage.gaussian_filter(rng.standard_normal(shape), 1.5)
        stat /= stat.std()
        stat += 0.3 * seed * (np.indices(shape)[0] > 10)  # one side higher, sometimes
        want = python_tfce(stat, mask, 26, 0.5, 2.0, 1.0)
        assert scratch.scores(stat.ravel(), "two") == pytest.approx(np.abs(want).max(), rel=1e-10)
        for sign in (1.0, -1.0):
            own_max = np.max(sign * want)
            for bar in own_max * np.array([0.5, 0.99, 1.0, 1.01, 1.5, 3.0]):
                got = kernel.tfce_signed(
                    stat.ravel(), scratch.padded_of, scratch.voxel_at, scratch.flat_offsets,
                    scratch.extent_weights, scratch.h1, sign, np.empty(0), bar,
                    *scratch._buffers,
                )  # fmt: skip
                if bar < own_max:
                    assert got == pytest.approx(own_max, rel=1e-10)
                else:
                    assert got == -1.0 or got == pytest.approx(own_max, rel=1e-10)
                if bar >= 1.5 * own_max:
                    assert got == -1.0
                    stopped += 1
    assert stopped == 16
