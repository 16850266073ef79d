"""Specificity, edge/artefact checks and consistency across animals.

Outside references: scipy.ndimage distance transforms (the edge shell), statsmodels
MixedLM with REML (Seabold & Perktold 2010, Proc 9th Python in Science Conf 92-96) for the
target-minus-rest model, the per-animal weights and the leave-one-animal-out refits, the
intraclass correlation of Shrout & Fleiss (1979, Psychol Bull 86:420) computed by hand,
and numpy's corrcoef for the LOO map correlations.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
import statsmodels.formula.api as smf
from scipy import ndimage

from grouplevel.atlas import Atlas
from grouplevel.errors import UserError
from grouplevel.inference import fdr
from grouplevel.model import between_animal_df, fit_reml, test_contrast
from grouplevel.specificity import (
    VERDICT_EDGE,
    VERDICT_NONE,
    VERDICT_OFF_TARGET,
    VERDICT_PLUS_OFF_TARGET,
    VERDICT_SPECIFIC,
    artefact_rows,
    consistency,
    edge_shell,
    inner_layer,
    leaf_rows,
    loo_group_maps,
    rim_score,
    specificity,
)

# --------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------


def make_atlas(names, parents, shares: np.ndarray, hemisphere=None) -> Atlas:
    """A hand-made Atlas: one column of ``shares`` per region; parents' columns summed."""
    n = len(names)
    index = np.arange(1, n + 1)
    parent = np.asarray(parents)
    is_leaf = ~np.isin(index, parent)
    shares = np.asarray(shares, dtype=float).copy()
    for r in range(n):  # parents are the sum of their leaves
        if not is_leaf[r]:
            kids = [k for k in range(n) if parent[k] == index[r]]
            shares[:, r] = shares[:, kids].sum(axis=1)
    regions = pd.DataFrame(
        {
            "index": index,
            "name": names,
            "abbreviation": [f"R{i}" for i in index],
            "hemisphere": hemisphere or ["both"] * n,
            "parent": parent,
            "depth": [0 if p < 0 else 1 for p in parent],
            "is_leaf": is_leaf,
            "n_voxels": shares.sum(axis=0),
            "volume_mm3": shares.sum(axis=0),
            "mask_volume_mm3": shares.sum(axis=0),
            "color": [""] * n,
        }
    )
    return Atlas(
        regions=regions,
        shares=sp.csr_matrix(shares),
        label_volume=np.zeros((1, 1, 1), dtype=int),
        resampling="same grid",
        midline_mm=0.0,
        midline_source="given",
        mirror_dice=1.0,
        orientation="",
        coverage=1.0,
        warnings=(),
    )


def ellipsoid(shape=(24, 24, 20), radii=(10.0, 10.0, 8.0)) -> np.ndarray:
    idx = np.indices(shape).astype(float)
    centre = (np.asarray(shape) - 1) / 2.0
    d = sum(((idx[i] - centre[i]) / radii[i]) ** 2 for i in range(3))
    return d <= 1.0


# --------------------------------------------------------------------------------------
# edge shell
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize(("connectivity", "metric"), [(26, "chessboard"), (6, "taxicab")])
@pytest.mark.parametrize("distance", [1, 2, 3])
def test_edge_shell_equals_scipy_distance_transform(connectivity, metric, distance):
    # reference: scipy.ndimage.distance_transform_cdt (chamfer distance to the nearest
    # outside voxel; chessboard = 26-, taxicab = 6-connectivity). A voxel is in the shell
    # when its distance to the outside is at most `distance`.
    mask = ellipsoid()
    padded = np.pad(mask, 1)
    dist = ndimage.distance_transform_cdt(padded, metric=metric)[1:-1, 1:-1, 1:-1]
    expected = (dist <= distance)[mask]
    shell = edge_shell(mask, distance, connectivity)
    np.testing.assert_array_equal(shell, expected)
    inner = inner_layer(mask, distance, connectivity)
    np.testing.assert_array_equal(inner, ((dist > distance) & (dist <= 2 * distance))[mask])


def test_edge_shell_of_a_cube_by_hand():
    # 6 × 6 × 6 cube: a 1-voxel shell holds 6³ − 4³ = 152 voxels, a 2-voxel shell 6³ − 2³.
    mask = np.zeros((10, 10, 10), dtype=bool)
    mask[2:8, 2:8, 2:8] = True
    assert edge_shell(mask, 1).sum() == 216 - 64
    assert edge_shell(mask, 2).sum() == 216 - 8


