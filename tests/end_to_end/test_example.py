"""Tests of the invented example study (grouplevel.example).

Outside references used here:
- nibabel (affine handling, ``aff2axcodes``, ``apply_affine``) for geometry and mirroring;
- scipy.stats.ttest_1samp for the group t-maps of the planted effects;
- the variance of linearly filtered white noise, var = sigma² · sum(k²) (Papoulis & Pillai
  2002, Probability, Random Variables and Stochastic Processes, 4th ed., ch. 9; formula
  from memory);
- the lag-1 autocorrelation of Gaussian-smoothed white noise, rho1 = exp(-1 / (4 s²)) for
  kernel standard deviation s, so FWHM = sqrt(-2 ln 2 / ln rho1) voxels (common practice
  for estimating smoothness from residuals; formula from memory).
"""

from __future__ import annotations

import json
import math
import pathlib
import re
import tomllib

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from nibabel.affines import apply_affine
from scipy import ndimage, stats

from grouplevel import example as ex

REPO = pathlib.Path(__file__).resolve().parents[2]
STUDY_SIZE_MM = {"x (left-right)": 8.0, "y (posterior-anterior)": 10.0, "z (ventral-dorsal)": 6.0}
SIZE_TOLERANCE = 0.15  # the task states the brain size within ±15 %


@pytest.fixture(scope="module")
def anatomy() -> ex.Anatomy:
    return ex.make_anatomy()


@pytest.fixture(scope="module")
def sim(anatomy: ex.Anatomy) -> ex.Simulation:
    return ex.simulate(anatomy, ex.draw_design(ex.EXAMPLE_SEED))


@pytest.fixture(scope="module")
def study(example_folder: pathlib.Path) -> pathlib.Path:
    """The folder ``write_example`` wrote (the session's, read-only; tests/conftest.py)."""
    return example_folder


@pytest.fixture(scope="module")
def truth(study: pathlib.Path) -> dict:
    return json.loads((study / "truth.json").read_text())


@pytest.fixture(scope="module")
def table(study: pathlib.Path) -> pd.DataFrame:
    return pd.read_csv(study / "runs.tsv", sep="\t", keep_default_na=False, dtype=str)


@pytest.fixture(scope="module")
def labels(study: pathlib.Path) -> pd.DataFrame:
    return pd.read_csv(study / "atlas.tsv", sep="\t", keep_default_na=False, dtype=str)


def _load(path: pathlib.Path) -> np.ndarray:
    return np.asarray(nib.load(str(path)).dataobj)


def _stack(study: pathlib.Path, rows: pd.DataFrame, column: str) -> np.ndarray:
    return np.stack([_load(study / p) for p in rows[column]])


# --------------------------------------------------------------------------------------
# Determinism and committed files
# --------------------------------------------------------------------------------------


def test_same_seed_gives_identical_arrays(anatomy: ex.Anatomy, sim: ex.Simulation) -> None:
    again = ex.simulate(ex.make_anatomy(), ex.draw_design(ex.EXAMPLE_SEED))
    assert np.array_equal(ex.make_anatomy().template, anatomy.template)
    for contrast in ex.CONTRASTS:
        assert np.array_equal(again.effect[contrast], sim.effect[contrast], equal_nan=True)
        assert np.array_equal(again.variance[contrast], sim.variance[contrast], equal_nan=True)


def test_other_seed_differs(anatomy: ex.Anatomy, sim: ex.Simulation) -> None:
    other = ex.simulate(anatomy, ex.draw_design(ex.EXAMPLE_SEED + 1))
    inside = anatomy.mask
    for contrast in ex.CONTRASTS:
        a = np.nan_to_num(sim.effect[contrast][:, inside])
        b = np.nan_to_num(other.effect[contrast][:, inside])
        # independent noise: the maps differ at (almost) every voxel
        assert np.mean(a != b) > 0.99


