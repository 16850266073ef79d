"""Power over animals × runs (grouplevel.planning) against outside references.

Outside references used here:
- statsmodels ``TTestPower`` (statsmodels.stats.power; Seabold & Perktold 2010, Proc 9th
  Python in Science Conf): power of the one-sample t test from the noncentral t
  distribution, effect size d and nobs;
- Monte Carlo: studies drawn from the run-within-animal model with known τ², σ², s² and
  effect, each fitted with grouplevel.model.fit_reml + test_contrast on the
  between-animal df, the rejection rate compared with the predicted power within a
  binomial tolerance (a simulation, independent of the power formula);
- the definition of the noncentral t distribution integrated numerically with scipy
  (Johnson, Kotz & Balakrishnan 1995, Continuous Univariate Distributions vol. 2,
  ch. 31; from memory), where statsmodels gives NaN far in a tail;
- brute-force enumeration of a small grid for the cheapest design;
- the variance maps of the invented example study read with nibabel and averaged over
  an atlas label with plain numpy (the first-level variance of a region average with
  fully correlated noise: the squared mean standard error; Borenstein et al. 2009,
  Introduction to Meta-Analysis, ch. 24, from memory).
"""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats
from statsmodels.stats.power import TTestPower

from grouplevel.errors import UserError
from grouplevel.example import write_example
from grouplevel.model import fit_reml, test_contrast
from grouplevel.pipeline import run_study
from grouplevel.planning import (
    GRID_COLUMNS,
    cheapest_design,
    design_power,
    plan_from_output,
    power_grid,
    write_plan,
)

# --------------------------------------------------------------------------------------
# Power formula against statsmodels
# --------------------------------------------------------------------------------------


def _power_by_integration(nc: float, df: float, alpha: float, sided: str) -> float:
    """Power from the definition T = (Z + λ) / sqrt(W / df), Z ~ N(0, 1), W ~ χ²(df):
    P(T > c) = E_W[Φ(λ - c sqrt(W / df))] (Johnson, Kotz & Balakrishnan 1995, Continuous
    Univariate Distributions vol. 2, ch. 31; from memory), integrated with scipy quad."""
    level = alpha / 2 if sided == "two" else alpha
    c = stats.t.ppf(1 - level, df)

    def upper(lam: float) -> float:
        f = lambda w: stats.norm.cdf(lam - c * math.sqrt(w / df)) * stats.chi2.pdf(w, df)  # noqa: E731
        return integrate.quad(f, 0, np.inf, limit=200)[0]

    if sided == "two":
        return upper(nc) + upper(-nc)
    return upper(nc) if sided == "positive" else upper(-nc)


@pytest.mark.parametrize(
    ("sided", "alternative"),
    [("two", "two-sided"), ("positive", "larger"), ("negative", "smaller")],
)
def test_power_equals_statsmodels_ttestpower(sided, alternative):
    # statsmodels TTestPower().power (statsmodels.stats.power): one-sample t test with
    # df = nobs - 1 and noncentrality d * sqrt(nobs); tolerance 1e-6.
    var_animal, var_run, first_level = 0.03, 0.02, 0.01
    compared = 0
    for effect in (-0.25, -0.05, 0.0, 0.02, 0.08, 0.2, 0.6):
        grid = power_grid(
            effect,
            var_animal,
            var_run,
            first_level,
            animals=[2, 3, 5, 8, 13, 24, 60],
            runs=[1, 2, 5, 9],
            alpha=0.05,
            sided=sided,
        )
        v = var_animal + (var_run + first_level) / grid["runs"].to_numpy()
        d = effect / np.sqrt(v)
        expected = [
            TTestPower().power(effect_size=di, nobs=n, alpha=0.05, alternative=alternative)
            for di, n in zip(d, grid["animals"], strict=True)
        ]
        expected = np.asarray(expected, dtype=float)
        # statsmodels returns NaN far in the lower tail (scipy's nct.cdf fails there);
        # those designs are checked against the definition of the noncentral t instead
        finite = np.isfinite(expected)
        compared += int(finite.sum())
        np.testing.assert_allclose(grid["power"][finite], expected[finite], atol=1e-6, rtol=0)
        assert np.all(grid["noncentrality"].abs()[~finite] > 8)
        for i in np.flatnonzero(~finite):
            row = grid.iloc[i]
            ref = _power_by_integration(row["noncentrality"], row["df"], 0.05, sided)
            assert row["power"] == pytest.approx(ref, abs=1e-6)
        np.testing.assert_allclose(grid["df"], grid["animals"] - 1)
        np.testing.assert_allclose(grid["se"], np.sqrt(v / grid["animals"]), rtol=1e-12)
    assert compared >= 150  # of 196 designs


