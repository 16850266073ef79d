"""The invented example cohort, fitted end to end, finds what was put into it.

The ground truth is recorded by the generator (truth.json); these checks compare the
fit with it, not with an outside source (the outside checks of the model are in
unit/test_reml.py and end_to_end/test_reference_cli.py). The example is written, loaded
and fitted once per session (fixtures in tests/conftest.py) and shared read-only:

- the fit without permutations (``example_maps``): maps, region tables and the answers
  to the study's questions (symmetry, specificity, run quality);
- the sound contrast run with the study's own inference settings
  (``example_sound_run``): all 1024 sign flips.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from grouplevel.atlas import read_atlas
from grouplevel.inference.clusters import find_clusters
from grouplevel.regions import UNLABELLED, cluster_table, region_values
from grouplevel.specificity import (
    VERDICT_OFF_TARGET,
    VERDICT_PLUS_OFF_TARGET,
    VERDICT_SPECIFIC,
    artefact_rows,
    edge_shell,
    inner_layer,
    specificity,
)
from grouplevel.study import load_runs
from grouplevel.symmetry import BILATERAL_EQUIVALENT, NO_ACTIVATION, analyse_symmetry
from grouplevel.tables import restrict_atlas

AUDITORY = ("primary auditory area", "secondary auditory area")


@pytest.fixture(scope="module")
def fitted(example_folder, example_study, example_maps):
    truth = json.loads((example_folder / "truth.json").read_text())
    atlas = np.asarray(nib.load(str(example_folder / "atlas.nii.gz")).dataobj).astype(int)
    labels = pd.read_csv(example_folder / "atlas.tsv", sep="\t", dtype=str, keep_default_na=False)
    return example_maps, truth, atlas, labels, example_study


def _indices(labels: pd.DataFrame, names, hemisphere: str) -> list[int]:
    rows = labels[labels["name"].isin(names) & (labels["hemisphere"] == hemisphere)]
    return [int(i) for i in rows["index"]]


def test_sound_peaks_in_both_auditory_cortices(fitted):
    maps, _, atlas, labels, study = fitted
    sound = maps["sound"]
    t = sound.volume("t")
    x_mm = (np.indices(t.shape)[0] * study.grid.affine[0, 0]) + study.grid.affine[0, 3]
    for hemisphere, side in (("left", x_mm < 0), ("right", x_mm > 0)):
        peak = np.unravel_index(np.argmax(np.where(side, t, -np.inf)), t.shape)
        assert atlas[peak] in _indices(labels, AUDITORY, hemisphere), hemisphere
        assert t[peak] > 6.0


def test_paw_peaks_in_the_right_forelimb_area(fitted):
    maps, _, atlas, labels, _ = fitted
    t = maps["paw"].volume("t")
    peak = np.unravel_index(np.argmax(t), t.shape)
    assert atlas[peak] in _indices(labels, ("forelimb area",), "right")


def test_variance_components_near_the_generating_values(fitted):
    maps, truth, _, _, _ = fitted
    for name in ("sound", "paw"):
        gm = maps[name]
        # medians over ~29k voxels; the REML estimate of τ² from 10 animals is noisy per
        # voxel, but its median over the brain should be near the truth (our tolerance)
        assert np.median(gm.var_animal) == pytest.approx(truth["tau2"], rel=0.25)
        assert np.median(gm.var_run) == pytest.approx(truth["sigma2"], rel=0.25)


def test_excluded_runs_are_not_fitted(fitted):
    _, truth, _, _, study = fitted
    fl = next(f for f in study.first_levels if f.name == "sound")
    excluded = {(r["animal"], int(r["run"])) for _, r in fl.excluded.iterrows()}
    assert excluded == {(r["animal"], int(r["run"])) for r in truth["excluded_runs"]["runs"]}
    assert len(fl.runs) + len(fl.excluded) == sum(truth["runs_per_animal"].values())


def test_region_tables_name_the_auditory_clusters(fitted):
    # Without permutations the clusters are the connected groups of FDR survivors.
    maps, _, _, _, _ = fitted
    tables = maps["sound"].tables
    assert tables is not None and tables.method == "fdr"
    main = tables.clusters[tables.clusters["peak"] == 1]
    labelled = set(zip(main["peak_region"], main["peak_region_hemisphere"], strict=True))
    assert ("primary auditory area", "left") in labelled
    assert ("primary auditory area", "right") in labelled
    regions = tables.regions.set_index(["name", "hemisphere"])
    for hemisphere in ("left", "right"):
        row = regions.loc[("primary auditory area", hemisphere)]
        assert row["q"] < 0.05 and row["ci_low"] > 0
    assert set(tables.animals["animal"]) == {f"m{i:02d}" for i in range(1, 11)}
    paw = maps["paw"].tables.clusters
    top = paw[paw["peak"] == 1].sort_values("z", ascending=False).iloc[0]
    assert (top["peak_region"], top["peak_region_hemisphere"]) == ("forelimb area", "right")


def test_questions_answer_as_planted(fitted):
    # The generator planted equal left/right sound responses in the primary auditory
    # areas, a right-dominant response to the left paw, and a motion rim in m07's runs.
    maps, truth, _, _, _ = fitted
    sound, paw = maps["sound"].answers, maps["paw"].answers
    verdicts = sound.symmetry.set_index("region")["verdict"]
    assert verdicts["primary auditory area"] == "bilateral (equivalence shown)"
    row = paw.symmetry.set_index("region").loc["forelimb area"]
    assert row["verdict"] == "right-dominant" and row["side"] == "contralateral"
    assert sound.specificity.summary()["verdict"] == "specific to target"
    quality = sound.run_quality.table()
    motion = truth["motion"]["animal"]
    flagged = quality[quality["flagged"].astype(bool)]
    assert set(quality.loc[quality["animal"] == motion, "flagged"].astype(bool)) == {True}
    noisy = {(r["animal"], int(r["run"])) for r in truth["noisy_runs"]["runs"]}
    others = {
        (a, int(r)) for a, r in zip(flagged["animal"], flagged["run"], strict=True) if a != motion
    }
    assert others <= noisy  # the only other flags are the runs made noisy on purpose
    edge = quality.groupby("animal")["edge_score"].mean()
    assert edge.idxmax() == motion


# --------------------------------------------------------------------------------------
# symmetry: the answers of the fit, and two regions the study does not ask about
# --------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def unasked_symmetry(example_study, example_maps):
    """analyse_symmetry on regions outside the study's [questions]: the whole auditory
    cortex for sound, the primary auditory area for paw (same margin, 200 resamples)."""
    out = {}
    for name, region, side in (
        ("sound", "auditory cortex", None),
        ("paw", "primary auditory area", "left"),
    ):
        gm = example_maps[name]
        fl = next(f for f in example_study.first_levels if f.name == name)
        data = load_runs(example_study, fl)
        atlas = restrict_atlas(example_study.atlas, example_study.atlas_mask, gm.mask)
        present = np.isfinite(data.effect)
        vals, _ = region_values(data.effect, present, atlas.shares)
        (out[name],) = analyse_symmetry(
            [region],
            atlas,
            y=data.effect,
            present=present,
            animal=fl.design.animal,
            z=gm.z,
            effect=gm.effect,
            region_values=vals,
            rng=np.random.default_rng(0),
            variance=data.variance,
            var_run=gm.var_run,
            equivalence_margin=0.2,
            n_boot=200,
            stimulus_side=side,
        )
    return out


def test_example_sound_is_bilateral(example_study, example_maps, unasked_symmetry):
    # Ground truth (grouplevel.example): equal sound amplitudes in both primary auditory
    # areas. Margin ±0.2, a common convention for |LI| (value from memory).
    assert example_study.settings.questions_for("sound").equivalence_margin == 0.2
    a1 = example_maps["sound"].answers.symmetry.set_index("region").loc["primary auditory area"]
    assert a1["verdict"] == BILATERAL_EQUIVALENT
    assert a1["tost_p"] < 0.05 and a1["p"] > 0.05
    assert abs(a1["li_effect"]) < 0.2
    # The whole auditory cortex (primary + secondary area) dilutes the blob: both sides
    # active, no significant difference, but the margin is too narrow for equivalence.
    aud = unasked_symmetry["sound"]
    assert aud.verdict.label.startswith("bilateral")
    assert aud.verdict.numbers["left_active"] and aud.verdict.numbers["right_active"]


def test_example_paw_is_right_dominant_contralateral(example_maps, unasked_symmetry):
    # Ground truth: left forepaw, right forelimb area amplitude 1.2 vs left 0.4.
    fl = example_maps["paw"].answers.symmetry.set_index("region").loc["forelimb area"]
    assert fl["verdict"] == "right-dominant"
    assert fl["side"] == "contralateral"
    # li_effect_high is the upper end of the bootstrap interval of the effect LI
    assert fl["li_effect"] < -0.2 and fl["li_effect_high"] < 0
    assert fl["difference"] < 0 and fl["p"] < 0.05
    # the sound regions do not respond to the paw
    assert unasked_symmetry["paw"].verdict.label == NO_ACTIVATION


# --------------------------------------------------------------------------------------
# specificity of the sound response to auditory cortex alone (the study's targets also
# hold the inferior colliculus, so this is computed here)
# --------------------------------------------------------------------------------------


def test_example_sound_is_specific_to_auditory_cortex(example_study, example_maps):
    # "surviving" = FDR survivors (q ≤ 0.05, Benjamini & Hochberg 1995); permutations = 0
    study, gm = example_study, example_maps["sound"]
    fl = next(f for f in study.first_levels if f.name == "sound")
    data = load_runs(study, fl)
    atlas = restrict_atlas(study.atlas, study.atlas_mask, gm.mask)
    idx = np.argwhere(gm.mask)
    height = (idx @ gm.grid.affine[:3, :3].T + gm.grid.affine[:3, 3])[:, 2]
    surviving = np.nan_to_num(gm.inference.q, nan=1.0) <= 0.05
    targets = atlas.region_rows("auditory cortex")
    out = specificity(
        surviving,
        gm.z,
        gm.effect,
        atlas,
        targets,
        edge_shell(gm.mask),
        inner_layer(gm.mask),
        height,
        artefact_rows(atlas),
        data.effect,
        fl.design.matrix,
        fl.design.animal,
        [1.0],
    )
    assert all(t.startswith("auditory cortex") for t in out.targets)
    assert out.verdict != VERDICT_OFF_TARGET
    assert out.verdict in (VERDICT_SPECIFIC, VERDICT_PLUS_OFF_TARGET)
    assert out.target_share > 0.5
    assert out.difference > 0 and out.ci_low > 0
    assert not out.rim_rule
    names = set(out.table()["name"])
    assert "auditory cortex" in names


# --------------------------------------------------------------------------------------
# clusters at a fixed height threshold, labelled with the atlas
# --------------------------------------------------------------------------------------

#: z for two-sided p = 0.001 (standard normal table; common practice)
Z_THRESHOLD = 3.29


def _ancestors(atlas, name: str, hemisphere: str) -> set[str]:
    regions = atlas.regions.set_index("index")
    hit = atlas.regions[
        (atlas.regions["name"] == name) & (atlas.regions["hemisphere"] == hemisphere)
    ]
    node = int(hit["index"].iloc[0])
    names = set()
    while node != -1:
        names.add(regions.loc[node, "name"])
        node = int(regions.loc[node, "parent"])
    return names


def test_example_cohort_clusters_lie_in_the_planted_regions(example_study, example_maps):
    study = example_study
    settings = study.settings
    found = {}
    for gm in example_maps.values():
        atlas = read_atlas(settings.atlas.image, settings.atlas.labels, study.grid, gm.mask)
        assert atlas.coverage == 1.0  # the example atlas labels the whole brain
        z = gm.volume("z")
        clusters = find_clusters(z, gm.mask, Z_THRESHOLD, voxel_volume_mm3=study.grid.voxel_volume)
        table = cluster_table(
            clusters,
            z,
            gm.volume("t"),
            gm.volume("effect"),
            gm.mask,
            atlas,
            study.grid,
            settings.space.origin_mm,
            significant=np.ones(clusters.n_clusters, bool),
            p_extent=None,
            p_mass=None,
            q3d=gm.volume("q"),
        )
        found[gm.name] = (table, atlas)
    table, atlas = found["sound"]
    peaks = table[(table["peak"] == 1) & (table["sign"] == 1)]
    auditory = {
        side
        for name, side in zip(peaks["peak_region"], peaks["peak_region_hemisphere"], strict=True)
        if name != UNLABELLED and "auditory cortex" in _ancestors(atlas, name, side)
    }
    assert auditory == {"left", "right"}
    assert "inferior colliculus" in set(peaks["peak_region"])
    # the two largest clusters are the auditory cortices, one per side (ground truth)
    top = table[table["peak"] == 1].head(2)
    assert set(top["peak_region_hemisphere"]) == {"left", "right"}
    table, _ = found["paw"]
    strongest = table.loc[table["z"].abs().idxmax()]
    assert (strongest["peak_region"], strongest["peak_region_hemisphere"]) == (
        "forelimb area",
        "right",
    )
    assert strongest["peak_ML_mm"] > 0  # right of the midline in stereotaxic terms


# --------------------------------------------------------------------------------------
# run quality: the fit's answers (leave-one-animal-out maps, edge shell of 2 voxels,
# outlier z 3.5: the defaults the example keeps)
# --------------------------------------------------------------------------------------


def test_example_flags_the_motion_animal_and_the_noisy_runs(
    example_folder, example_study, example_maps
):
    truth = json.loads((example_folder / "truth.json").read_text())
    # the answers were made with the settings this check was written for
    questions = example_study.settings.questions_for("sound")
    assert questions.edge_distance_voxels == 2 and questions.outlier_z == 3.5
    answers = example_maps["sound"].answers
    loo = answers.loo
    table = answers.run_quality.table()
    key = list(zip(table["animal"], table["run"].astype(int), strict=True))
    motion = {(r["animal"], r["run"]) for r in truth["motion"]["runs"]}
    noisy = {(r["animal"], r["run"]) for r in truth["noisy_runs"]["runs"]}
    flagged = {k for k, f in zip(key, table["flagged"], strict=True) if f}
    # every run of the motion animal, and besides them exactly the runs the generator made
    # noisy (first-level variance × 4, flagged for their mean variance)
    assert flagged == motion | noisy
    is_motion = np.array([k in motion for k in key])
    is_noisy = np.array([k in noisy for k in key])
    assert (table["z_edge"][is_motion] > 3.5).all()
    assert table["edge_score"][is_motion].min() > 1.3 * table["edge_score"][~is_motion].max()
    assert (table["z_variance"][is_noisy] > 3.5).all()
    assert (np.abs(table["z_edge"][~is_motion]) <= 3.5).all()
    # the LOO maps: removing the motion animal changes the t map most
    assert loo.animal_ids[int(np.argmin(loo.correlation))] == truth["motion"]["animal"]


# --------------------------------------------------------------------------------------
# the exact permutation test: 1024 exhaustive sign flips (the study file's settings)
# --------------------------------------------------------------------------------------

_P_MAPS = {
    "voxel": "p_fwe_voxel",
    "cluster extent": "p_fwe_cluster",
    "cluster mass": "p_fwe_cluster_mass",
    "tfce": "p_fwe_tfce",
}


@pytest.mark.slow
def test_example_sound_contrast_finds_both_auditory_cortices(example_sound_run):
    """The example plants equal sound effects (amplitude 1.2) in both primary auditory
    areas (truth.json). Measured with the default seed, 1024 exhaustive flips, two-sided,
    cluster-forming p = 0.001: significant voxels (p_FWE < 0.05) inside the left / right
    auditory cortex (A1 + A2 labels): voxel max-stat 18 / 23, cluster extent 51 / 49,
    cluster mass 51 / 49, TFCE 88 / 93; none in the motor cortex (no planted effect).
    The run (fit_study + write_outputs, as run_study) is the session's
    ``example_sound_run``; its in-memory maps are kept to cross-check the written files."""
    folder, out = example_sound_run.study_folder, example_sound_run.out
    gm = example_sound_run.maps["sound"]
    perm = gm.inference.permutation
    assert perm.scheme.exhaustive and perm.scheme.n == 2**10

    def image(path: Path) -> np.ndarray:
        return np.asarray(nib.load(str(path)).dataobj)

    atlas = image(folder / "atlas.nii.gz").astype(int)
    table = pd.read_csv(folder / "atlas.tsv", sep="\t")
    truth = json.loads((folder / "truth.json").read_text())
    planted = {(e["abbreviation"], e["hemisphere"]) for e in truth["effects"]}
    assert {("A1", "left"), ("A1", "right")} <= planted
    by_abbr = table.set_index(["abbreviation", "hemisphere"])["index"]
    p_maps = {k: image(out / "sound" / f"{stem}.nii.gz") for k, stem in _P_MAPS.items()}
    # the written maps hold the engine's values (float32 on disk)
    assert np.allclose(p_maps["voxel"][gm.mask], perm.p_fwe_voxel, atol=1e-6)
    assert np.allclose(p_maps["tfce"][gm.mask], perm.p_fwe_tfce, atol=1e-6)
    counts = {}
    for hemisphere in ("left", "right"):
        auditory = np.isin(atlas, [by_abbr[("A1", hemisphere)], by_abbr[("A2", hemisphere)]])
        for method, vol in p_maps.items():
            counts[(method, hemisphere)] = int((vol[auditory & gm.mask] < 0.05).sum())
    assert all(n >= 10 for n in counts.values()), counts
    # no effect was planted in the motor cortex: nothing survives there
    motor = np.isin(atlas, [by_abbr[("Mot", "left")], by_abbr[("Mot", "right")]])
    assert all(int((vol[motor & gm.mask] < 0.05).sum()) == 0 for vol in p_maps.values())
    # the summary reports the same survivors
    surviving = json.loads((out / "summary.json").read_text())["results"]["sound"]
    surviving = surviving["inference"]["permutation"]["surviving"]
    assert surviving["voxel"] == int((perm.p_fwe_voxel <= 0.05).sum()) >= 41
    assert surviving["tfce"] == int((perm.p_fwe_tfce <= 0.05).sum()) >= 181