def test_written_maps_are_the_simulated_arrays(
    study: pathlib.Path, sim: ex.Simulation, table: pd.DataFrame
) -> None:
    for k in (0, len(sim.design.runs) - 1):
        run = sim.design.runs[k]
        row = table[
            (table["animal"] == run.animal)
            & (table["run"] == str(run.run))
            & (table["condition"] == "sound")
        ].iloc[0]
        assert np.array_equal(_load(study / row["effect"]), sim.effect["sound"][k], equal_nan=True)
        assert np.array_equal(
            _load(study / row["variance"]), sim.variance["sound"][k], equal_nan=True
        )


def test_committed_study_files_equal_what_write_example_writes(study: pathlib.Path) -> None:
    for name in ("study.toml", "runs.tsv"):
        committed = (REPO / "example_study" / name).read_bytes()
        assert committed == (study / name).read_bytes(), f"example_study/{name} is stale"


def test_config_is_accepted_by_the_settings_reader(
    study: pathlib.Path, anatomy: ex.Anatomy
) -> None:
    from grouplevel.config import load_settings

    load_settings(study / "study.toml")  # unknown keys or bad values would raise
    config = tomllib.loads((study / "study.toml").read_text())
    assert set(config) == {
        "study",
        "space",
        "atlas",
        "model",
        "comparison",
        "inference",
        "questions",
    }
    assert "invented" in config["study"]["title"].lower()
    assert config["study"]["min_coverage"] == 0.8
    assert config["model"] == {"formula": "1", "run_variance": "estimate"}
    for key in ("table", "template", "mask"):
        assert (study / config["study"][key]).is_file()
    for key in ("image", "labels"):
        assert (study / config["atlas"][key]).is_file()
    # bregma: on the midline (x = 0), at the dorsal surface, anterior of the brain centre
    x, y, z = config["space"]["origin_mm"]
    assert config["space"]["origin_name"] == "bregma"
    assert x == 0.0 and 0.0 < y < 3.0
    top = anatomy.coords[2][anatomy.mask].max()
    assert abs(z - top) <= 0.5


def test_runs_table(study: pathlib.Path, table: pd.DataFrame) -> None:
    assert list(table.columns) == list(ex.TABLE_COLUMNS)
    assert set(table["exclude"]) <= {"true", "false"}
    assert set(table["condition"]) == {"sound", "paw"}
    runs = table.drop_duplicates(["animal", "session", "run"])
    per_animal = runs.groupby("animal").size()
    assert list(per_animal.index) == [f"m{i:02d}" for i in range(1, 11)]
    assert per_animal.min() >= 2 and per_animal.max() <= 5 and per_animal.nunique() > 1
    assert 30 <= len(runs) <= 40 and len(table) == 2 * len(runs)
    excluded = table["exclude"] == "true"
    assert 1 <= runs["exclude"].eq("true").sum() <= 2
    assert (table.loc[excluded, "reason"] != "").all()
    assert (table.loc[~excluded, "reason"] == "").all()
    for column in ("effect", "variance"):
        for path in table[column]:
            assert re.fullmatch(
                r"maps/m\d\d_ses-1_run-\d_(sound|paw)_(effect|variance)\.nii\.gz", path
            )
            assert (study / path).is_file()  # excluded runs' maps exist as well
    assert example_table_matches(table)


def example_table_matches(table: pd.DataFrame) -> bool:
    frame = ex.example_table()
    as_text = frame.assign(
        session=frame["session"].astype(str),
        run=frame["run"].astype(str),
        exclude=frame["exclude"].map({True: "true", False: "false"}),
    )
    return as_text.equals(table)


# --------------------------------------------------------------------------------------
# Geometry and atlas
# --------------------------------------------------------------------------------------


