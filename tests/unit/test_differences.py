"""Consistency of a difference across animals (grouplevel.questions.differences).

References:
- Cochran's Q and I² against statsmodels ``stats.meta_analysis.combine_effects``
  (Higgins & Thompson 2002, Stat Med 21:1539);
- each animal's own difference against statsmodels ``GLS`` on that animal's runs with
  the run-and-session covariance written out;
- the probability of superiority against scipy ``stats.mannwhitneyu`` (A = U / (n₊n₋),
  McGraw & Wong 1992) and DeLong's variance against a brute-force loop over the pairs
  (DeLong, DeLong & Clarke-Pearson 1988, Biometrics 44:837, their structural
  components V₁₀ and V₀₁).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.meta_analysis import combine_effects

from grouplevel.errors import ArgumentError
from grouplevel.questions.differences import (
    group_overlap,
    heterogeneity,
    own_differences,
    probability_of_superiority,
    within_animal_consistency,
)

RNG = np.random.default_rng(7)


def test_heterogeneity_matches_statsmodels_meta_analysis():
    effect = np.array([0.8, 1.4, 0.2, 1.1, 0.6, np.nan])
    se = np.array([0.3, 0.4, 0.25, 0.5, 0.35, 0.3])
    het = heterogeneity(effect, se)
    ref = combine_effects(effect[:5], se[:5] ** 2, method_re="chi2")
    assert het.q == pytest.approx(float(ref.q), rel=1e-10)
    assert het.df == 4
    assert het.i_squared == pytest.approx(float(ref.i2), rel=1e-10)
    assert het.pooled == pytest.approx(float(ref.mean_effect_fe), rel=1e-10)
    assert het.p == pytest.approx(stats.chi2.sf(ref.q, 4), rel=1e-10)


def test_own_differences_equal_gls_of_each_animal_with_sessions():
    # Reference: statsmodels GLS of one animal's runs on [1, condition], covariance
    # σ² I + ω² (same session) + diag(s²); the group column is constant within an
    # animal, so it drops out of the animal's own fit.
    m, n_per = 4, 6
    animal = np.repeat(np.arange(m), n_per)
    session = np.repeat(np.arange(m * 2), 3)
    cond = np.tile([0.5, -0.5, 0.5, -0.5, -0.5, 0.5], m)
    group = np.array([0, 1, 0, 1])[animal]
    X = np.column_stack([np.ones(animal.size), group, cond])
    y = RNG.normal(0, 1, animal.size) + 0.8 * cond
    s2 = RNG.uniform(0.05, 0.3, animal.size)
    y[5] = np.nan
    sig2, om2 = 0.2, 0.15
    c = np.array([0.0, 0.0, 1.0])
    effect, se, runs, estimable = own_differences(
        y, s2, X, animal, c, var_run=sig2, var_session=om2, session=session
    )
    assert estimable.all() and runs.tolist() == [5, 6, 6, 6]
    for a in range(m):
        rows = (animal == a) & np.isfinite(y)
        same = session[rows][:, None] == session[rows][None, :]
        sigma = sig2 * np.eye(rows.sum()) + om2 * same + np.diag(s2[rows])
        ref = sm.GLS(y[rows], np.column_stack([np.ones(rows.sum()), cond[rows]]), sigma=sigma).fit()
        assert effect[a] == pytest.approx(ref.params[1], rel=1e-9)
        # the covariance is taken as known: (XᵀΣ⁻¹X)⁻¹, not rescaled by the residuals
        assert se[a] == pytest.approx(np.sqrt(ref.normalized_cov_params[1, 1]), rel=1e-9)


def test_an_animal_with_one_side_only_cannot_estimate_its_difference():
    animal = np.array([0, 0, 1, 1])
    cond = np.array([0.5, -0.5, 0.5, 0.5])
    X = np.column_stack([np.ones(4), cond])
    effect, se, runs, estimable = own_differences(
        np.array([1.0, 0.0, 2.0, 2.5]), None, X, animal, np.array([0.0, 1.0]), var_run=0.1
    )
    assert estimable.tolist() == [True, False]
    assert effect[0] == pytest.approx(1.0) and np.isnan(effect[1])
    # two runs, each of variance 0.1: the difference has variance 0.2
    assert se[0] == pytest.approx(np.sqrt(0.2))
    table = within_animal_consistency(
        np.array([1.0, 0.0, 2.0, 2.5]),
        None,
        X,
        animal,
        ["m1", "m2"],
        np.array([0.0, 1.0]),
        group=(1.0, 0.4, 2.5, 1.0, 0.2),
        loo_effect=np.array([np.nan, 1.0]),
        loo_t=np.array([np.nan, 2.0]),
        var_run=0.1,
    )
    assert table.not_estimable == ("m2",)
    assert table.summary()["animals_positive"] == 1


def _delong_brute_force(x, y):
    """DeLong's variance by explicit loops over every pair."""
    v10 = [np.mean([1.0 if xi > yj else 0.5 if xi == yj else 0.0 for yj in y]) for xi in x]
    v01 = [np.mean([1.0 if xi > yj else 0.5 if xi == yj else 0.0 for xi in x]) for yj in y]
    return np.var(v10, ddof=1) / len(x) + np.var(v01, ddof=1) / len(y)


