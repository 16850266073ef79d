"""Planning from a finished output folder (grouplevel.planning.plan_from_output).

Outside references used here:
- the region table (regions.tsv) of the analysis the plan reads;
- the variance maps of the invented example study read with nibabel and averaged over
  an atlas label with plain numpy (the first-level variance of a region average with
  fully correlated noise: the squared mean standard error; Borenstein et al. 2009,
  Introduction to Meta-Analysis, ch. 24, from memory).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from grouplevel.errors import UserError
from grouplevel.planning import GRID_COLUMNS, design_power, plan_from_output, write_plan

# The analysis includes the exact permutation test of the example (the slowest fixture).
pytestmark = pytest.mark.slow

# --------------------------------------------------------------------------------------
# plan_from_output on the invented example study
# --------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def example_outputs(tmp_path_factory, example_sound_run):
    """The example's sound contrast analysed once, and copies of its output with edited
    summaries.

    The analysis is the session's ``example_sound_run`` (tests/conftest.py): the
    ``sound`` contrast only, without the study's ``[questions]`` tables (planning reads
    none of their results), with the study's permutations (planning reads none of
    them either). The copies differ only in ``summary.json``: ``targeted`` has the
    example's targets back, ``known`` says σ² was fixed at 0 (``run_variance =
    "known"``). The copies keep the regions table of the analysis: enough to test how the
    mean first-level variance is read from the run maps, without a second run.
    """
    root = tmp_path_factory.mktemp("plan")
    plain = example_sound_run.out  # shared: read only

    def copy(name: str, edit) -> Path:
        folder = root / name
        shutil.copytree(plain, folder)
        summary = json.loads((folder / "summary.json").read_text())
        edit(summary["settings"])
        (folder / "summary.json").write_text(json.dumps(summary))
        return folder

    def targets(settings):
        settings["questions"]["targets"] = ["auditory cortex", "inferior colliculus"]

    def known(settings):
        settings["model"]["run_variance"] = "known"

    return copy("targeted", targets), copy("known", known), plain


def test_plan_from_output_targets_from_the_settings(example_outputs):
    out = example_outputs[0]
    plans = plan_from_output(out)
    # the example's [questions] targets for sound: auditory cortex and inferior
    # colliculus, both hemispheres each
    assert [(p.name, p.region, p.hemisphere) for p in plans] == [
        ("sound", "auditory cortex", "left"),
        ("sound", "auditory cortex", "right"),
        ("sound", "inferior colliculus", "left"),
        ("sound", "inferior colliculus", "right"),
    ]
    for plan in plans:
        table = pd.read_csv(out / plan.name / "regions.tsv", sep="\t")
        row = table[table["index"] == plan.region_index].iloc[0]
        assert plan.inputs["effect"] == pytest.approx(row["effect"], rel=1e-12)
        assert plan.inputs["var_animal"] == pytest.approx(row["var_animal"], rel=1e-12)
        assert plan.inputs["var_run"] == pytest.approx(row["var_run"], rel=1e-12)
        # σ² estimated: region averages were fitted without first-level variances
        assert plan.inputs["mean_first_level_variance"] == 0.0
        assert "Hoenig & Heisey 2001" in plan.caution
        assert "optimistic" in plan.caution


def test_plan_from_output_contrast_targets_and_given_regions_take_precedence(
    example_outputs, tmp_path
):
    # a [questions.<contrast>] table overrides the study-wide targets; regions named in
    # the call override both
    out = tmp_path / "by_contrast"
    shutil.copytree(example_outputs[0], out)
    summary = json.loads((out / "summary.json").read_text())
    summary["settings"]["questions_by_contrast"] = {"sound": {"targets": ["S1FL"]}}
    (out / "summary.json").write_text(json.dumps(summary))
    plans = plan_from_output(out)
    assert [(p.region, p.hemisphere) for p in plans] == [
        ("forelimb area", "left"),
        ("forelimb area", "right"),
    ]
    plans = plan_from_output(out, regions="inferior colliculus")
    assert [p.region for p in plans] == ["inferior colliculus"] * 2


def test_plan_from_output_without_targets_takes_smallest_p(example_outputs):
    _, _, out = example_outputs
    plans = plan_from_output(out)
    assert [p.name for p in plans] == ["sound"]
    for plan in plans:
        table = pd.read_csv(out / plan.name / "regions.tsv", sep="\t")
        row = table.loc[table["p"].idxmin()]
        assert (plan.region, plan.hemisphere) == (row["name"], row["hemisphere"])


def test_plan_from_output_numbers(example_outputs):
    out = example_outputs[0]
    plans = plan_from_output(out, regions=["auditory cortex", "IC"], effect=0.08)
    assert {(p.region, p.hemisphere) for p in plans if p.name == "sound"} == {
        ("auditory cortex", "left"),
        ("auditory cortex", "right"),
        ("inferior colliculus", "left"),
        ("inferior colliculus", "right"),
    }
    for plan in plans:
        g = plan.grid
        assert np.all(np.isfinite(g[list(GRID_COLUMNS)].to_numpy(dtype=float)))
        power = g.pivot(index="animals", columns="runs", values="power").to_numpy()
        # power rises with animals and with runs (non-decreasing; strictly when σ² > 0)
        assert np.all(np.diff(power, axis=0) > 0)
        assert np.all(np.diff(power, axis=1) >= 0)
        if plan.inputs["var_run"] > 0:
            assert np.all(np.diff(power, axis=1) > 0)
        assert plan.inputs["effect_source"] == "given" and plan.inputs["effect"] == 0.08
        assert "given by the user" in plan.caution
        if plan.cheapest is not None:
            feasible = g[g["power"] >= 0.8]
            assert float(plan.cheapest["cost"]) == pytest.approx(feasible["cost"].min())
        s = plan.summary()
        assert json.loads(json.dumps(s)) == s  # plain JSON types only
    # the study's own design (10 animals, 3.3 runs each) lies between grid points:
    # its power is bracketed by 10 animals × 3 runs and 10 animals × 4 runs
    p = plans[0]
    at = p.grid.set_index(["animals", "runs"])["power"]
    assert at[(10, 3)] <= p.inputs["power_of_this_study"] <= at[(10, 4)]


def test_plan_se_matches_region_table_at_the_study_design(example_outputs):
    # Consistency of the s̄² choice with the region table: at the study's own design the
    # planned SE is close to the fitted SE of regions.tsv (not equal: 2 to 5 runs per
    # animal are not 3.3 each). Internal check, tolerance 20%.
    out = example_outputs[0]
    for plan in plan_from_output(out, regions=["auditory cortex", "forelimb area"]):
        table = pd.read_csv(out / plan.name / "regions.tsv", sep="\t")
        row = table[table["index"] == plan.region_index].iloc[0]
        se = design_power(
            plan.inputs["effect"],
            plan.inputs["var_animal"],
            plan.inputs["var_run"],
            plan.inputs["mean_first_level_variance"],
            plan.inputs["animals"],
            plan.inputs["runs_per_animal"],
        )["se"]
        assert float(se) == pytest.approx(row["se"], rel=0.2)


def test_plan_known_run_variance_reads_first_level_variance(example_outputs):
    # σ² fixed at 0: s̄² is the mean over runs of the region's squared mean standard error,
    # recomputed here from the variance maps with nibabel and numpy.
    out = example_outputs[1]
    summary = json.loads((out / "summary.json").read_text())
    plan = plan_from_output(out, regions=["primary auditory area"])[0]
    assert plan.name == "sound" and plan.hemisphere == "left"
    atlas_path = next(i["path"] for i in summary["inputs"] if i["role"] == "atlas image")
    labels = np.asarray(nib.load(atlas_path).dataobj)
    mask = np.asarray(nib.load(out / "sound" / "mask.nii.gz").dataobj) > 0
    region = (labels == plan.region_index) & mask
    paths = [
        i["path"]
        for i in summary["inputs"]
        if i["role"].startswith("variance") and "_sound_" in i["path"]
    ]
    assert len(paths) == summary["results"]["sound"]["runs"]
    per_run = [np.mean(np.sqrt(np.asarray(nib.load(p).dataobj)[region])) ** 2 for p in paths]
    assert plan.inputs["mean_first_level_variance"] == pytest.approx(np.mean(per_run), rel=1e-5)
    assert plan.inputs["mean_first_level_variance"] > 0


def test_write_plan(example_outputs, tmp_path):
    out = example_outputs[0]
    plans = plan_from_output(out, regions=["auditory cortex"], effect=0.1, cost_animal=5.0)
    record = (out / "summary.json").read_bytes()
    written = write_plan(out, plans)
    names = {p.name for p in plans}
    assert {w.name for w in written} == {"power.tsv", "power.png", "plan.json"}
    # summary.json is the record of the analysis: planning adds plan.json beside it
    assert (out / "summary.json").read_bytes() == record
    assert len(written) == 2 * len(names) + 1
    for name in names:
        tsv = pd.read_csv(out / name / "power.tsv", sep="\t")
        ours = [p for p in plans if p.name == name]
        assert len(tsv) == sum(len(p.grid) for p in ours)
        np.testing.assert_allclose(
            tsv["power"], np.concatenate([p.grid["power"] for p in ours]), rtol=1e-5
        )
        assert (out / name / "power.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    kept = json.loads((out / "plan.json").read_text())["plans"]
    assert set(kept) == names
    first = kept[plans[0].name]["regions"][0]
    assert first["inputs"]["cost_animal"] == 5.0 and first["inputs"]["effect"] == 0.1
    assert not list(out.glob(".*.partial"))  # no temporary files left behind


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"regions": ["barrel field"]}, "not a region"),
        ({"alpha": 0.0}, "alpha"),
        ({"target_power": 1.5}, "target power"),
        ({"cost_animal": 0.0, "cost_run": 0.0}, "both 0"),
        ({"cost_run": -1.0}, "cost per run"),
        ({"effect": 0.0}, "effect"),
    ],
)
def test_plan_from_output_user_errors(example_outputs, kwargs, message):
    out = example_outputs[0]
    with pytest.raises(UserError, match=message):
        plan_from_output(out, **kwargs)


def test_plan_known_run_variance_refuses_changed_maps(example_outputs, tmp_path):
    # A run map whose sha256 differs from the one recorded at analysis time is refused.
    out = tmp_path / "changed"
    shutil.copytree(example_outputs[1], out)
    summary = json.loads((out / "summary.json").read_text())
    entry = next(i for i in summary["inputs"] if i["role"].startswith("variance"))
    entry["sha256"] = "0" * 64
    (out / "summary.json").write_text(json.dumps(summary))
    with pytest.raises(UserError, match="changed since the analysis"):
        plan_from_output(out, regions=["primary auditory area"])