def test_edge_shell_bad_arguments():
    mask = ellipsoid()
    with pytest.raises(UserError, match="at least 1 voxel"):
        edge_shell(mask, 0)
    with pytest.raises(UserError, match="6 or 26"):
        edge_shell(mask, 2, connectivity=18)
    with pytest.raises(UserError, match="3-D"):
        edge_shell(mask[0], 2)


# --------------------------------------------------------------------------------------
# shares, enrichment and the ROI model on hand-made maps
# --------------------------------------------------------------------------------------


def small_study(rng, n_vox=100, animals=6, runs=3):
    animal = np.repeat(np.arange(animals), runs)
    u = rng.normal(0.0, 0.5, animals)
    y = 0.2 + u[animal][:, None] + rng.normal(0.0, 0.4, (animals * runs, n_vox))
    return y, animal


def hand_atlas(n_vox=100):
    # regions: 1 "auditory" parent of 2 "A1" (voxels 0..7) and 3 "A2" (voxels 8..9, voxel 9
    # half), 4 "rest" (voxels 10..99, voxel 9 the other half), 5 "ventricles" (90..99 of
    # rest are reassigned to it).
    shares = np.zeros((n_vox, 5))
    shares[0:8, 1] = 1.0
    shares[8, 2] = 1.0
    shares[9, 2] = 0.5
    shares[9, 3] = 0.5
    shares[10:90, 3] = 1.0
    shares[90:100, 4] = 1.0
    return make_atlas(["auditory", "A1", "A2", "rest", "ventricles"], [-1, 1, 1, -1, -1], shares)


def test_leaf_and_artefact_rows():
    atlas = hand_atlas()
    np.testing.assert_array_equal(leaf_rows(atlas, [0]), [1, 2])
    np.testing.assert_array_equal(leaf_rows(atlas, [0, 1]), [1, 2])
    assert artefact_rows(atlas) == [4]
    with pytest.raises(UserError, match="region rows"):
        leaf_rows(atlas, [7])


def test_shares_enrichment_and_off_target_ranks_by_hand():
    rng = np.random.default_rng(3)
    atlas = hand_atlas()
    y, animal = small_study(rng)
    X = np.ones((len(animal), 1))
    surviving = np.zeros(100, dtype=bool)
    surviving[[0, 1, 2, 3, 9, 20, 21, 95]] = True
    effect = np.zeros(100)
    effect[10:90] = 0.5  # rest
    effect[90:100] = -2.0  # ventricles: largest |mean effect| off target
    effect[9] = 1.0
    z = effect * 2
    shell = np.zeros(100, dtype=bool)
    shell[50:100] = True
    inner = np.zeros(100, dtype=bool)
    inner[20:50] = True
    height = np.linspace(-1, 1, 100)
    res = specificity(
        surviving, z, effect, atlas, [0], shell, inner, height, [4], y, X, animal, [1.0]
    )
    # by hand: target weights are 1 on voxels 0..8 and 0.5 on voxel 9 → 9.5 of 100 voxels;
    # surviving in targets: 4 + 0.5 = 4.5 of 8 surviving voxels.
    assert res.n_surviving == 8
    assert res.target_brain_share == pytest.approx(0.095, abs=1e-12)
    assert res.target_share == pytest.approx(4.5 / 8, abs=1e-12)
    assert res.enrichment == pytest.approx((4.5 / 8) / 0.095, rel=1e-12)
    # shell: 50 of 100 voxels, 1 of 8 survivors; inner layer 30 voxels with 2 survivors.
    assert res.edge_share == pytest.approx(1 / 8)
    assert res.edge_enrichment == pytest.approx(0.25)
    assert res.edge_to_inner == pytest.approx((1 / 50) / (2 / 30))
    assert res.artefact_share == pytest.approx(1 / 8)
    assert res.artefact_enrichment == pytest.approx((1 / 8) / 0.1)
    table = res.table()
    off = table[table["kind"] == "off-target"].set_index("name")
    # rest: mean effect = (80·0.5 + 0.5·1.0) / 80.5, 2.5 surviving voxels (20, 21, half of 9)
    assert off.loc["rest", "mean_effect"] == pytest.approx(40.5 / 80.5)
    assert off.loc["rest", "surviving_voxels"] == pytest.approx(2.5)
    assert off.loc["ventricles", "rank_effect"] == 1
    assert off.loc["rest", "rank_effect"] == 2
    assert off.loc["rest", "rank_extent"] == 1
    assert bool(off.loc["ventricles", "artefact_label"])
    combined = table[table["kind"] == "targets"].iloc[0]
    assert combined["activation_share"] == pytest.approx(4.5 / 8)
    # 56% in the targets with enrichment 5.9: between the thresholds
    assert res.verdict == VERDICT_PLUS_OFF_TARGET
    assert res.summary()["verdict"] == VERDICT_PLUS_OFF_TARGET