def test_geometry(study: pathlib.Path) -> None:
    mask_img = nib.load(str(study / "brain_mask.nii.gz"))
    template_img = nib.load(str(study / "template.nii.gz"))
    assert mask_img.get_data_dtype() == np.uint8
    assert nib.aff2axcodes(mask_img.affine) == ("R", "A", "S")
    assert np.allclose(mask_img.header.get_zooms(), (0.2, 0.2, 0.2))
    assert np.allclose(template_img.affine, mask_img.affine)
    mask = np.asarray(mask_img.dataobj) > 0
    for axis, (what, size) in enumerate(STUDY_SIZE_MM.items()):
        other = tuple(a for a in range(3) if a != axis)
        present = np.flatnonzero(mask.any(axis=other))
        extent = (present[-1] - present[0] + 1) * 0.2
        assert abs(extent - size) <= SIZE_TOLERANCE * size, (what, extent)
        assert present[0] >= 3 and present[-1] <= mask.shape[axis] - 4, what  # margin
    template = np.asarray(template_img.dataobj)
    assert np.all(template[~mask] == 0) and np.all(template[mask] > 0)


def test_template_has_tissue_contrast(anatomy: ex.Anatomy) -> None:
    def mean_of(*abbreviations: str) -> float:
        t = anatomy.atlas_table
        ids = t.loc[t["abbreviation"].isin(abbreviations), "index"]
        return float(anatomy.template[np.isin(anatomy.atlas, ids)].mean())

    cortex = mean_of("A1", "A2", "S1FL", "S1HL", "Vis", "Mot")
    deep = mean_of("Th", "Str")
    ventricles = mean_of("V")
    assert cortex > 1.2 * deep and deep > 2.0 * ventricles


def test_atlas_table_and_hierarchy(study: pathlib.Path, labels: pd.DataFrame) -> None:
    assert list(labels.columns) == [
        "index",
        "name",
        "abbreviation",
        "hemisphere",
        "parent",
        "color",
    ]
    index = labels["index"].astype(int)
    assert index.is_unique and (index > 0).all()
    assert set(labels["hemisphere"]) <= {"left", "right", "both", ""}
    assert labels["color"].str.fullmatch(r"#[0-9a-f]{6}").all()
    image = _load(study / "atlas.nii.gz")
    assert np.issubdtype(image.dtype, np.integer)
    in_image = set(np.unique(image)) - {0}
    assert in_image <= set(index)
    parent = {
        int(i): (int(p) if p else None)
        for i, p in zip(labels["index"], labels["parent"], strict=True)
    }
    assert {p for p in parent.values() if p is not None} <= set(parent)
    parents = {p for p in parent.values() if p is not None}
    assert parents.isdisjoint(in_image)  # parent rows are not in the image
    assert in_image == set(parent) - parents  # every leaf is drawn
    for start in parent:  # no cycle: walking up ends at a top-level row
        seen, node = set(), start
        while node is not None:
            assert node not in seen, f"cycle through {node}"
            seen.add(node)
            node = parent[node]
    hemisphere = dict(zip(index, labels["hemisphere"], strict=True))
    for child, up in parent.items():
        if up is not None:
            assert hemisphere[child] == hemisphere[up]
    for name, group in labels.groupby("name"):
        sides = sorted(group["hemisphere"])
        assert sides in (["left", "right"], ["both"]), name
    # 21 leaves with effects and landmarks plus 18 that fill the rest of the brain
    assert len(in_image) == 39
    # the labels cover the whole brain mask (read_atlas refuses an atlas below 50 %)
    mask = _load(study / "brain_mask.nii.gz") > 0
    assert np.all(image[mask] > 0) and np.all(image[~mask] == 0)
    # the chain cortex → auditory cortex → primary auditory area exists
    by_index = labels.set_index(labels["index"].astype(int))
    a1 = int(
        labels.loc[
            (labels["abbreviation"] == "A1") & (labels["hemisphere"] == "right"), "index"
        ].iloc[0]
    )
    chain = []
    node = a1
    while node is not None:
        chain.append(by_index.loc[node, "name"])
        node = parent[node]
    assert chain == ["primary auditory area", "auditory cortex", "cortex"]


