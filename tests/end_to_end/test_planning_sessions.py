"""Planning from an analysis that fitted sessions as their own level.

Outside references used here:
- statsmodels ``MixedLM`` (REML; Seabold & Perktold 2010) with a variance component for
  sessions within animals (``vc_formula``), fitted to a region's run averages computed
  here with plain numpy: τ², ω², σ² of regions.tsv to 1e-3 relative;
- the variance of the grand mean of a balanced nested design,
  σ²_a/A + σ²_s/(A·S) + σ²_r/(A·S·R) (common practice, any textbook of nested analysis of
  variance): the plan's SE at the study's own design equals regions.tsv's model-based SE.
"""

from __future__ import annotations

import json
import re
import shutil
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from grouplevel.outputs.records import read_plans
from grouplevel.pipeline import run_study
from grouplevel.planning import SESSION_GRID_COLUMNS, plan_from_output, write_plan
from grouplevel.report.render import _plan as _plan_section
from tests.conftest import save

SHAPE = (6, 7, 5)
AFFINE = np.diag([0.3, 0.3, 0.3, 1.0])
ANIMALS, SESSIONS, RUNS = 6, 3, 2
TARGET = (slice(1, 4), slice(2, 5), slice(1, 4))


@pytest.fixture(scope="module")
def session_output(tmp_path_factory) -> tuple[Path, pd.DataFrame]:
    """A tiny invented study (6 animals × 3 sessions × 2 runs, one target region),
    analysed once without permutations; returns the output folder and the runs' target
    averages."""
    folder = tmp_path_factory.mktemp("sessions")
    rng = np.random.default_rng(31)
    rows, averages = [], []
    for a in range(ANIMALS):
        u = rng.normal(0, 1.0, SHAPE)
        for s in range(SESSIONS):
            w = rng.normal(0, 0.8, SHAPE)
            for r in range(RUNS):
                data = 0.6 + u + w + rng.normal(0, 0.5, SHAPE)
                path = save(folder / "maps" / f"a{a}_s{s}_r{r}.nii.gz", data, AFFINE)
                rows.append(
                    {
                        "animal": f"a{a}",
                        "session": f"d{s}",
                        "run": r + 1,
                        "effect": str(path.relative_to(folder)),
                    }
                )
                averages.append(
                    {"animal": a, "session": a * SESSIONS + s, "y": data[TARGET].mean()}
                )
    pd.DataFrame(rows).to_csv(folder / "runs.tsv", sep="\t", index=False)
    labels = np.full(SHAPE, 2.0)
    labels[TARGET] = 1.0
    save(folder / "atlas.nii.gz", labels, AFFINE)
    (folder / "atlas.tsv").write_text(
        "index\tname\tabbreviation\themisphere\n1\ttarget\tTG\tboth\n2\trest\tRE\tboth\n"
    )
    (folder / "study.toml").write_text(
        '[study]\ntable = "runs.tsv"\n\n[inference]\npermutations = 0\n\n'
        '[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\nmidline_mm = 0.0\n\n'
        '[model]\nformula = "1"\n'
    )
    out = run_study(folder / "study.toml", folder / "out")
    return out, pd.DataFrame(averages)


