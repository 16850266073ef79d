"""The invented example cohort, fitted end to end, finds what was put into it.

The ground truth is recorded by the generator (truth.json); these checks compare the
fit with it, not with an outside source (the outside checks of the model are in
test_reml.py and test_reference_cli.py).
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

import grouplevel
from grouplevel.example import write_example

AUDITORY = ("primary auditory area", "secondary auditory area")


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    folder = tmp_path_factory.mktemp("example")
    toml = write_example(folder)
    study = grouplevel.load_study(toml, permutations=0)
    maps, _ = grouplevel.fit_study(study)
    truth = json.loads((folder / "truth.json").read_text())
    atlas = np.asarray(nib.load(str(folder / "atlas.nii.gz")).dataobj).astype(int)
    labels = pd.read_csv(folder / "atlas.tsv", sep="\t", dtype=str, keep_default_na=False)
    return {m.name: m for m in maps}, truth, atlas, labels, study


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