def test_atlas_left_right_are_mirror_images(study: pathlib.Path, labels: pd.DataFrame) -> None:
    img = nib.load(str(study / "atlas.nii.gz"))
    image = np.asarray(img.dataobj)
    inverse = np.linalg.inv(img.affine)
    pairs = 0
    for _, group in labels.groupby(["name"]):
        if sorted(group["hemisphere"]) != ["left", "right"]:
            continue
        left = int(group.loc[group["hemisphere"] == "left", "index"].iloc[0])
        right = int(group.loc[group["hemisphere"] == "right", "index"].iloc[0])
        if not (image == right).any():
            continue  # parent rows are not drawn
        voxels = np.argwhere(image == right)
        world = apply_affine(img.affine, voxels)
        world[:, 0] *= -1.0  # mirror about the plane x = 0 mm
        back = np.rint(apply_affine(inverse, world)).astype(int)
        mirrored = np.zeros(image.shape, dtype=bool)
        mirrored[tuple(back.T)] = True
        left_mask = image == left
        dice = 2 * np.sum(mirrored & left_mask) / (mirrored.sum() + left_mask.sum())
        assert dice >= 0.95, (group["name"].iloc[0], dice)
        assert world[:, 0].max() < 0  # the mirrored right region lies in the left hemisphere
        pairs += 1
    assert pairs >= 9


def test_anatomy_is_plausible(anatomy: ex.Anatomy) -> None:
    def centroid(abbreviation: str, hemisphere: str) -> np.ndarray:
        region = anatomy.atlas == anatomy.index_of(abbreviation, hemisphere)
        return anatomy.coords[:, region].mean(axis=1)

    brain = anatomy.coords[:, anatomy.mask]
    a1 = centroid("A1", "right")
    s1 = centroid("S1FL", "right")
    vis = centroid("Vis", "right")
    ic = centroid("IC", "right")
    ventricles = centroid("V", "both")
    assert a1[0] > 0.7 * brain[0].max() and a1[1] < 0  # lateral, posterior half (temporal)
    assert s1[2] > a1[2] and s1[0] > 1.0  # dorsolateral, above auditory cortex
    assert vis[1] < a1[1] and vis[2] > a1[2]  # posterior and dorsal
    assert ic[1] < vis[1] and ic[2] > 0 and ic[0] < 1.5  # posterior-dorsal midbrain
    assert abs(ventricles[0]) < 0.1 and abs(ventricles[2]) < 1.5  # deep, on the midline


# --------------------------------------------------------------------------------------
# Noise calibration
# --------------------------------------------------------------------------------------

# Relative tolerance of an empirical variance: with ~30 000 mask voxels per field and
# a resel of about 2³ voxels, the standard error of a variance estimate pooled over 10
# fields is below 1 %; 5 % leaves room without hiding a mis-normalisation (a kernel
# that is not divided by its root-sum-of-squares is off by a factor of about 20).
VARIANCE_RTOL = 0.05


def test_smooth_unit_fields_have_unit_variance() -> None:
    rng = np.random.default_rng(0)
    fields = ex.smooth_unit_fields(rng, 4, (40, 40, 40), 2.0)
    # var = sum(k²) for unit white noise (Papoulis & Pillai 2002); after division: 1
    assert abs(fields.var() - 1.0) < 0.03
    # the root-sum-of-squares equals that of the kernel read off scipy's own response
    sigma = 2.0 / math.sqrt(8 * math.log(2))
    delta = np.zeros((15, 15, 15))
    delta[7, 7, 7] = 1.0
    response = ndimage.gaussian_filter(delta, sigma, mode="constant")
    assert math.isclose(ex.gaussian_kernel_rss(sigma), math.sqrt(np.sum(response**2)), rel_tol=1e-9)