def test_power_equals_statsmodels_other_alpha_and_unit_variance():
    # statsmodels TTestPower: with v = 1 the effect is Cohen's d itself; alpha 0.01.
    for d in (0.1, 0.5, 0.8, 1.2, 2.5):
        for n in (3, 4, 10, 30):
            ours = design_power(d, 1.0, 0.0, 0.0, n, 1, alpha=0.01)["power"]
            ref = TTestPower().power(effect_size=d, nobs=n, alpha=0.01, alternative="two-sided")
            assert float(ours) == pytest.approx(ref, abs=1e-6)


def test_power_far_in_the_tail_is_finite():
    # Very large noncentrality: the two-sided power is 1 to double precision, and for an
    # effect of 0 it is alpha exactly (the size of the test; Cohen 1988, ch. 2).
    big = design_power(5.0, 1e-4, 1e-3, 0.0, np.arange(2, 40), 8)["power"]
    assert np.all(np.isfinite(big))
    np.testing.assert_allclose(big[10:], 1.0, atol=1e-12)
    null = design_power(0.0, 0.1, 0.1, 0.1, np.arange(2, 40), 3, alpha=0.05)["power"]
    np.testing.assert_allclose(null, 0.05, atol=1e-9)


def test_grid_layout_and_monotone():
    grid = power_grid(0.1, 0.02, 0.03, 0.01)
    assert tuple(grid.columns) == GRID_COLUMNS
    # default grid: 4..24 animals × 1..8 runs (module constants), animals slowest
    assert len(grid) == 21 * 8
    assert grid["animals"].iloc[0] == 4 and grid["runs"].iloc[1] == 2
    table = grid.pivot(index="animals", columns="runs", values="power").to_numpy()
    # power rises with animals and runs (a positive effect and v falling in both)
    assert np.all(np.diff(table, axis=0) > 0)
    assert np.all(np.diff(table, axis=1) > 0)


@pytest.mark.parametrize(
    "kwargs",
    [
        {"animals": [1, 4]},
        {"runs": [0, 1]},
        {"runs": [1.5]},
        {"animals": [4, 4]},
        {"alpha": 1.2},
        {"sided": "both"},
    ],
)
def test_power_grid_rejects_bad_arguments(kwargs):
    with pytest.raises(ValueError):
        power_grid(0.1, 0.02, 0.03, 0.01, **kwargs)


def test_power_grid_rejects_bad_variances():
    with pytest.raises(ValueError, match="var_animal"):
        power_grid(0.1, -0.01, 0.03, 0.01)
    with pytest.raises(ValueError, match="all 0"):
        power_grid(0.1, 0.0, 0.0, 0.0)


# --------------------------------------------------------------------------------------
# Power formula against simulation with the project's own REML fit
# --------------------------------------------------------------------------------------

#: Simulated studies per design point: binomial SD of a rejection rate near 0.5 is 0.0065.
N_SIMULATED = 6000


@pytest.mark.parametrize(
    ("animals", "runs", "effect"),
    [(6, 3, 0.8), (10, 2, 0.6), (8, 4, 0.55), (5, 1, 1.0), (6, 3, 0.0)],
)
def test_power_matches_simulated_rejection_rate(animals, runs, effect):
    # Monte Carlo of y_k = effect + u_a + e_k, u ~ N(0, τ²), e ~ N(0, σ² + s²), fitted by
    # REML (each simulated study one "voxel") and tested on animals - 1 df at α = 0.05.
    # Tolerance: 4 binomial standard deviations of the rejection rate.
    var_animal, var_run, first_level = 0.4, 0.3, 0.1
    rng = np.random.default_rng(20261202 + 7 * animals + runs)
    animal = np.repeat(np.arange(animals), runs)
    u = rng.normal(0.0, math.sqrt(var_animal), (animals, N_SIMULATED))
    e = rng.normal(0.0, math.sqrt(var_run + first_level), (animals * runs, N_SIMULATED))
    y = effect + u[animal] + e
    fit = fit_reml(y, np.full_like(y, first_level), np.ones((animals * runs, 1)), animal)
    result = test_contrast(fit, np.array([1.0]), np.full(N_SIMULATED, animals - 1.0))
    rate = float(np.mean(result.p < 0.05))
    predicted = float(
        design_power(effect, var_animal, var_run, first_level, animals, runs)["power"]
    )
    sd = math.sqrt(predicted * (1 - predicted) / N_SIMULATED)
    assert abs(rate - predicted) <= 4 * sd, (rate, predicted)


# --------------------------------------------------------------------------------------
# Cheapest design against brute force
# --------------------------------------------------------------------------------------


def _brute_force(grid: pd.DataFrame, cost_animal, cost_run, target):
    best = None
    for _, row in grid.iterrows():
        if row["power"] < target:
            continue
        cost = row["animals"] * cost_animal + row["animals"] * row["runs"] * cost_run
        key = (cost, row["animals"], row["runs"])
        if best is None or key < best[0]:
            best = (key, row)
    return best


