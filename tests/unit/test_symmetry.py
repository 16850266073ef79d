"""Left/right symmetry (grouplevel.symmetry) against outside references.

Outside references used here:
- the laterality index LI = (L − R)/(L + R) (Seghier 2008, Magn Reson Imaging 26:594),
  on hand-computed cases;
- the threshold-free LI curve (Matsuo et al. 2012, J Neurosci Methods 205:119), its
  points and averages hand-computed on a five-voxel example;
- two one-sided t tests (Schuirmann 1987, J Pharmacokinet Biopharm 15:657) as computed by
  scipy.stats ``ttest_1samp`` with one-sided alternatives (Virtanen et al. 2020, Nat
  Methods 17:261) and by statsmodels ``ttost_paired`` (Seabold & Perktold 2010, Proc 9th
  Python in Science Conf);
- the one-sample t test of animal means (scipy.stats ``ttest_1samp``), which the REML
  intercept reproduces in a balanced design with one or several runs per animal
  (ANOVA = REML when the estimates are positive; Searle, Casella & McCulloch 1992,
  Variance Components, ch. 3, from memory);
- numpy's ``flip`` of the grid as an independent construction of the mirror image;
- a simulation with a known LI for the bootstrap coverage (nominal 95 %, Efron &
  Tibshirani 1993, An Introduction to the Bootstrap, ch. 13, from memory);
- the permutation engine's family-wise error control on a perfectly symmetric
  simulated study (Winkler et al. 2014, NeuroImage 92:381);
- the invented example cohort (grouplevel.example): equal-amplitude auditory blobs for
  ``sound``, a right forelimb blob three times the left one for ``paw`` (checked on the
  fitted example in end_to_end/test_example_fit.py).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.weightstats import ttost_paired

from grouplevel.atlas import Atlas
from grouplevel.errors import UserError
from grouplevel.inference.permutation import animal_level_data, permutation_test
from grouplevel.model import between_animal_df, fit_reml, test_contrast
from grouplevel.regions import region_values
from grouplevel.symmetry import (
    BILATERAL_EQUIVALENT,
    BILATERAL_UNRESOLVED,
    NO_ACTIVATION,
    TABLE_COLUMNS,
    HemisphereTest,
    analyse_symmetry,
    asymmetry_data,
    bootstrap_li,
    effect_amount,
    extent_amount,
    hemisphere_test,
    laterality,
    li_curves,
    mirror_index,
    region_pair,
    symmetry_table,
    symmetry_verdict,
    threshold_free_li,
    tost,
)

# --------------------------------------------------------------------------------------
# Laterality index
# --------------------------------------------------------------------------------------


def test_laterality_hand_computed():
    # LI = (L - R)/(L + R) (Seghier 2008, Magn Reson Imaging 26:594), by hand:
    # (30 - 10)/40 = 0.5; (0 - 5)/5 = -1; (7 - 7)/14 = 0; L + R = 0 -> undefined.
    assert laterality(30.0, 10.0) == pytest.approx(0.5, abs=1e-15)
    assert laterality(0.0, 5.0) == pytest.approx(-1.0, abs=1e-15)
    assert laterality(7.0, 7.0) == pytest.approx(0.0, abs=1e-15)
    assert np.isnan(laterality(0.0, 0.0))
    got = laterality(np.array([3.0, 1.0, 0.0]), np.array([1.0, 3.0, 0.0]))
    np.testing.assert_allclose(got[:2], [0.5, -0.5], atol=1e-15)
    assert np.isnan(got[2])
    with pytest.raises(ValueError, match="non-negative"):
        laterality(-1.0, 2.0)


def test_extent_and_effect_amounts_hand_computed():
    # Extent: share-weighted count of z > 3.09; effect: share-weighted sum of max(e, 0).
    z = np.array([4.0, 3.0, np.nan, 5.0])
    w = np.array([1.0, 1.0, 1.0, 0.5])
    assert extent_amount(z, w, 3.09) == pytest.approx(1.5, abs=1e-15)  # voxels 0 and 3/2
    e = np.array([0.4, -0.3, np.nan, 0.2])
    assert effect_amount(e, w) == pytest.approx(0.4 + 0.1, abs=1e-15)
    # so LI(extent) of left (1.5) vs right (0.5) = (1.5 - 0.5)/2 = 0.5 (Seghier 2008)
    assert laterality(extent_amount(z, w, 3.09), 0.5) == pytest.approx(0.5, abs=1e-15)


def test_threshold_free_li_hand_computed():
    # Left z = (1, 2, 3), right z = (1, 4): z_max = 4, four thresholds 0, 1, 2, 3.
    # Voxels with z > t: t=0: L3 R2 -> 0.2; t=1: L2 R1 -> 1/3; t=2: L1 R1 -> 0;
    # t=3: L0 R1 -> -1 (LI curve of Matsuo et al. 2012, J Neurosci Methods 205:119,
    # computed by hand).
    z = np.array([1.0, 2.0, 3.0, 1.0, 4.0])
    res = threshold_free_li(z, [0, 1, 2], [3, 4], n_thresholds=4)
    np.testing.assert_allclose(res.thresholds, [0.0, 1.0, 2.0, 3.0], atol=1e-15)
    np.testing.assert_allclose(res.li, [0.2, 1 / 3, 0.0, -1.0], atol=1e-15)
    assert res.value == pytest.approx((0.2 + 1 / 3 + 0.0 - 1.0) / 4, abs=1e-15)
    weighted = threshold_free_li(z, [0, 1, 2], [3, 4], n_thresholds=4, weighting="threshold")
    assert weighted.value == pytest.approx((1 / 3 - 3.0) / 6.0, abs=1e-15)
    # no positive z at all: no curve, no value
    empty = threshold_free_li(-z, [0, 1, 2], [3, 4])
    assert empty.li.size == 0 and np.isnan(empty.value)
    with pytest.raises(UserError, match="laterality-index weighting"):
        threshold_free_li(z, [0], [1], weighting="area")


# --------------------------------------------------------------------------------------
# Mirroring
# --------------------------------------------------------------------------------------


@st.composite
def _grids(draw):
    shape = tuple(draw(st.integers(2, 7)) for _ in range(3))
    rng = np.random.default_rng(draw(st.integers(0, 2**31 - 1)))
    mask = rng.random(shape) < draw(st.floats(0.3, 1.0))
    sizes = [draw(st.sampled_from([0.1, 0.2, 0.25, 0.5])) for _ in range(3)]
    signs = [draw(st.sampled_from([-1.0, 1.0])) for _ in range(3)]
    order = draw(st.permutations([0, 1, 2]))  # which voxel axis points along world x
    affine = np.zeros((4, 4))
    for world, axis in enumerate(order):
        affine[world, axis] = signs[world] * sizes[world]
    affine[:3, 3] = [draw(st.floats(-5, 5)) for _ in range(3)]
    affine[3, 3] = 1.0
    angle = draw(st.sampled_from([0.0, 0.0, 0.1, 0.3]))  # some grids tilted about y
    c, s = np.cos(angle), np.sin(angle)
    rot = np.array([[c, 0, s, 0], [0, 1, 0, 0], [-s, 0, c, 0], [0, 0, 0, 1.0]])
    midline = draw(st.floats(-3, 3))
    return mask, rot @ affine, midline, angle


@settings(max_examples=60, deadline=None)
@given(_grids())
def test_mirroring_twice_is_the_identity(grid):
    # Property (common practice for reflections): mirror(mirror(v)) = v where defined,
    # and a mirror partner lies on the other side of the plane.
    mask, affine, midline, angle = grid
    mm = mirror_index(mask, affine, midline)
    defined = np.flatnonzero(mm.index >= 0)
    np.testing.assert_array_equal(mm.index[mm.index[defined]], defined)
    assert not np.any(mm.left[defined] & mm.left[mm.index[defined]])
    assert not np.any(mm.right[defined] & mm.right[mm.index[defined]])
    if angle == 0.0:
        # axis-aligned grid: every voxel whose mirror position rounds to an in-mask voxel
        # keeps that voxel as its partner (pairs are mutual without being forced) ...
        ijk = np.argwhere(mask)
        x = ijk @ affine[0, :3] + affine[0, 3]
        axis = int(np.flatnonzero(affine[0, :3])[0])
        target = ijk.astype(float)
        target[:, axis] = (2 * midline - x - affine[0, 3]) / affine[0, axis]
        near = np.floor(target + 0.5).astype(int)
        inside = np.all((near >= 0) & (near < mask.shape), axis=1)
        hit = np.zeros(len(ijk), dtype=bool)
        hit[inside] = mask[tuple(near[inside].T)]
        # ... unless the partner lies on the same side (within half a voxel of the plane)
        x_partner = near @ affine[0, :3] + affine[0, 3]
        across = (x - midline) * (x_partner - midline) < 0
        expected = hit & across & (mm.left | mm.right)
        np.testing.assert_array_equal(mm.index >= 0, expected)


def test_mirror_matches_numpy_flip_and_asymmetry_values():
    # Independent construction: on a grid with x along axis 0 and the midline at the
    # grid centre, the mirror image is numpy.flip along axis 0.
    shape = (8, 5, 4)
    affine = np.diag([0.2, 0.2, 0.2, 1.0])
    affine[:3, 3] = [-0.7, 0.0, 0.0]  # voxel centres x = -0.7 ... 0.7, midline 0
    rng = np.random.default_rng(3)
    mask = rng.random(shape) < 0.8
    mm = mirror_index(mask, affine, 0.0)
    pos = np.full(shape, -1)
    pos[mask] = np.arange(mask.sum())
    flipped_pos = np.flip(pos, axis=0)
    expected = np.where(np.flip(mask, axis=0)[mask], flipped_pos[mask], -1)
    np.testing.assert_array_equal(mm.index, expected)
    assert mm.left.sum() + mm.right.sum() == mask.sum()  # no centre on the plane
    # left-minus-mirror values equal the volume minus its flip, on the left half
    vols = rng.normal(size=(3, *shape))
    variances = rng.uniform(0.1, 1.0, size=(3, *shape))
    y = vols[:, mask]
    s2 = variances[:, mask]
    out = asymmetry_data(y, s2, mm)
    keep = mask & np.flip(mask, axis=0)
    keep[4:] = False  # x > 0 is the right half
    np.testing.assert_array_equal(mm.half_mask(out.half), keep)
    np.testing.assert_allclose(out.y, (vols - np.flip(vols, axis=1))[:, keep], atol=1e-14)
    np.testing.assert_allclose(
        out.variance, (variances + np.flip(variances, axis=1))[:, keep], atol=1e-14
    )
    # a missing run value on either side makes the difference missing
    y[0, mm.index[np.flatnonzero(out.half)[0]]] = np.nan
    assert np.isnan(asymmetry_data(y, s2, mm).y[0, 0])
    assert asymmetry_data(y, None, mm).variance is None


def test_symmetric_study_has_no_surviving_asymmetry():
    # A study whose true effect is mirror-symmetric has no asymmetry: the permutation
    # test of the left-minus-right maps controls the family-wise error (Winkler et al.
    # 2014, NeuroImage 92:381), so with this seed no voxel survives at 0.05; the same
    # pipeline finds a one-sided effect (positive control).
    shape = (10, 6, 3)
    affine = np.diag([0.2, 0.2, 0.2, 1.0])
    affine[:3, 3] = [-0.9, 0.0, 0.0]
    mask = np.ones(shape, dtype=bool)
    mm = mirror_index(mask, affine, 0.0)
    n_animals, runs = 8, 2
    animal = np.repeat(np.arange(n_animals), runs)
    rng = np.random.default_rng(11)
    blob = np.zeros(shape)
    blob[1:3, 2:4, :] = 2.0
    symmetric = blob + np.flip(blob, axis=0)
    one_sided = blob.copy()

    def surviving(truth):
        u = rng.normal(0, 0.4, size=(n_animals, *shape))[animal]
        y = (truth + u + rng.normal(0, 0.4, size=(len(animal), *shape)))[:, mask]
        s2 = np.full_like(y, 0.16)
        d = asymmetry_data(y, s2, mm)
        X = np.ones((len(animal), 1))
        fit = fit_reml(d.y, d.variance, X, animal)
        df = between_animal_df(X, animal, np.isfinite(d.y), [1.0])
        data = animal_level_data(d.y, d.variance, X, animal, fit.var_run, fit.var_animal)
        res = permutation_test(
            data,
            np.array([1.0]),
            df,
            mm.half_mask(d.half),
            n_permutations=256,
            rng=np.random.default_rng(0),
            use_tfce=True,
            threads=1,
        )
        assert res.scheme.exhaustive  # 2^8 flips enumerated
        return int((res.p_fwe_voxel <= 0.05).sum()), int((res.p_fwe_tfce <= 0.05).sum())

    assert surviving(symmetric) == (0, 0)
    voxel, tfce = surviving(one_sided)
    assert voxel >= 4 and tfce >= 4


# --------------------------------------------------------------------------------------
# Hemispheric test and TOST
# --------------------------------------------------------------------------------------


def test_tost_matches_two_scipy_one_sided_t_tests():
    # TOST (Schuirmann 1987, J Pharmacokinet Biopharm 15:657) = the larger p of two
    # one-sided one-sample t tests, here by scipy.stats.ttest_1samp.
    rng = np.random.default_rng(5)
    d = rng.normal(0.05, 0.2, size=12)
    margin = 0.15
    mean, se, df = d.mean(), d.std(ddof=1) / np.sqrt(d.size), d.size - 1
    p_lower, p_upper, p = tost(mean, se, df, margin)
    ref_lower = stats.ttest_1samp(d, -margin, alternative="greater").pvalue
    ref_upper = stats.ttest_1samp(d, margin, alternative="less").pvalue
    assert p_lower == pytest.approx(ref_lower, rel=1e-10)
    assert p_upper == pytest.approx(ref_upper, rel=1e-10)
    assert p == pytest.approx(max(ref_lower, ref_upper), rel=1e-10)
    assert all(np.isnan(tost(mean, 0.0, df, margin)))


def test_hemisphere_test_one_run_per_animal_matches_scipy_and_statsmodels():
    # One run per animal, no first-level variances: the REML intercept test is the
    # one-sample t test (scipy.stats.ttest_1samp) on n - 1 df, and the TOST equals
    # statsmodels' ttost_paired with the margin ±m·mean(L + R).
    rng = np.random.default_rng(8)
    n = 11
    left = rng.normal(1.0, 0.3, n)
    right = left + rng.normal(-0.05, 0.1, n)
    left[0] = np.nan  # a run without the left side drops out of L − R and L + R
    res = hemisphere_test(left, right, np.arange(n), equivalence_margin=0.2)
    left, right = left[1:], right[1:]
    n -= 1
    ref = stats.ttest_1samp(left - right, 0.0)
    assert res.difference == pytest.approx(np.mean(left - right), rel=1e-6)
    assert res.t == pytest.approx(ref.statistic, rel=1e-5)
    assert res.p == pytest.approx(ref.pvalue, rel=1e-4)
    assert res.df == n - 1
    ci = ref.confidence_interval(0.95)
    assert res.ci_low == pytest.approx(ci.low, abs=1e-6)
    assert res.ci_high == pytest.approx(ci.high, abs=1e-6)
    assert res.total == pytest.approx(np.mean(left + right), rel=1e-6)
    delta = 0.2 * np.mean(left + right)
    assert res.margin == pytest.approx(delta, rel=1e-6)
    p_ref, *_ = ttost_paired(left, right, -delta, delta)
    assert res.tost_p == pytest.approx(p_ref, rel=1e-4)
    assert res.left_p == pytest.approx(stats.ttest_1samp(left, 0.0).pvalue, rel=1e-4)


def test_hemisphere_test_balanced_runs_matches_t_test_of_animal_means():
    # Balanced design (3 runs per animal), clearly positive between-animal variance:
    # REML equals ANOVA and the GLS intercept test equals the one-sample t test of the
    # animal means (Searle, Casella & McCulloch 1992, ch. 3; from memory), by scipy.
    rng = np.random.default_rng(21)
    m, k = 9, 3
    animal = np.repeat(np.arange(m), k)
    left = 1.0 + rng.normal(0, 0.5, m)[animal] + rng.normal(0, 0.2, m * k)
    right = 0.7 + rng.normal(0, 0.5, m)[animal] + rng.normal(0, 0.2, m * k)
    res = hemisphere_test(left, right, animal)
    means = np.bincount(animal, left - right) / k
    ref = stats.ttest_1samp(means, 0.0)
    assert res.t == pytest.approx(ref.statistic, rel=1e-4)
    assert res.p == pytest.approx(ref.pvalue, rel=1e-3)
    assert res.df == m - 1 and res.n_runs == m * k and res.n_animals == m


def test_hemisphere_test_rejects_bad_margin():
    with pytest.raises(UserError, match="equivalence_margin"):
        hemisphere_test(np.ones(3), np.ones(3), np.arange(3), equivalence_margin=1.5)


# --------------------------------------------------------------------------------------
# Verdict rule
# --------------------------------------------------------------------------------------


def _test(left=(0.5, 0.001), right=(0.5, 0.001), diff=(0.0, 0.9), tost_p=0.5, margin=0.2):
    return HemisphereTest(
        left_effect=left[0],
        left_se=0.1,
        left_p=left[1],
        right_effect=right[0],
        right_se=0.1,
        right_p=right[1],
        difference=diff[0],
        se=0.05,
        t=diff[0] / 0.05,
        df=9.0,
        p=diff[1],
        ci_low=diff[0] - 0.1,
        ci_high=diff[0] + 0.1,
        total=1.0,
        margin_li=0.2,
        margin=margin,
        tost_p_lower=tost_p,
        tost_p_upper=tost_p,
        tost_p=tost_p,
        n_runs=20,
        n_animals=10,
        confidence=0.95,
    )


@pytest.mark.parametrize(
    ("kwargs", "stim", "label", "side"),
    [
        (dict(left=(0.1, 0.4), right=(-0.1, 0.01), sided="positive"), None, NO_ACTIVATION, ""),
        (dict(right=(0.05, 0.3), diff=(0.4, 0.001)), "right", "unilateral (left)", "contralateral"),
        (dict(left=(0.05, 0.3), diff=(-0.4, 0.001)), "right", "unilateral (right)", "ipsilateral"),
        (
            dict(left=(0.05, 0.3), diff=(-0.1, 0.2)),
            None,
            "right only, difference not significant",
            "",
        ),
        (
            dict(left=(0.05, 0.3), diff=(0.1, 0.01)),
            None,
            "unclear (left larger, only right active)",
            "",
        ),
        (dict(diff=(-0.3, 0.004)), "left", "right-dominant", "contralateral"),
        (dict(diff=(0.3, 0.004)), "left", "left-dominant", "ipsilateral"),
        (dict(diff=(0.01, 0.8), tost_p=0.01), "left", BILATERAL_EQUIVALENT, ""),
        (dict(diff=(0.01, 0.8), tost_p=0.2), None, BILATERAL_UNRESOLVED, ""),
    ],
)
def test_verdict_rule(kwargs, stim, label, side):
    # The written rule of docs/verdicts-symmetry.md, branch by branch (our own rule; the
    # alpha of 0.05 is common practice).
    kwargs = dict(kwargs)
    sided = kwargs.pop("sided", "two")
    v = symmetry_verdict(_test(**kwargs), alpha=0.05, stimulus_side=stim, sided=sided)
    assert v.label == label
    assert v.side == side
    assert v.reasons and all(isinstance(r, str) for r in v.reasons)
    json.dumps(v.summary())


def test_bilateral_never_from_non_significant_difference_alone():
    # both active, difference p = 0.9 but TOST p = 0.06: not shown to be equivalent
    v = symmetry_verdict(_test(diff=(0.0, 0.9), tost_p=0.06))
    assert v.label == BILATERAL_UNRESOLVED
    assert any("TOST p = 0.06" in r for r in v.reasons)


def test_verdict_rejects_bad_stimulus_side():
    with pytest.raises(UserError, match="stimulus_side"):
        symmetry_verdict(_test(), stimulus_side="both")


# --------------------------------------------------------------------------------------
# Bootstrap
# --------------------------------------------------------------------------------------


def _simulate(rng, m, runs=2, nv=12, a_left=1.0, a_right=0.5, tau=0.5, sigma=0.5):
    mu = np.r_[np.full(nv, a_left), np.full(nv, a_right)]
    animal = np.repeat(np.arange(m), runs)
    u = rng.normal(0, tau, (m, 2 * nv))
    return mu + u[animal] + rng.normal(0, sigma, (m * runs, 2 * nv)), animal


def test_bootstrap_point_values_match_scipy_t_tests():
    # With equal runs per animal and no first-level variances the shortcut map is the
    # one-sample t test of animal means (scipy.stats.ttest_1samp), z at equal p.
    rng = np.random.default_rng(2)
    y, animal = _simulate(rng, 10)
    y[:, :12] += 0.5  # make the extent LI non-trivial
    res = bootstrap_li(
        y,
        np.ones_like(y, bool),
        animal,
        np.arange(12),
        np.arange(12, 24),
        threshold=2.0,
        n_boot=50,
        rng=rng,
    )
    means = np.stack([y[animal == a].mean(axis=0) for a in range(10)])
    ref = stats.ttest_1samp(means, 0.0, axis=0)
    z = stats.norm.isf(ref.pvalue / 2) * np.sign(ref.statistic)
    ext = laterality((z[:12] > 2.0).sum(), (z[12:] > 2.0).sum())
    eff = laterality(
        np.maximum(means.mean(0)[:12], 0).sum(), np.maximum(means.mean(0)[12:], 0).sum()
    )
    assert res.extent == pytest.approx(ext, abs=1e-12)
    assert res.effect == pytest.approx(eff, rel=1e-12)
    assert res.extent_replicates.shape == (50,)


def test_bootstrap_coverage_with_known_li():
    # True effect LI = (12·1.0 − 12·0.5)/(12·1.5) = 1/3. Nominal 95 % percentile interval
    # (Efron & Tibshirani 1993, ch. 13; from memory). Measured with 400 data sets × 500
    # replicates: 0.945 with 20 animals, 0.928 with 10 animals. Here 200 × 400 with 20
    # animals; binomial sd 0.015, so the accepted band is 0.90 to 0.99.
    rng = np.random.default_rng(7)
    true = 1.0 / 3.0
    hits = 0
    n_sets = 200
    for _ in range(n_sets):
        y, animal = _simulate(rng, 20)
        res = bootstrap_li(
            y,
            np.ones_like(y, bool),
            animal,
            np.arange(12),
            np.arange(12, 24),
            n_boot=400,
            rng=rng,
        )
        hits += res.effect_ci[0] <= true <= res.effect_ci[1]
    coverage = hits / n_sets
    assert 0.90 <= coverage <= 0.99


def test_bootstrap_reproducible_and_checks_input():
    rng = np.random.default_rng(4)
    y, animal = _simulate(rng, 6)
    args = (y, np.ones_like(y, bool), animal, np.arange(12), np.arange(12, 24))
    a = bootstrap_li(*args, n_boot=100, rng=np.random.default_rng(1))
    b = bootstrap_li(*args, n_boot=100, rng=np.random.default_rng(1))
    np.testing.assert_array_equal(a.effect_replicates, b.effect_replicates)
    with pytest.raises(UserError, match="bootstrap"):
        bootstrap_li(*args, n_boot=0, rng=rng)
    # no voxel reaches z > 50 in any replicate: no extent LI and no interval for it
    none = bootstrap_li(*args, threshold=50.0, n_boot=100, rng=rng)
    assert np.isnan(none.extent) and np.all(np.isnan(none.extent_ci))
    assert np.all(np.isnan(none.extent_replicates))
    assert np.all(np.isfinite(none.effect_ci))


# --------------------------------------------------------------------------------------
# Region pairs on a small atlas, and the invented example cohort
# --------------------------------------------------------------------------------------


def _small_atlas(n_vox: int) -> Atlas:
    regions = pd.DataFrame(
        {
            "index": [1, 2, 3],
            "name": ["cortex", "cortex", "ventricles"],
            "abbreviation": ["Ctx", "Ctx", "V"],
            "hemisphere": ["left", "right", "both"],
            "parent": [-1, -1, -1],
            "depth": [0, 0, 0],
            "is_leaf": [True, True, True],
        }
    )
    shares = np.zeros((n_vox, 3))
    half = n_vox // 2
    shares[:half, 0] = 1.0
    shares[half:, 1] = 1.0
    shares[half - 1 : half + 1, 2] = 0.5
    return Atlas(
        regions=regions,
        shares=sp.csr_matrix(shares),
        label_volume=np.zeros((1, 1, 1)),
        resampling="",
        midline_mm=0.0,
        midline_source="",
        mirror_dice=1.0,
        orientation="",
        coverage=1.0,
        warnings=(),
    )


def test_region_pairs_and_tables_on_a_small_atlas():
    atlas = _small_atlas(24)
    assert region_pair(atlas, "Ctx") == (0, 1)
    with pytest.raises(UserError, match="one row per hemisphere"):
        region_pair(atlas, "ventricles")
    with pytest.raises(UserError, match="not in the atlas"):
        region_pair(atlas, "cerebellum")
    rng = np.random.default_rng(9)
    y, animal = _simulate(rng, 10)
    present = np.ones_like(y, bool)
    vals, _ = region_values(y, present, atlas.shares)
    fit = fit_reml(y, None, np.ones((len(animal), 1)), animal)
    res = test_contrast(fit, [1.0], 9.0)
    out = analyse_symmetry(
        ["cortex"],
        atlas,
        y=y,
        present=present,
        animal=animal,
        z=res.z,
        effect=res.effect,
        region_values=vals,
        rng=rng,
        n_boot=200,
        stimulus_side="right",
    )
    with pytest.raises(UserError, match="already listed"):
        analyse_symmetry(
            ["cortex", "Ctx"],
            atlas,
            y=y,
            present=present,
            animal=animal,
            z=res.z,
            effect=res.effect,
            region_values=vals,
            rng=rng,
            n_boot=10,
        )
    table = symmetry_table(out)
    assert tuple(table.columns) == TABLE_COLUMNS
    row = table.iloc[0]
    # LI of summed positive effects from the REML map, recomputed by hand (Seghier 2008)
    ref = laterality(np.maximum(res.effect[:12], 0).sum(), np.maximum(res.effect[12:], 0).sum())
    assert row["li_effect"] == pytest.approx(ref, rel=1e-12)
    assert row["li_effect_low"] <= row["li_effect"] <= row["li_effect_high"]
    # true left effect 1.0 vs right 0.5 with 10 animals: left-dominant, and the left side
    # is opposite to the stimulated right side, so contralateral.
    assert row["verdict"] == "left-dominant" and row["side"] == "contralateral"
    curves = li_curves(out)
    assert list(curves.columns) == ["region", "threshold", "li"] and len(curves) == 50
    json.dumps([r.summary() for r in out])


def test_bootstrap_point_is_the_model_lis_when_the_estimators_coincide():
    # The bootstrap's point (li_*_shortcut) and its interval come from one estimator:
    # the one-sample t of the animals' precision-weighted means. With every animal
    # holding the same number of runs, no first-level variances and τ̂² > 0 at every
    # voxel, REML on runs nested in animals gives that same t (balanced REML equals the
    # ANOVA estimate; Searle, Casella & McCulloch 1992, Variance Components, ch. 3, from
    # memory), so the fitted maps' LIs must equal the bootstrap's point; scipy's
    # ttest_1samp on the animal means is the outside reference for the t.
    rng = np.random.default_rng(11)
    m, runs, per_side = 8, 3, 25
    animal = np.repeat(np.arange(m), runs)
    mean = np.r_[rng.uniform(0.5, 2.2, per_side), rng.uniform(0.0, 1.4, per_side)]
    y = (
        mean
        + rng.normal(0, 1.0, (m, 1, 2 * per_side))[animal, 0]
        + rng.normal(0, 0.25, (animal.size, 2 * per_side))
    )
    X = np.ones((animal.size, 1))
    fit = fit_reml(y, None, X, animal)
    assert np.all(fit.var_animal > 0)
    present = np.isfinite(y)
    res = test_contrast(fit, np.array([1.0]), between_animal_df(X, animal, present, [1.0]))
    means = y.reshape(m, runs, -1).mean(axis=1)
    t_ref = stats.ttest_1samp(means, 0.0).statistic
    np.testing.assert_allclose(res.t, t_ref, rtol=1e-5)
    left, right = np.arange(per_side), np.arange(per_side, 2 * per_side)
    threshold = 3.0
    boot = bootstrap_li(
        y,
        present,
        animal,
        left,
        right,
        threshold=threshold,
        n_boot=200,
        rng=np.random.default_rng(0),
    )
    ones = np.ones(per_side)
    model_extent = laterality(
        extent_amount(res.z[left], ones, threshold), extent_amount(res.z[right], ones, threshold)
    )
    model_effect = laterality(
        effect_amount(res.effect[left], ones), effect_amount(res.effect[right], ones)
    )
    assert 0.05 < model_extent < 0.95  # both sides have voxels above the threshold
    assert boot.extent == pytest.approx(model_extent, abs=1e-12)
    assert boot.effect == pytest.approx(model_effect, abs=1e-9)
    assert boot.extent_ci[0] <= boot.extent <= boot.extent_ci[1]
    assert boot.effect_ci[0] <= boot.effect <= boot.effect_ci[1]