def test_noise_components_have_the_stated_variances(
    anatomy: ex.Anatomy, sim: ex.Simulation
) -> None:
    inside = anatomy.mask
    for contrast in ex.CONTRASTS:
        u = sim.animal_effect[contrast][:, inside].astype(float)
        d = sim.run_effect[contrast][:, inside].astype(float)
        e = sim.first_level_noise[contrast][:, inside].astype(float)
        s2 = sim.variance[contrast][:, inside].astype(float)
        ok = np.isfinite(s2)
        assert math.isclose(np.mean(u**2), ex.TAU2, rel_tol=VARIANCE_RTOL)
        assert math.isclose(np.mean(d**2), ex.SIGMA2, rel_tol=VARIANCE_RTOL)
        # the first-level noise has exactly the variance written in the variance maps
        assert math.isclose(np.mean(e[ok] ** 2 / s2[ok]), 1.0, rel_tol=VARIANCE_RTOL)
        assert math.isclose(np.mean(e[ok] ** 2), np.mean(s2[ok]), rel_tol=VARIANCE_RTOL)


def test_written_maps_follow_the_noise_model(
    study: pathlib.Path, table: pd.DataFrame, anatomy: ex.Anatomy, truth: dict
) -> None:
    """Differences of two runs of one animal remove effect and u_animal: their variance
    is 2 sigma² + s²_j + s²_k, read from the written variance maps."""
    skip = {truth["motion"]["animal"]}
    skip |= {r["animal"] for r in truth["excluded_runs"]["runs"]}
    rim = anatomy.mask & ~ndimage.binary_erosion(anatomy.mask, iterations=3)
    use = anatomy.mask & ~rim
    observed, expected = [], []
    rows = table[(table["condition"] == "sound") & ~table["animal"].isin(skip)]
    for _, group in rows.groupby("animal"):
        y = _stack(study, group, "effect")[:, use].astype(float)
        s2 = _stack(study, group, "variance")[:, use].astype(float)
        for j in range(len(group) - 1):
            diff = y[j + 1] - y[j]
            ok = np.isfinite(diff)
            observed.append(np.mean(diff[ok] ** 2))
            expected.append(np.mean(2 * truth["sigma2"] + s2[j][ok] + s2[j + 1][ok]))
    assert len(observed) >= 10
    assert math.isclose(np.sum(observed), np.sum(expected), rel_tol=VARIANCE_RTOL)


def _fwhm_from_lag1(fields: np.ndarray, mask: np.ndarray, axis: int) -> float:
    a = np.take(fields, np.arange(fields.shape[axis + 1] - 1), axis=axis + 1)
    b = np.take(fields, np.arange(1, fields.shape[axis + 1]), axis=axis + 1)
    pair = np.take(mask, np.arange(mask.shape[axis] - 1), axis=axis) & np.take(
        mask, np.arange(1, mask.shape[axis]), axis=axis
    )
    a, b = a[:, pair], b[:, pair]
    rho = np.sum(a * b) / math.sqrt(np.sum(a * a) * np.sum(b * b))
    return math.sqrt(-2.0 * math.log(2.0) / math.log(rho))


def test_noise_smoothness_is_about_two_voxels(anatomy: ex.Anatomy, sim: ex.Simulation) -> None:
    for fields in (
        sim.animal_effect["sound"],
        sim.run_effect["paw"],
        sim.first_level_noise["sound"]
        / np.sqrt(np.nan_to_num(sim.variance["sound"], nan=1.0) + 1e-30),
    ):
        for axis in range(3):
            fwhm = _fwhm_from_lag1(fields.astype(float), anatomy.mask, axis)
            assert abs(fwhm - ex.NOISE_FWHM_VOX) < 0.15, (axis, fwhm)


# --------------------------------------------------------------------------------------
# Ground truth
# --------------------------------------------------------------------------------------


def _parent_chain(labels: pd.DataFrame, index: int) -> list[str]:
    by_index = labels.set_index(labels["index"].astype(int))
    names = []
    node: int | None = index
    while node is not None:
        names.append(by_index.loc[node, "name"])
        up = by_index.loc[node, "parent"]
        node = int(up) if up else None
    return names


