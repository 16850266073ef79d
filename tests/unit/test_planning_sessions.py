"""Power of animals × sessions × runs designs (grouplevel.planning.power) against outside
references.

Outside references used here:
- the variance of the grand mean of a balanced nested design,
  σ²_a/A + σ²_s/(A·S) + σ²_r/(A·S·R) (common practice: any textbook of nested analysis
  of variance, e.g. Snijders & Bosker 2012, Multilevel Analysis, chapter 11);
- Monte Carlo: balanced studies drawn from the runs ⊂ sessions ⊂ animals model with known
  variances, tested with scipy.stats.ttest_1samp on the animals' own means (or their own
  drug − vehicle differences), the rejection rate compared with the predicted power within
  its 99% binomial interval (scipy.stats.binomtest), and the spread of the grand mean with
  the predicted SE within a χ² interval (scipy.stats.chi2);
- statsmodels ``TTestPower`` (Seabold & Perktold 2010): with one session the plan is the
  one-sample t test of effect size d = effect / sqrt(v).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.power import TTestPower

from grouplevel.planning import (
    SESSION_GRID_COLUMNS,
    animal_variance,
    cheapest_design,
    design_power,
    session_grid,
)

ALPHA = 0.05  # the conventional test level (common practice)
TAU2, OMEGA2, SIGMA2, S2 = 0.4, 0.3, 1.2, 0.2


@pytest.mark.parametrize(("A", "S", "R"), [(6, 1, 4), (8, 3, 2), (12, 4, 5), (5, 2, 1)])
def test_se_is_the_textbook_variance_of_the_grand_mean(A, S, R):
    # common practice (nested ANOVA, balanced): var(grand mean) =
    # σ²_a/A + σ²_s/(A·S) + σ²_r/(A·S·R), with σ²_r the whole run-level variance σ² + s̄²
    textbook = TAU2 / A + OMEGA2 / (A * S) + (SIGMA2 + S2) / (A * S * R)
    got = design_power(0.5, TAU2, SIGMA2, S2, A, R, sessions=S, var_session=OMEGA2)
    np.testing.assert_allclose(got["se"] ** 2, textbook, rtol=1e-12)
    assert got["df"] == A - 1
    # statsmodels TTestPower: the one-sample t test on A animals, d = effect / sqrt(v)
    v = textbook * A
    expected = TTestPower().power(effect_size=0.5 / np.sqrt(v), nobs=A, alpha=ALPHA)
    np.testing.assert_allclose(got["power"], expected, rtol=1e-6)


def test_one_session_is_the_two_level_plan():
    # with S = 1 and ω² = 0 the plan is the animals × runs one (runs exchangeable)
    two = design_power(0.4, TAU2, SIGMA2, S2, np.arange(4, 9), 3)
    three = design_power(0.4, TAU2, SIGMA2, S2, np.arange(4, 9), 3, sessions=1)
    for key in ("se", "df", "power"):
        np.testing.assert_allclose(two[key], three[key], rtol=1e-12)


def _nested_studies(rng, n, A, S, R, effect, drug=None):
    """n balanced studies: (n, A, S, R) run effects."""
    u = rng.normal(size=(n, A, 1, 1)) * np.sqrt(TAU2)
    w = rng.normal(size=(n, A, S, 1)) * np.sqrt(OMEGA2)
    e = rng.normal(size=(n, A, S, R)) * np.sqrt(SIGMA2 + S2)
    base = effect if drug is None else effect * drug
    return base + u + w + e


def test_power_of_the_mean_matches_simulation():
    rng = np.random.default_rng(20261202)
    A, S, R, effect, n = 7, 3, 2, 0.55, 20000
    y = _nested_studies(rng, n, A, S, R, effect)
    animal_means = y.mean(axis=(2, 3))
    grand = animal_means.mean(axis=1)
    planned = design_power(effect, TAU2, SIGMA2, S2, A, R, sessions=S, var_session=OMEGA2)
    # spread of the grand mean: the sample variance of n draws, χ²(n − 1) interval (99%)
    ratio = grand.var(ddof=1) / float(planned["se"]) ** 2
    low, high = stats.chi2.ppf([0.005, 0.995], n - 1) / (n - 1)
    assert low <= ratio <= high, ratio
    # scipy.stats.ttest_1samp on the animal means: rejection rate vs predicted power
    k = int(np.sum(stats.ttest_1samp(animal_means, 0.0, axis=1).pvalue < ALPHA))
    ci = stats.binomtest(k, n).proportion_ci(confidence_level=0.99)
    assert ci.low <= float(planned["power"]) <= ci.high, (k / n, planned["power"])


@pytest.mark.parametrize("varies", ["session", "run"])
def test_power_of_a_within_animal_difference_matches_simulation(varies):
    # drug − vehicle with a random slope (variance 0.25): drug on half of the sessions
    # ("session") or on half of the runs of every session ("run")
    rng = np.random.default_rng(7 if varies == "session" else 8)
    A, S, R, effect, n, slope_var = 8, 4, 2, 0.6, 20000, 0.25
    if varies == "session":
        drug = np.repeat([0.0, 1.0], S // 2)[:, None] * np.ones(R)
    else:
        drug = np.ones(S)[:, None] * np.repeat([0.0, 1.0], R // 2)
    y = _nested_studies(rng, n, A, S, R, effect, drug=drug)
    y = y + rng.normal(size=(n, A, 1, 1)) * np.sqrt(slope_var) * drug
    on = drug.astype(bool)
    diff = y[..., on].mean(axis=-1) - y[..., ~on].mean(axis=-1)  # (n, A)
    planned = design_power(
        effect, slope_var, SIGMA2, S2, A, R, sessions=S, var_session=OMEGA2, varies=varies
    )
    # Monte Carlo: the spread of the animals' own differences (tolerance 0.02, about 5
    # Monte Carlo standard errors of a mean of 20000 sample variances on 7 df)
    ratio = diff.var(axis=1, ddof=1).mean() / (float(planned["se"]) ** 2 * A)
    assert abs(ratio - 1.0) <= 0.02, ratio
    # the paired t-test on the animals' differences (scipy.stats.ttest_1samp)
    k = int(np.sum(stats.ttest_1samp(diff, 0.0, axis=1).pvalue < ALPHA))
    ci = stats.binomtest(k, n).proportion_ci(confidence_level=0.99)
    assert ci.low <= float(planned["power"]) <= ci.high, (k / n, planned["power"])


def test_session_variance_cancels_for_run_level_differences():
    # common practice: a difference within every session removes the session effect
    kw = {"sessions": 2, "var_session": 0.0}
    a = design_power(0.5, 0.1, SIGMA2, 0.0, 6, 4, varies="run", **kw)
    kw["var_session"] = 5.0
    b = design_power(0.5, 0.1, SIGMA2, 0.0, 6, 4, varies="run", **kw)
    np.testing.assert_allclose(a["se"], b["se"], rtol=1e-12)
    assert animal_variance(0.1, 5.0, SIGMA2, 0.0, 2, 4, "session") > animal_variance(
        0.1, 5.0, SIGMA2, 0.0, 2, 4, "run"
    )


def test_session_grid_gains():
    g = session_grid(0.5, TAU2, OMEGA2, SIGMA2, S2, animals=[6, 9], sessions=[1, 2], runs=[2, 3])
    assert tuple(g.columns) == SESSION_GRID_COLUMNS
    assert len(g) == 8
    # one more session of R runs: the same as the grid's own entry with S + 1 sessions
    row = g[(g.animals == 6) & (g.sessions == 1) & (g.runs == 2)].iloc[0]
    nxt = g[(g.animals == 6) & (g.sessions == 2) & (g.runs == 2)].iloc[0]
    assert row["power_one_more_session"] == pytest.approx(nxt["power"], rel=1e-12)
    # with day-to-day variance (ω² > 0) the extra runs buy more as a new session than
    # spread over the existing ones (the session term ω²/S shrinks only with sessions)
    assert (g["power_one_more_session"] > g["power_same_runs_in_sessions"]).all()
    # without it the two are the same number of exchangeable runs: equal power
    flat = session_grid(0.5, TAU2, 0.0, SIGMA2, S2, animals=[6], sessions=[1, 2], runs=[2])
    np.testing.assert_allclose(
        flat["power_one_more_session"], flat["power_same_runs_in_sessions"], rtol=1e-10
    )


def test_cheapest_design_with_sessions_counts_session_cost():
    g = session_grid(0.8, TAU2, OMEGA2, SIGMA2, S2, animals=range(4, 16), sessions=[1, 2, 3])
    best = cheapest_design(g, 10.0, 1.0, 0.8, cost_session=2.0)
    # brute force over the grid (cost = A(10 + S(2 + R)))
    cost = g.animals * (10 + g.sessions * (2 + g.runs))
    ok = g.power >= 0.8
    assert 0 < ok.sum() < len(g)
    assert best["cost"] == pytest.approx(cost[ok].min())
    assert best["power"] >= 0.8


def test_session_grid_bad_arguments():
    with pytest.raises(ValueError, match="even"):
        session_grid(0.5, TAU2, OMEGA2, SIGMA2, S2, sessions=[1, 2], varies="session")
    with pytest.raises(ValueError, match="var_session"):
        design_power(0.5, TAU2, SIGMA2, S2, 6, 2, sessions=2, var_session=-1.0)
    with pytest.raises(ValueError, match="varies"):
        design_power(0.5, TAU2, SIGMA2, S2, 6, 2, varies="animals")
    with pytest.raises(ValueError, match="undefined"):
        design_power(0.5, 0.0, 0.0, 0.0, 6, 2, sessions=2, var_session=1.0, varies="run")