def test_target_minus_rest_model_equals_statsmodels_mixedlm():
    # reference: statsmodels MixedLM (REML, random intercept per animal) on the same
    # per-run differences computed by hand (Seabold & Perktold 2010).
    rng = np.random.default_rng(11)
    atlas = hand_atlas()
    y, animal = small_study(rng, animals=7, runs=3)
    y[:, :10] += rng.normal(0.6, 0.3, 7)[animal][:, None]  # targets react, per animal
    y[4, 3] = np.nan  # a missing voxel in one run
    X = np.ones((len(animal), 1))
    w = np.zeros(100)
    w[:9] = 1.0
    w[9] = 0.5
    ok = np.isfinite(y)
    y0 = np.where(ok, y, 0.0)
    target = (y0 @ w) / (ok @ w)
    rest = (y0 @ (1 - w)) / (ok @ (1 - w))
    diff = target - rest
    res = specificity(
        np.zeros(100, bool),
        np.zeros(100),
        np.zeros(100),
        atlas,
        [0],
        np.zeros(100, bool),
        np.zeros(100, bool),
        np.zeros(100),
        [],
        y,
        X,
        animal,
        [1.0],
    )
    frame = pd.DataFrame({"d": diff, "animal": animal})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sm = smf.mixedlm("d ~ 1", frame, groups=frame["animal"]).fit(reml=True)
    assert res.difference == pytest.approx(sm.fe_params.iloc[0], rel=1e-5)
    assert res.se == pytest.approx(sm.bse_fe.iloc[0], rel=1e-4)
    assert res.var_animal == pytest.approx(float(sm.cov_re.iloc[0, 0]), rel=1e-4)
    assert res.var_run == pytest.approx(sm.scale, rel=1e-4)
    assert res.df == 6  # animals − 1 (between-animal df)
    assert res.verdict == VERDICT_NONE


def test_rim_score_by_hand():
    height = np.arange(8, dtype=float)  # median 3.5: voxels 4..7 dorsal
    shell = np.ones(8, dtype=bool)
    active = np.ones(8, dtype=bool)
    sign = np.array([-1, -1, -1, -1, 1, 1, 1, 1])  # perfect rim
    assert rim_score(active, sign, shell, height) == (1.0, 4, 4, 0, 0)
    assert rim_score(active, -sign, shell, height)[0] == 1.0  # mirror image
    assert rim_score(active, np.ones(8), shell, height)[0] == 0.0  # one sign only
    mixed = np.array([-1, 1, -1, 1, -1, 1, -1, 1])  # no height order: d⁺ = v⁻ = 1/2
    assert rim_score(active, mixed, shell, height)[0] == pytest.approx(0.0)
    # 3 positive dorsal, 1 negative ventral: balance 2·1/4, orientation 3/3 + 1/1 − 1
    lopsided = np.array([0, 0, 0, -1, 1, 1, 1, 0])
    assert rim_score(active, lopsided, shell, height)[0] == pytest.approx(0.5)


# --------------------------------------------------------------------------------------
# a simulated edge-only study is an artefact, never "specific"
# --------------------------------------------------------------------------------------


def simulated_brain(kind: str, rng: np.random.Generator):
    mask = ellipsoid()
    idx = np.argwhere(mask)
    height = idx[:, 2].astype(float)
    shell = edge_shell(mask, 2)
    inner = inner_layer(mask, 2)
    n_vox = int(mask.sum())
    dorsal = height > np.median(height)
    # atlas: "dorsal cortex" = the dorsal half (it includes the dorsal edge), and the rest
    shares = np.stack([dorsal, ~dorsal], axis=1).astype(float)
    atlas = make_atlas(["dorsal cortex", "ventral brain"], [-1, -1], shares)
    animals, runs = 8, 3
    animal = np.repeat(np.arange(animals), runs)
    signal = np.zeros(n_vox)
    if kind == "rim":  # positive dorsal, negative ventral, only in the shell
        signal[shell] = np.where(dorsal[shell], 1.0, -1.0)
    elif kind == "edge":  # one-signed all along the edge (surface vessels)
        signal[shell] = 1.0
    else:  # a deep blob inside the dorsal half
        centre = np.array([11.5, 11.5, 13.0])
        signal = np.exp(-np.sum((idx - centre) ** 2, axis=1) / (2 * 2.0**2))
        signal[~dorsal | shell] = 0.0
    u = rng.normal(0, 0.2, (animals, 1))
    y = signal + u[animal] + rng.normal(0, 0.4, (len(animal), n_vox))
    X = np.ones((len(animal), 1))
    fit = fit_reml(y, None, X, animal)
    res = test_contrast(fit, [1.0], between_animal_df(X, animal, np.isfinite(y), [1.0]))
    surviving = fdr(res.p, alpha=0.05).q <= 0.05
    return specificity(
        surviving, res.z, res.effect, atlas, [0], shell, inner, height, [], y, X, animal, [1.0]
    )