def test_true_effects_sit_in_their_regions(
    study: pathlib.Path, truth: dict, labels: pd.DataFrame
) -> None:
    img = nib.load(str(study / "atlas.nii.gz"))
    atlas = np.asarray(img.dataobj)
    x = apply_affine(img.affine, np.argwhere(np.ones(atlas.shape, bool)))[:, 0].reshape(atlas.shape)
    for contrast in ex.CONTRASTS:
        effect = _load(study / "truth" / f"{contrast}_effect.nii.gz")
        entries = [e for e in truth["effects"] if e["contrast"] == contrast]
        regions = {e["atlas_index"] for e in entries}
        assert np.all(effect[~np.isin(atlas, list(regions))] == 0)  # confined
        for entry in entries:
            region = atlas == entry["atlas_index"]
            peak = np.unravel_index(np.argmax(np.where(region, effect, -np.inf)), atlas.shape)
            voxel = np.rint(apply_affine(np.linalg.inv(img.affine), entry["peak_mm"])).astype(int)
            assert tuple(voxel) == tuple(int(v) for v in peak)
            assert atlas[peak] == entry["atlas_index"]
            # the peak is inside the region, not on its border
            assert ndimage.binary_erosion(region)[peak]
            assert math.isclose(effect[peak], entry["peak_value"], rel_tol=1e-4)
            assert (x[peak] < 0) == (entry["hemisphere"] == "left")
    # sound equal on both sides, paw stronger on the right
    amp = {
        (e["contrast"], e["abbreviation"], e["hemisphere"]): e["amplitude"]
        for e in truth["effects"]
    }
    assert amp[("sound", "A1", "left")] == amp[("sound", "A1", "right")]
    assert amp[("paw", "S1FL", "right")] >= 2 * amp[("paw", "S1FL", "left")]
    assert _parent_chain(
        labels, next(e["atlas_index"] for e in truth["effects"] if e["abbreviation"] == "S1FL")
    )[1:] == ["somatosensory cortex", "cortex"]


def _group_t(study: pathlib.Path, table: pd.DataFrame, contrast: str) -> np.ndarray:
    rows = table[(table["condition"] == contrast) & (table["exclude"] == "false")]
    means = []
    for _, group in rows.groupby("animal"):
        means.append(np.nanmean(_stack(study, group, "effect").astype(float), axis=0))
    return stats.ttest_1samp(np.stack(means), 0.0, axis=0).statistic


def test_group_t_maps_peak_in_the_planted_regions(
    study: pathlib.Path, table: pd.DataFrame, labels: pd.DataFrame, anatomy: ex.Anatomy
) -> None:
    atlas = _load(study / "atlas.nii.gz")
    mask = anatomy.mask
    x = anatomy.coords[0]
    t_sound = np.where(mask, _group_t(study, table, "sound"), -np.inf)
    for side in (x < 0, x > 0):
        t_side = np.where(side, t_sound, -np.inf)
        peak = np.unravel_index(np.argmax(t_side), t_side.shape)
        assert "auditory cortex" in _parent_chain(labels, int(atlas[peak]))
        assert t_side[peak] > 8.0  # "well above 6"
    t_paw = np.where(mask, _group_t(study, table, "paw"), -np.inf)
    peak = np.unravel_index(np.argmax(t_paw), t_paw.shape)
    index = int(atlas[peak])
    row = labels[labels["index"].astype(int) == index].iloc[0]
    assert (row["abbreviation"], row["hemisphere"]) == ("S1FL", "right")


def test_motion_rim_only_in_the_motion_animal(
    study: pathlib.Path, table: pd.DataFrame, anatomy: ex.Anatomy, truth: dict
) -> None:
    mask = anatomy.mask
    z = anatomy.coords[2]
    rim = mask & ~ndimage.binary_erosion(mask, iterations=2)
    inner = ndimage.binary_erosion(mask, iterations=4)
    dorsal, ventral = rim & (z > 1.5), rim & (z < -1.5)
    dorsal_inner = inner & (z > 0.8) & (z < 2.0)
    for _, row in table.iterrows():
        y = _load(study / row["effect"]).astype(float)
        edge = np.nanmean(y[dorsal]) - np.nanmean(y[ventral])
        # the same dorsal-minus-ventral contrast a little deeper: no rim signal there
        depth = np.nanmean(y[dorsal_inner]) - np.nanmean(y[inner & (z < -0.8) & (z > -2.0)])
        if row["animal"] == truth["motion"]["animal"]:
            assert edge > 1.0 and abs(depth) < 0.4, (row["effect"], edge, depth)
        else:
            assert abs(edge) < 0.4, (row["effect"], edge)