def test_cheapest_design_matches_brute_force():
    # Brute-force enumeration of every design of small grids, with integer costs so that
    # exact ties occur (then fewer animals, then fewer runs).
    rng = np.random.default_rng(5)
    for _ in range(40):
        a = np.arange(3, 10)
        r = np.arange(1, 6)
        A, R = np.meshgrid(a, r, indexing="ij")
        grid = pd.DataFrame(
            {"animals": A.ravel(), "runs": R.ravel(), "power": rng.uniform(0, 1, A.size)}
        )
        cost_animal = float(rng.integers(0, 6))
        cost_run = float(rng.integers(1, 4))
        target = float(rng.uniform(0.3, 0.95))
        ours = cheapest_design(grid, cost_animal, cost_run, target)
        ref = _brute_force(grid, cost_animal, cost_run, target)
        if ref is None:
            assert ours is None
            continue
        assert (int(ours["animals"]), int(ours["runs"])) == (
            int(ref[1]["animals"]),
            int(ref[1]["runs"]),
        )
        assert float(ours["cost"]) == pytest.approx(ref[0][0], abs=1e-12)


def test_cheapest_design_tie_prefers_fewer_animals():
    # cost 2 per animal, 1 per run: 4×4, 6×2 and 8×1 all cost 24 (arithmetic)
    grid = pd.DataFrame({"animals": [8, 6, 4], "runs": [1, 2, 4], "power": [0.9, 0.9, 0.9]})
    best = cheapest_design(grid, 2.0, 1.0, 0.8)
    assert (int(best["animals"]), int(best["runs"]), float(best["cost"])) == (4, 4, 24.0)


def test_cheapest_design_none_when_unreachable_and_bad_costs():
    grid = power_grid(0.01, 0.5, 0.5, 0.5, animals=[4, 5], runs=[1, 2])
    assert grid["power"].max() < 0.8
    assert cheapest_design(grid, 10.0, 1.0) is None
    with pytest.raises(ValueError, match="both 0"):
        cheapest_design(grid, 0.0, 0.0)
    with pytest.raises(ValueError, match="target_power"):
        cheapest_design(grid, 1.0, 1.0, target_power=1.0)


# --------------------------------------------------------------------------------------
# plan_from_output on the invented example study
# --------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def example_outputs(tmp_path_factory):
    """The example study analysed once, and copies of its output with edited summaries.

    To keep the test fast the analysis covers the ``sound`` contrast only and runs
    without the study's ``[questions]`` tables (answering them takes most of the run
    time and planning reads none of their results); the copies then
    differ only in ``summary.json``: ``targeted`` has the example's targets back,
    ``known`` says σ² was fixed at 0 (``run_variance = "known"``). The copies keep the
    regions table of the analysis: enough to test how the mean first-level variance is
    read from the run maps, without a second run.
    """
    root = tmp_path_factory.mktemp("plan")
    toml = write_example(root / "study")
    text = toml.read_text()
    assert text.index("[questions]") > text.index("[inference]")  # questions come last
    toml.write_text(text[: text.index("[questions]")])
    runs = toml.parent / "runs.tsv"
    table = pd.read_csv(runs, sep="\t", dtype=str, keep_default_na=False)
    table[table["contrast"] == "sound"].to_csv(runs, sep="\t", index=False)
    plain = run_study(toml, root / "plain", permutations=0)

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
    written = write_plan(out, plans)
    names = {p.name for p in plans}
    assert {w.name for w in written} == {"power.tsv", "power.png", "summary.json"}
    assert len(written) == 2 * len(names) + 1
    for name in names:
        tsv = pd.read_csv(out / name / "power.tsv", sep="\t")
        ours = [p for p in plans if p.name == name]
        assert len(tsv) == sum(len(p.grid) for p in ours)
        np.testing.assert_allclose(
            tsv["power"], np.concatenate([p.grid["power"] for p in ours]), rtol=1e-5
        )
        assert (out / name / "power.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    summary = json.loads((out / "summary.json").read_text())
    assert set(summary["plan"]) == names
    first = summary["plan"][plans[0].name]["regions"][0]
    assert first["inputs"]["cost_animal"] == 5.0 and first["inputs"]["effect"] == 0.1
    assert "results" in summary  # the rest of the summary is kept
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


def test_plan_from_output_not_an_output_folder(tmp_path):
    with pytest.raises(UserError, match="summary.json"):
        plan_from_output(tmp_path)
    (tmp_path / "summary.json").write_text("{not json")
    with pytest.raises(UserError, match="not valid JSON"):
        plan_from_output(tmp_path)


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