def test_probability_of_superiority_against_scipy_and_brute_force():
    x = np.array([1.2, 0.4, 2.2, 1.9, 0.4, 3.0])
    y = np.array([0.1, 0.4, 1.0, -0.5, 1.5])
    o = probability_of_superiority(x, y)
    u = stats.mannwhitneyu(x, y, alternative="two-sided")
    assert o.a == pytest.approx(u.statistic / (x.size * y.size), rel=1e-12)
    assert o.p == pytest.approx(u.pvalue, rel=1e-12)
    assert o.se**2 == pytest.approx(_delong_brute_force(x, y), rel=1e-12)
    assert 0.0 < o.ci[0] < o.a < o.ci[1] < 1.0
    # the logit interval, undone: its centre on the logit scale is logit(A)
    logit = np.log(np.array(o.ci) / (1 - np.array(o.ci)))
    assert logit.mean() == pytest.approx(np.log(o.a / (1 - o.a)), rel=1e-9)


def test_complete_separation_has_no_interval_but_names_itself():
    o = probability_of_superiority([3.0, 4.0, 5.0], [0.0, 1.0])
    assert o.a == 1.0 and o.separated and np.isnan(o.ci[0])
    # exact Mann–Whitney: 2 of C(5, 2) = 10 arrangements as extreme, two-sided
    assert o.p == pytest.approx(0.2, rel=1e-12)


def test_group_overlap_describes_each_side_and_refuses_an_empty_one():
    effect = np.array([1.0, 2.0, 3.0, 0.5, -0.2, np.nan])
    se = np.full(6, 0.1)
    runs = np.array([2, 2, 2, 2, 2, 0])
    side = np.array([1, 1, 1, -1, -1, 0])
    go = group_overlap(
        effect, se, runs, side, list("abcdef"), ("ko", "wt"), group=(2.0, 0.3, 6.0, 3.0, 0.01)
    )
    spread = go.spread()
    assert spread["plus"] == {
        "group": "ko",
        "animals": 3,
        "median": 2.0,
        "min": 1.0,
        "max": 3.0,
        "animals_positive": 3,
    }
    assert spread["minus"]["animals_positive"] == 1
    assert go.summary()["separated"] is True
    assert list(go.table()["animal"]) == list("abcde")
    with pytest.raises(ArgumentError, match="each side"):
        group_overlap(
            effect,
            se,
            runs,
            np.array([1, 1, 1, 0, 0, 0]),
            list("abcdef"),
            ("ko", "wt"),
            group=(0, 0, 0, 0, 0),
        )


def _runs() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "animal": list("aaaabbbbccccdddd"),
            "run": ["1", "2", "3", "4"] * 4,
            "group": list("kkkkkkkkwwwwwwww"),
            "drug": ["no", "no", "yes", "yes"] * 4,
            "age": [3.0] * 4 + [5.0] * 4 + [4.0] * 4 + [7.0] * 4,
        }
    )


def _contrast(design, prefix):
    (name,) = [n for n in design.columns if n.startswith(prefix)]
    c = np.zeros(len(design.columns))
    c[design.columns.index(name)] = 1.0
    return c


def test_the_sides_of_a_difference_follow_where_it_lies():
    # Common practice: a group difference compares animals, a drug difference compares
    # each animal's runs, a covariate slope has no two groups, an interaction mixes levels.
    from grouplevel.intake.design import build_design
    from grouplevel.questions.ask_differences import BETWEEN, WITHIN, difference_sides

    runs = _runs()
    design = build_design(runs, "1 + group + drug + age")
    between = difference_sides(design, runs, _contrast(design, "group["))
    assert between.level == BETWEEN and between.two_groups and between.reason == ""
    assert between.animal_side.tolist() in ([-1, -1, 1, 1], [1, 1, -1, -1])
    assert set(between.names) == {"group k", "group w"}
    within = difference_sides(design, runs, _contrast(design, "drug["))
    assert within.level == WITHIN and within.reason == ""
    assert set(within.names) == {"drug yes", "drug no"}
    assert (within.run_side[runs["drug"] == "yes"] > 0).all()
    assert (within.run_side[runs["drug"] == "no"] < 0).all()
    slope = difference_sides(design, runs, _contrast(design, "age"))
    assert slope.level == BETWEEN and not slope.two_groups and "covariate" in slope.reason
    interaction = build_design(runs, "1 + group * drug")
    (name,) = [n for n in interaction.columns if ":" in n]
    mixed = difference_sides(interaction, runs, _contrast(interaction, name))
    assert mixed.level == WITHIN  # the interaction column varies within animals