def test_dropout_only_in_the_listed_runs(
    study: pathlib.Path, table: pd.DataFrame, anatomy: ex.Anatomy, truth: dict
) -> None:
    listed = {(r["animal"], str(r["run"])) for r in truth["dropout"]["runs"]}
    assert 2 <= len(listed) <= 3
    mask = anatomy.mask
    seen = set()
    for _, row in table.iterrows():
        effect_nan = np.isnan(_load(study / row["effect"]))
        variance_nan = np.isnan(_load(study / row["variance"]))
        assert np.array_equal(effect_nan, variance_nan)
        if (row["animal"], row["run"]) in listed:
            seen.add((row["animal"], row["run"]))
            assert effect_nan.sum() == truth["dropout"]["voxels"]
            assert not np.any(effect_nan & ~mask)
            assert effect_nan.sum() < 0.01 * mask.sum()  # a small region
            assert np.all(anatomy.coords[2][effect_nan] < 0)  # ventral
        else:
            assert not effect_nan.any()
    assert seen == listed
    # with min_coverage = 0.8 no dropout voxel is lost
    n_runs = len(table.drop_duplicates(["animal", "run"]))
    assert (n_runs - len(listed)) / n_runs >= 0.8


def test_truth_record_matches_the_study(
    study: pathlib.Path, table: pd.DataFrame, truth: dict
) -> None:
    config = tomllib.loads((study / "study.toml").read_text())
    assert truth["seed"] == ex.EXAMPLE_SEED
    assert truth["origin"]["mm"] == config["space"]["origin_mm"]
    assert truth["tau2"] == ex.TAU2 and truth["sigma2"] == ex.SIGMA2
    excluded = {(r.animal, r.run) for r in table[table["exclude"] == "true"].itertuples()}
    assert excluded == {(r["animal"], str(r["run"])) for r in truth["excluded_runs"]["runs"]}
    assert 2 <= len(truth["noisy_runs"]["runs"]) <= 3
    for contrast, ranges in truth["variance_map_ranges"].items():
        s2 = np.stack(
            [_load(study / p) for p in table.loc[table["condition"] == contrast, "variance"]]
        )
        inside = s2[:, _load(study / "brain_mask.nii.gz") > 0]
        assert math.isclose(np.nanmin(inside), ranges["min"], rel_tol=1e-4)
        assert math.isclose(np.nanmax(inside), ranges["max"], rel_tol=1e-4)
        assert ranges["max"] > 3 * ranges["min"]  # varies over space and between runs
    # noisy runs carry several times the variance of the others
    s2 = {}
    for row in table[table["condition"] == "sound"].itertuples():
        s2[(row.animal, row.run)] = np.nanmean(
            _load(study / row.variance)[_load(study / "brain_mask.nii.gz") > 0]
        )
    noisy = {(r["animal"], str(r["run"])) for r in truth["noisy_runs"]["runs"]}
    quiet = [v for k, v in s2.items() if k not in noisy]
    assert min(s2[k] for k in noisy) > 2.5 * np.median(quiet)


def test_readme_states_the_default_ground_truth(truth: dict) -> None:
    text = (REPO / "example_study" / "README.md").read_text()
    assert "All data in this study are invented" in text
    for key in ("noisy_runs", "dropout", "excluded_runs"):
        for r in truth[key]["runs"]:
            assert f"`{r['animal']}` run {r['run']}" in text, (key, r)
    assert f"({truth['dropout']['voxels']} voxels)" in text
    assert f"`{truth['motion']['animal']}`" in text
    origin = ", ".join(str(v) for v in truth["origin"]["mm"])
    assert f"({origin}) mm" in text