def test_regions_table_has_the_session_level(session_output):
    out, averages = session_output
    regions = pd.read_csv(out / "mean" / "regions.tsv", sep="\t")
    row = regions[regions["name"] == "target"].iloc[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm(
            "y ~ 1",
            averages,
            groups="animal",
            re_formula="1",
            vc_formula={"session": "0 + C(session)"},
        ).fit(reml=True, method=["lbfgs"], gtol=1e-10)
    # statsmodels MixedLM (REML) with a session variance component, on the region's run
    # averages: τ², ω², σ² and the mean to 1e-3 relative
    np.testing.assert_allclose(row["var_animal"], ref.cov_re.iloc[0, 0], rtol=1e-3)
    np.testing.assert_allclose(row["var_session"], ref.vcomp[0], rtol=1e-3)
    np.testing.assert_allclose(row["var_run"], ref.scale, rtol=1e-3)
    np.testing.assert_allclose(row["effect"], ref.fe_params["Intercept"], rtol=1e-6)
    assert row["df"] == ANIMALS - 1


def test_plan_over_sessions(session_output, tmp_path):
    out, _ = session_output
    plans = plan_from_output(out, regions=["target"], effect=0.5, cost_session=3.0)
    assert len(plans) == 1
    plan = plans[0]
    assert set(SESSION_GRID_COLUMNS) <= set(plan.grid.columns)
    regions = pd.read_csv(out / "mean" / "regions.tsv", sep="\t")
    row = regions[regions["name"] == "target"].iloc[0]
    inputs = plan.inputs
    assert inputs["var_session"] == pytest.approx(row["var_session"], rel=1e-12)
    assert inputs["sessions_per_animal"] == SESSIONS
    assert inputs["runs_per_session"] == RUNS
    # balanced nested design (common practice): SE² = τ²/A + ω²/(A S) + σ²/(A S R) — the
    # GLS SE of the region's mean in regions.tsv
    assert inputs["se_of_this_study"] == pytest.approx(row["se"], rel=1e-6)
    textbook = (
        row["var_animal"] / ANIMALS
        + row["var_session"] / (ANIMALS * SESSIONS)
        + row["var_run"] / (ANIMALS * SESSIONS * RUNS)
    )
    assert inputs["se_of_this_study"] ** 2 == pytest.approx(textbook, rel=1e-12)
    best = plan.cheapest
    assert best is not None and best["power"] >= 0.8
    # cost = A (cost_animal + S (cost_session + R cost_run)), defaults 10 and 1
    cost = best["animals"] * (10.0 + best["sessions"] * (3.0 + best["runs"]))
    assert best["cost"] == pytest.approx(cost)
    # written: power.tsv with the sessions column, the plan in summary.json
    copy = tmp_path / "out"
    shutil.copytree(out, copy)
    write_plan(copy, plans)
    table = pd.read_csv(copy / "mean" / "power.tsv", sep="\t")
    assert {"sessions", "power_one_more_session", "power_same_runs_in_sessions"} <= set(table)
    # the plan is kept in plan.json (summary.json is never rewritten after the run)
    entry = read_plans(copy)["mean"]["regions"][0]
    assert entry["runs_are"] == "runs per session"
    assert "session variance" in entry["caution"]
    # the report's planning rows name sessions and what one more session buys
    summary = json.loads((copy / "summary.json").read_text())
    (report_row,) = _plan_section(copy, "mean", summary)["rows"]
    assert (
        re.search(r" sessions? × ", report_row["best"])
        and "one more session:" in report_row["best"]
    )
    assert "3 sessions each of 2 runs" in report_row["now"]


def test_report_words_for_the_session_level():
    from grouplevel.report.render import _more_levels_text

    text = _more_levels_text(
        {
            "animal": {"median": 1.0},
            "run": {"median": 0.5},
            "session": {"median": 0.25},
            "cov[drug[T.on]]": {"median": 0.1},
            "slope[drug[T.on]]": {"median": 0.4},
            "slope[drug[T.on]][wt]": {"median": None},
        }
    )
    assert "ω² (between sessions of one animal" in text and "median 0.25" in text
    assert "variance of the drug[T.on] slope (how much the animals' own" in text
    assert "drug[T.on] slope in group wt" in text and "median n/a" in text
    assert "cov" not in text
    assert _more_levels_text({"animal": {"median": 1.0}, "run": {"median": 0.5}}) == ""


@pytest.fixture(scope="module")
def slope_output(tmp_path_factory) -> tuple[Path, pd.DataFrame]:
    """6 animals × 2 days (drug off, drug on) × 3 runs whose drug effect differs between
    animals; analysed once with the default random slope, without permutations."""
    folder = tmp_path_factory.mktemp("slope")
    rng = np.random.default_rng(32)
    rows, averages = [], []
    for a in range(ANIMALS):
        u0, u1 = rng.normal(0, 1.0, SHAPE), rng.normal(0, 0.7, SHAPE)
        for day, drug in ((1, "off"), (2, "on")):
            for r in range(3):
                data = u0 + (0.5 + u1) * (drug == "on") + rng.normal(0, 0.5, SHAPE)
                path = save(folder / "maps" / f"a{a}_d{day}_r{r}.nii.gz", data, AFFINE)
                rows.append(
                    {
                        "animal": f"a{a}",
                        "session": f"d{day}",
                        "run": r + 1,
                        "drug": drug,
                        "effect": str(path.relative_to(folder)),
                    }
                )
                averages.append({"animal": a, "on": float(drug == "on"), "y": data[TARGET].mean()})
    pd.DataFrame(rows).to_csv(folder / "runs.tsv", sep="\t", index=False)
    labels = np.full(SHAPE, 2.0)
    labels[TARGET] = 1.0
    save(folder / "atlas.nii.gz", labels, AFFINE)
    (folder / "atlas.tsv").write_text(
        "index\tname\tabbreviation\themisphere\n1\ttarget\tTG\tboth\n2\trest\tRE\tboth\n"
    )
    (folder / "study.toml").write_text(
        '[study]\ntable = "runs.tsv"\n\n[inference]\npermutations = 0\n\n'
        '[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\nmidline_mm = 0.0\n\n'
        '[model]\nformula = "1 + drug"\n\n'
        '[[contrast]]\nname = "drug_effect"\nweights = { "drug[T.on]" = 1 }\n'
    )
    out = run_study(folder / "study.toml", folder / "out")
    return out, pd.DataFrame(averages)


def test_region_table_and_plan_of_a_within_animal_effect(slope_output):
    out, averages = slope_output
    regions = pd.read_csv(out / "drug_effect" / "regions.tsv", sep="\t")
    row = regions[regions["name"] == "target"].iloc[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm("y ~ on", averages, groups="animal", re_formula="1 + on").fit(
            reml=True, method=["lbfgs"], gtol=1e-10
        )
    # statsmodels MixedLM (REML) with a random drug slope, on the region's run averages:
    # the drug effect and the slope variance to 1e-3 relative (the same model as the
    # voxels, so regions.tsv no longer tests the drug effect against run-to-run noise)
    np.testing.assert_allclose(row["effect"], ref.fe_params["on"], rtol=1e-6)
    np.testing.assert_allclose(row["var_slope_drug_T.on"], ref.cov_re.iloc[1, 1], rtol=1e-3)
    np.testing.assert_allclose(row["var_run"], ref.scale, rtol=1e-3)
    # the slope df (containment): animals − 1, the paired comparison of the animals
    assert row["df"] == ANIMALS - 1
    plans = plan_from_output(out, regions=["target"], effect=0.5)
    (plan,) = [p for p in plans if p.name == "drug_effect"]
    inputs = plan.inputs
    assert inputs["var_animal"] == pytest.approx(row["var_slope_drug_T.on"], rel=1e-12)
    assert "held at the study's 2 per animal" in inputs["layout_note"]
    # balanced paired design (common practice): SE² of the mean difference =
    # (τ²_slope + σ²/3 + σ²/3) / A with 3 runs per day — regions.tsv's model-based SE
    textbook = (row["var_slope_drug_T.on"] + 2 * row["var_run"] / 3) / ANIMALS
    assert inputs["se_of_this_study"] ** 2 == pytest.approx(textbook, rel=1e-9)
    assert inputs["se_of_this_study"] == pytest.approx(row["se"], rel=1e-6)
    assert set(plan.grid["sessions"]) == {2}
    # sessions held: what another session buys is not claimed
    assert "power_one_more_session" not in plan.grid.columns
    assert "variance of the animals' own drug[T.on] effects" in plan.caution