@pytest.mark.parametrize("kind", ["rim", "edge"])
def test_edge_only_activation_is_flagged_as_artefact(kind):
    out = simulated_brain(kind, np.random.default_rng(5))
    assert out.n_surviving > 100
    assert out.verdict == VERDICT_EDGE
    assert out.verdict != VERDICT_SPECIFIC
    assert out.flag == "likely motion or vascular artefact"
    assert out.edge_rule
    if kind == "rim":
        assert out.rim_rule
        assert out.rim_score > 0.9


def test_deep_blob_in_target_is_specific():
    out = simulated_brain("blob", np.random.default_rng(5))
    assert out.verdict == VERDICT_SPECIFIC
    assert not out.edge_rule and not out.rim_rule
    assert out.target_share > 0.95


def test_activation_outside_targets_is_mostly_off_target():
    rng = np.random.default_rng(2)
    atlas = hand_atlas()
    y, animal = small_study(rng)
    surviving = np.zeros(100, dtype=bool)
    surviving[30:60] = True
    out = specificity(
        surviving,
        np.zeros(100),
        np.zeros(100),
        atlas,
        [0],
        np.zeros(100, bool),
        np.zeros(100, bool),
        np.zeros(100),
        [4],
        y,
        np.ones((len(animal), 1)),
        animal,
        [1.0],
    )
    assert out.target_share == 0.0
    assert out.verdict == VERDICT_OFF_TARGET


def test_specificity_needs_targets_and_matching_vectors():
    atlas = hand_atlas()
    y, animal = small_study(np.random.default_rng(0))
    args = [np.zeros(100, bool), np.zeros(100), np.zeros(100), atlas]
    rest = [np.zeros(100, bool), np.zeros(100, bool), np.zeros(100), [], y]
    design = [np.ones((len(animal), 1)), animal, [1.0]]
    with pytest.raises(UserError, match="no target regions"):
        specificity(*args, [], *rest, *design)
    with pytest.raises(UserError, match="surviving has 99 values"):
        specificity(np.zeros(99, bool), *args[1:], [0], *rest, *design)


# --------------------------------------------------------------------------------------
# consistency across animals
# --------------------------------------------------------------------------------------


def consistency_data(rng):
    animal = np.repeat(np.arange(6), [2, 3, 3, 4, 2, 3])
    u = rng.normal(0, 0.5, 6)
    values = 0.8 + u[animal] + rng.normal(0, 0.3, animal.size)
    return values, animal


def test_consistency_matches_statsmodels_and_hand_computation():
    rng = np.random.default_rng(21)
    values, animal = consistency_data(rng)
    ids = [f"a{i}" for i in range(6)]
    X = np.ones((values.size, 1))
    out = consistency(values, None, X, animal, ids, [1.0])
    frame = pd.DataFrame({"v": values, "animal": animal})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sm = smf.mixedlm("v ~ 1", frame, groups=frame["animal"]).fit(reml=True)
    tau2, sig2 = float(sm.cov_re.iloc[0, 0]), float(sm.scale)
    # reference: statsmodels MixedLM (REML) for τ², σ² and the effect
    assert out.var_animal == pytest.approx(tau2, rel=1e-4)
    assert out.var_run == pytest.approx(sig2, rel=1e-4)
    assert out.effect == pytest.approx(sm.fe_params.iloc[0], rel=1e-5)
    # ICC = τ² / (τ² + σ²) by hand (Shrout & Fleiss 1979, Psychol Bull 86:420)
    assert out.icc == pytest.approx(tau2 / (tau2 + sig2), rel=1e-4)
    # each animal: with no first-level variances all weights are 1/σ²: plain mean,
    # SE = σ/√n, normal 95% CI (1.959964 from standard normal tables)
    table = out.table()
    for a in range(6):
        runs = values[animal == a]
        row = table.iloc[a]
        assert row["effect"] == pytest.approx(runs.mean(), rel=1e-12)
        assert row["se"] == pytest.approx(np.sqrt(sig2 / runs.size), rel=1e-4)
        assert row["ci_low"] == pytest.approx(row["effect"] - 1.959964 * row["se"], rel=1e-6)
    assert out.n_positive == int((table["effect"] > 0).sum())
    assert out.n_ci_above_zero == int((table["ci_low"] > 0).sum())
    assert out.summary()["animals"] == 6


