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
- brute-force enumeration of a small grid for the cheapest design.

Planning from the invented example study's output is checked in
end_to_end/test_planning_output.py.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats
from statsmodels.stats.power import TTestPower

from grouplevel.errors import UserError
from grouplevel.model import fit_reml, test_contrast
from grouplevel.planning import (
    GRID_COLUMNS,
    cheapest_design,
    design_power,
    plan_from_output,
    power_grid,
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
# plan_from_output on a folder that is not an output (the example output:
# end_to_end/test_planning_output.py)
# --------------------------------------------------------------------------------------


def test_plan_from_output_not_an_output_folder(tmp_path):
    with pytest.raises(UserError, match="summary.json"):
        plan_from_output(tmp_path)
    (tmp_path / "summary.json").write_text("{not json")
    with pytest.raises(UserError, match="not valid JSON"):
        plan_from_output(tmp_path)