def test_consistency_weights_with_first_level_variances():
    rng = np.random.default_rng(8)
    values, animal = consistency_data(rng)
    s2 = rng.uniform(0.05, 0.5, values.size)
    out = consistency(values, s2, np.ones((values.size, 1)), animal, list("abcdef"), [1.0])
    # inverse-variance weights 1/(σ̂² + s²) (Borenstein et al. 2009, Introduction to
    # Meta-Analysis, Wiley)
    w = 1.0 / (out.var_run + s2)
    for a in range(6):
        sel = animal == a
        expected = np.sum(w[sel] * values[sel]) / np.sum(w[sel])
        assert out.animals["effect"].iloc[a] == pytest.approx(expected, rel=1e-10)
        assert out.animals["se"].iloc[a] == pytest.approx(np.sqrt(1 / w[sel].sum()), rel=1e-10)


def test_leave_one_animal_out_equals_statsmodels_without_that_animal():
    rng = np.random.default_rng(4)
    values, animal = consistency_data(rng)
    values[animal == 2] += 3.0  # an influential animal
    ids = [f"a{i}" for i in range(6)]
    out = consistency(values, None, np.ones((values.size, 1)), animal, ids, [1.0])
    for a in range(6):
        keep = animal != a
        frame = pd.DataFrame({"v": values[keep], "animal": animal[keep]})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            sm = smf.mixedlm("v ~ 1", frame, groups=frame["animal"]).fit(reml=True)
        # reference: statsmodels MixedLM (REML) on the runs of the other animals
        assert out.animals["loo_effect"].iloc[a] == pytest.approx(sm.fe_params.iloc[0], rel=1e-5)
        # t from the model-based GLS covariance (X'V^-1 X)^-1 at statsmodels' τ², σ²
        # (Pinheiro & Bates 2000); statsmodels' own bse uses the observed information.
        tau2, sig2 = float(sm.cov_re.iloc[0, 0]), float(sm.scale)
        info = sum(n / (sig2 + n * tau2) for n in np.bincount(animal[keep]) if n > 0)
        t_gls = sm.fe_params.iloc[0] * np.sqrt(info)
        assert out.animals["loo_t"].iloc[a] == pytest.approx(t_gls, rel=1e-4)
        assert out.animals["loo_change"].iloc[a] == pytest.approx(
            sm.fe_params.iloc[0] - out.effect, abs=1e-5
        )
    assert out.most_influential == "a2"


def test_loo_group_maps_equal_separate_fits():
    rng = np.random.default_rng(9)
    animal = np.repeat(np.arange(5), 3)
    n_vox = 40
    y = 0.5 + rng.normal(0, 0.4, (5, n_vox))[animal] + rng.normal(0, 0.3, (15, n_vox))
    s2 = rng.uniform(0.02, 0.1, (15, n_vox))
    X = np.ones((15, 1))
    out = loo_group_maps(y, s2, X, animal, [1.0], animal_ids=list("vwxyz"))
    full = test_contrast(fit_reml(y, s2, X, animal), [1.0], 4.0)
    np.testing.assert_allclose(out.t_full, full.t, rtol=1e-10)
    for a in range(5):
        keep = animal != a
        codes = np.unique(animal[keep], return_inverse=True)[1]
        ref = test_contrast(fit_reml(y[keep], s2[keep], X[keep], codes), [1.0], 3.0)
        np.testing.assert_allclose(out.effect[a], ref.effect, rtol=1e-10)
        # reference: numpy.corrcoef of the two t maps
        assert out.correlation[a] == pytest.approx(np.corrcoef(ref.t, full.t)[0, 1], rel=1e-10)
        assert out.max_abs_dt[a] == pytest.approx(np.max(np.abs(ref.t - full.t)), rel=1e-10)
    assert list(out.table()["animal"]) == list("vwxyz")
