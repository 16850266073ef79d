"""The design shown before any computation, contrasts named after what they test, and
the exact smallest attainable p of a permutation scheme.

Outside references: brute-force enumeration of every relabelling / sign flip with
scipy's two-sample and one-sample t tests and statsmodels OLS; statsmodels MixedLM
(REML) cell means for the group means; treatment coding as in R and statsmodels
(common practice).
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import stats

import grouplevel
from grouplevel.cli import main
from grouplevel.design import build_design, formula_variables, variable_levels
from grouplevel.inference.permutation import (
    count_design_symmetries,
    is_mean_contrast,
    partition_design,
    plan_permutations,
)
from grouplevel.pipeline import run_study
from tests.conftest import write_study

# 3 ko and 3 wt animals, two runs each; dose 0, 1, 2 within each genotype
ANIMALS = [f"m{i}" for i in range(6) for _ in range(2)]
GENOTYPE = ["ko" if i < 3 else "wt" for i in range(6) for _ in range(2)]
DOSE = [float(i % 3) for i in range(6) for _ in range(2)]


def _runs(**extra) -> pd.DataFrame:
    frame = pd.DataFrame({"animal": ANIMALS, "genotype": GENOTYPE, "dose": DOSE, "session": ""})
    for k, v in extra.items():
        frame[k] = v
    return frame


def _names_and_weights(design) -> dict[str, list[float]]:
    return {c.name: [round(float(w), 10) for w in c.weights] for c in design.default_contrasts}


# --------------------------------------------------------------------------------------
# 1. Smallest attainable p: brute-force enumeration
# --------------------------------------------------------------------------------------


def _plan(X: np.ndarray, c, sided: str = "two"):
    x_i, Z = partition_design(X, np.asarray(c, float))
    return plan_permutations(x_i, Z, 10**6, np.random.default_rng(0), sided)


@pytest.mark.parametrize(("m1", "m2"), [(3, 3), (3, 4), (4, 4)])
@pytest.mark.parametrize("sided", ["two", "positive"])
def test_two_group_floor_matches_brute_force(m1, m2, sided):
    # Every assignment of the m animals to the two groups, each tested with scipy's
    # two-sample t (equal variances). The observed data are clearly separated, so the
    # identity has the largest statistic and its p is the smallest the test can give:
    # #{assignments with a statistic at least as large} / #assignments.
    rng = np.random.default_rng(3)
    y = np.concatenate([5.0 + rng.normal(0, 0.3, m1), rng.normal(0, 0.3, m2)])
    m = m1 + m2

    def statistic(members: tuple[int, ...]) -> float:
        inside = np.zeros(m, bool)
        inside[list(members)] = True
        t = stats.ttest_ind(y[inside], y[~inside]).statistic
        return abs(t) if sided == "two" else t

    values = [statistic(g) for g in itertools.combinations(range(m), m1)]
    observed = statistic(tuple(range(m1)))
    brute = np.sum(np.asarray(values) >= observed - 1e-9) / len(values)
    X = np.column_stack([np.ones(m), [1.0] * m1 + [0.0] * m2])
    scheme = _plan(X, [0.0, 1.0], sided)
    assert scheme.kind == "animal permutations" and scheme.n == math.comb(m, m1)
    assert scheme.smallest_p == pytest.approx(brute, abs=1e-12)
    if (m1, m2, sided) == (3, 3, "two"):
        assert scheme.smallest_p == pytest.approx(0.1)  # 2/20, not 1/20


@pytest.mark.parametrize("sided", ["two", "positive"])
def test_sign_flip_floor_matches_brute_force(sided):
    # All 2^5 sign flips of five animal values, each tested with scipy's one-sample t.
    rng = np.random.default_rng(4)
    y = 4.0 + rng.normal(0, 0.5, 5)
    values = []
    for signs in itertools.product([1.0, -1.0], repeat=5):
        t = stats.ttest_1samp(np.asarray(signs) * y, 0.0).statistic
        values.append(abs(t) if sided == "two" else t)
    observed = values[0]  # all +1 first
    brute = np.sum(np.asarray(values) >= observed - 1e-9) / len(values)
    scheme = _plan(np.ones((5, 1)), [1.0], sided)
    assert scheme.kind == "sign flips" and scheme.n == 32
    assert scheme.smallest_p == pytest.approx(brute, abs=1e-12)
    assert scheme.smallest_p == pytest.approx(2 / 32 if sided == "two" else 1 / 32)


def test_sign_flip_floor_with_group_nuisance_matches_statsmodels_enumeration():
    # The mean of the reference group with the other group as nuisance (Freedman-Lane):
    # flipping every animal of either group alone leaves |t| unchanged. Brute force with
    # statsmodels OLS over all 2^6 flips of the reduced-model residuals: for generic data
    # the flips that tie with the identity are exactly the design's symmetries, and at
    # best every other flip gives a smaller |t|, so the floor is ties / 64.
    rng = np.random.default_rng(5)
    g = np.array([0.0, 0, 0, 1, 1, 1])
    X = np.column_stack([np.ones(6), g])
    y = rng.normal(0, 1, 6)
    reduced = sm.OLS(y, g[:, None]).fit()  # model under the null: intercept = 0
    ts = []
    for signs in itertools.product([1.0, -1.0], repeat=6):
        y_s = reduced.fittedvalues + np.asarray(signs) * reduced.resid
        ts.append(abs(sm.OLS(y_s, X).fit().tvalues[0]))
    ts = np.asarray(ts)
    brute = np.sum(np.isclose(ts, ts[0], rtol=1e-10, atol=0)) / ts.size
    scheme = _plan(X, [1.0, 0.0])
    assert scheme.kind == "sign flips"
    assert scheme.n_equivalent == 4 and scheme.smallest_p == pytest.approx(brute)
    assert brute == pytest.approx(4 / 64)


def test_symmetry_count_is_one_for_an_asymmetric_design():
    # a covariate that no relabelling maps onto ± itself: every rearrangement is its own
    D = np.column_stack([np.ones(5), [0.1, 0.5, 0.9, 2.0, 4.0]])
    x_i, Z = partition_design(D, np.array([0.0, 1.0]))
    scheme = plan_permutations(x_i, Z, 1000, np.random.default_rng(0))
    assert scheme.exhaustive and scheme.n == math.factorial(5)
    assert scheme.n_equivalent == 1
    rearranged = np.column_stack([x_i, Z])[scheme.orders]
    assert count_design_symmetries(np.column_stack([x_i, Z]), rearranged, "two") == 1


def test_random_scheme_floor_is_one_over_n():
    scheme = _plan(np.column_stack([np.ones(16), [1.0] * 8 + [0.0] * 8]), [0.0, 1.0])
    x_i, Z = partition_design(
        np.column_stack([np.ones(16), [1.0] * 8 + [0.0] * 8]), np.array([0.0, 1.0])
    )
    drawn = plan_permutations(x_i, Z, 500, np.random.default_rng(0))
    assert not drawn.exhaustive and drawn.smallest_p == pytest.approx(1 / 500)
    assert scheme.exhaustive and scheme.smallest_p == pytest.approx(2 / math.comb(16, 8))


@pytest.mark.parametrize(
    ("c", "mean"),
    [([1.0, 0.0], True), ([1.0, 1.0], True), ([1.0, 0.5], True), ([0.0, 1.0], False)],
)
def test_mean_type_contrasts_get_sign_flips(c, mean):
    # a group mean moves when every animal shifts by one constant; a difference does not
    # (common practice: sign flips test means, permutations test differences)
    X = np.column_stack([np.ones(6), [0.0, 0, 0, 1, 1, 1]])
    x_i, Z = partition_design(X, np.asarray(c))
    assert is_mean_contrast(x_i, Z) is mean


# --------------------------------------------------------------------------------------
# 2. Default contrasts: names and weights (treatment coding: common practice)
# --------------------------------------------------------------------------------------


def test_defaults_for_a_factor():
    d = build_design(_runs(), "1 + genotype")
    assert d.columns == ("Intercept", "genotype[T.wt]")  # reference: alphabetically first
    assert _names_and_weights(d) == {
        "mean-ko": [1.0, 0.0],
        "mean-wt": [1.0, 1.0],
        "wt-minus-ko": [0.0, 1.0],
        "mean-over-groups": [1.0, 0.5],
    }
    (f,) = d.factors
    assert f.levels == ("ko", "wt") and f.reference == "ko" and f.animals == (3, 3)


def test_reference_level_from_settings_and_from_the_formula():
    d = build_design(_runs(), "1 + genotype", reference={"genotype": "wt"})
    assert d.columns == ("Intercept", "genotype[T.ko]")
    assert _names_and_weights(d)["ko-minus-wt"] == [0.0, 1.0]
    assert _names_and_weights(d)["mean-wt"] == [1.0, 0.0]
    e = build_design(_runs(), '1 + C(genotype, contr.treatment("wt"))')
    assert [c.name for c in e.default_contrasts] == [c.name for c in d.default_contrasts]
    assert e.factors[0].reference == "wt"


def test_defaults_for_a_covariate_are_centred():
    d = build_design(_runs(), "1 + dose")
    assert _names_and_weights(d) == {"mean": [1.0, 0.0], "dose-slope": [0.0, 1.0]}
    # centred at the mean over animals: the dose column sums to zero over animals
    first = [ANIMALS.index(a) for a in dict.fromkeys(ANIMALS)]
    assert d.matrix[first, 1].mean() == pytest.approx(0.0, abs=1e-12)
    assert "centred at its mean over animals (1)" in d.covariates[0].centring
    assert d.covariates[0].centre == pytest.approx(1.0)


def test_uncentred_covariate_leaves_the_mean_out():
    d = build_design(_runs(), "1 + dose", center_covariates=False)
    assert _names_and_weights(d) == {"dose-slope": [0.0, 1.0]}
    assert any(x.startswith("mean: depends on where dose is evaluated") for x in d.left_out)


def test_defaults_for_factor_and_covariate():
    d = build_design(_runs(), "1 + genotype + dose")
    assert _names_and_weights(d) == {
        "mean-ko": [1.0, 0.0, 0.0],
        "mean-wt": [1.0, 1.0, 0.0],
        "wt-minus-ko": [0.0, 1.0, 0.0],
        "mean-over-groups": [1.0, 0.5, 0.0],
        "dose-slope": [0.0, 0.0, 1.0],
    }
    assert d.default_contrasts[0].meaning == "mean of genotype = ko at the average dose"


def test_center_and_scale_in_the_formula():
    assert formula_variables("1 + center(dose)") == ["dose"]
    assert formula_variables('1 + scale(dose) + C(genotype, contr.treatment("wt"))') == [
        "dose",
        "genotype",
    ]
    d = build_design(_runs(), "1 + center(dose)")
    assert _names_and_weights(d) == {"mean": [1.0, 0.0], "dose-slope": [0.0, 1.0]}
    s = build_design(_runs(), "1 + scale(dose)")
    # per unit of dose: 1 / (sample SD of dose over runs) on the scaled column
    sd = np.std(DOSE, ddof=1)
    assert _names_and_weights(s)["dose-slope"] == pytest.approx([0.0, 1.0 / sd])


def test_numeric_factor_with_three_levels():
    d = build_design(_runs(), "1 + C(dose)")
    assert d.columns == ("Intercept", "C(dose)[T.1.0]", "C(dose)[T.2.0]")
    assert _names_and_weights(d) == {
        "mean-dose-0": [1.0, 0.0, 0.0],
        "mean-dose-1": [1.0, 1.0, 0.0],
        "mean-dose-2": [1.0, 0.0, 1.0],
        "dose-1-minus-0": [0.0, 1.0, 0.0],
        "dose-2-minus-0": [0.0, 0.0, 1.0],
        "mean-over-groups": pytest.approx([1.0, 1 / 3, 1 / 3]),
    }
    assert d.factors[0].animals == (2, 2, 2)


def test_interaction_slope_is_averaged_over_groups():
    d = build_design(_runs(), "1 + genotype * dose")
    assert _names_and_weights(d)["dose-slope"] == [0.0, 0.0, 1.0, 0.5]


def test_nonlinear_covariate_has_no_default_slope():
    d = build_design(_runs(), "1 + np.log(dose + 1)")
    assert d.default_contrasts == ()
    assert any("non-linear" in x for x in d.left_out)


def test_column_levels_from_the_table():
    frame = _runs(order=[1.0, 2.0] * 6, session=["s1", "s2"] * 6)
    frame["drug"] = ["saline", "ketamine"] * 6
    assert variable_levels(frame, ["genotype", "dose", "order", "drug"]) == {
        "genotype": "animal",
        "dose": "animal",
        "order": "session",
        "drug": "session",
    }
    assert variable_levels(_runs(order=[1.0, 2.0] * 6), ["order"]) == {"order": "run"}


# --------------------------------------------------------------------------------------
# 3. Group means against statsmodels MixedLM (REML)
# --------------------------------------------------------------------------------------


def test_group_means_match_statsmodels_mixedlm(tmp_path):
    rng = np.random.default_rng(8)
    animals = [f"m{i}" for i in range(8) for _ in range(3)]
    genotype = ["ko" if i < 4 else "wt" for i in range(8) for _ in range(3)]
    u = rng.normal(0, 0.8, 8)
    effects = np.stack(
        [
            (1.5 if genotype[k] == "ko" else 0.4) + u[k // 3] + rng.normal(0, 0.5, (2, 2, 2))
            for k in range(24)
        ]
    )
    toml = write_study(
        tmp_path / "s",
        effects,
        animals,
        shape=(2, 2, 2),
        columns={"genotype": genotype},
        model='formula = "1 + genotype"\nreference = { genotype = "wt" }',
        toml_extra="\n[inference]\npermutations = 0\n",
    )
    maps, _ = grouplevel.fit_study(grouplevel.load_study(toml))
    got = {gm.contrast: gm.volume("effect")[1, 0, 1] for gm in maps}
    assert set(got) == {"mean-wt", "mean-ko", "ko-minus-wt", "mean-over-groups"}
    frame = pd.DataFrame({"y": effects[:, 1, 0, 1], "genotype": genotype, "animal": animals})
    cells = smf.mixedlm("y ~ 0 + genotype", frame, groups=frame["animal"]).fit(reml=True)
    ko, wt = cells.fe_params["genotype[ko]"], cells.fe_params["genotype[wt]"]
    assert got["mean-ko"] == pytest.approx(ko, rel=1e-4)
    assert got["mean-wt"] == pytest.approx(wt, rel=1e-4)
    assert got["ko-minus-wt"] == pytest.approx(ko - wt, rel=1e-4)
    assert got["mean-over-groups"] == pytest.approx((ko + wt) / 2, rel=1e-4)


def test_mean_at_average_dose_matches_statsmodels(tmp_path):
    # one run per animal: the mixed model's intercept is the OLS intercept of the
    # centred covariate (statsmodels OLS), i.e. the mean response at the average dose
    rng = np.random.default_rng(9)
    dose = [0.0, 1.0, 2.0, 3.0, 5.0, 8.0, 13.0]
    effects = np.stack([1.0 + 0.3 * d + rng.normal(0, 0.4, (2, 2, 2)) for d in dose])
    toml = write_study(
        tmp_path / "s",
        effects,
        [f"m{i}" for i in range(7)],
        shape=(2, 2, 2),
        columns={"dose": dose},
        model='formula = "1 + dose"',
        toml_extra="\n[inference]\npermutations = 0\n",
    )
    maps, _ = grouplevel.fit_study(grouplevel.load_study(toml))
    got = {gm.contrast: gm.volume("effect")[0, 1, 1] for gm in maps}
    ols = sm.OLS(effects[:, 0, 1, 1], sm.add_constant(np.asarray(dose) - np.mean(dose))).fit()
    assert got["mean"] == pytest.approx(ols.params[0], rel=1e-5)
    assert got["dose-slope"] == pytest.approx(ols.params[1], rel=1e-5)


# --------------------------------------------------------------------------------------
# 4. `check` prints the design; warnings; summary.json
# --------------------------------------------------------------------------------------


def _two_group_study(tmp_path: Path, extra: str = "", model: str = "") -> Path:
    rng = np.random.default_rng(0)
    return write_study(
        tmp_path / "s",
        rng.normal(1, 1, (12, 3, 3, 2)),
        ANIMALS,
        columns={"genotype": GENOTYPE, "dose": [str(d) for d in DOSE]},
        model=model or 'formula = "1 + genotype"\nreference = { genotype = "wt" }',
        toml_extra=extra,
    )


def test_check_prints_the_design(tmp_path, capsys):
    assert main(["check", str(_two_group_study(tmp_path))]) == 0
    text = capsys.readouterr().out
    assert "Intercept                animal-level" in text
    assert "genotype[T.ko]           animal-level" in text
    assert "factor       genotype: wt (reference) 3 animals, ko 3 animals" in text
    for line in (
        "mean-wt: mean of genotype = wt",
        "ko-minus-wt: genotype ko minus wt",
        "weights    1 x genotype[T.ko]",
        "weights    1 x Intercept, 0.5 x genotype[T.ko]",
        "20 exhaustive animal permutations (2 of them give the observed statistic back); "
        "smallest attainable p 0.1 > alpha",
        "64 exhaustive sign flips",
    ):
        assert line in text, line
    assert (
        "warning:     the study, group contrast ko-minus-wt: the smallest p that 20 exhaustive "
        "animal permutations can give is 0.1, above alpha = 0.05"
    ) in text


def test_no_warning_when_alpha_allows(tmp_path, capsys):
    toml = _two_group_study(tmp_path, extra="\n[inference]\nalpha = 0.2\n")
    assert main(["check", str(toml)]) == 0
    text = capsys.readouterr().out
    assert "smallest attainable p 0.1\n" in text and "warning:" not in text


def test_center_of_a_text_table_column_no_longer_fails(tmp_path, capsys):
    toml = _two_group_study(tmp_path, model='formula = "1 + center(dose)"')
    assert main(["check", str(toml)]) == 0
    text = capsys.readouterr().out
    assert "covariate    dose: centred by the formula at its mean over runs (1)" in text
    assert "dose-slope: change per unit of dose" in text


@pytest.mark.parametrize(
    ("model", "message"),
    [
        (
            'formula = "1 + genotype"\nreference = { genotype = "WT" }',
            "[model] reference.genotype = 'WT' is not a level of 'genotype'; levels: ko, wt",
        ),
        (
            'formula = "1 + genotype"\nreference = { strain = "wt" }',
            "[model] reference names 'strain', which the formula does not use",
        ),
        (
            'formula = "1 + genotype"\nreference = { genotype = 1 }',
            "[model] reference.genotype: must be the name of a level (text), got 1",
        ),
        (
            'formula = "1 + genotype"\ncenter_covariates = "yes"',
            "[model] center_covariates: expected bool, got 'yes'",
        ),
        (
            'formula = "1 + np.log(dose + 1)"',
            "no default contrast can be named after what it tests",
        ),
    ],
)
def test_bad_reference_or_unnamable_defaults_give_clear_errors(tmp_path, capsys, model, message):
    assert main(["check", str(_two_group_study(tmp_path, model=model))]) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err


def test_run_reports_design_and_exact_floor(tmp_path):
    toml = _two_group_study(tmp_path, extra="\n[inference]\npermutations = 100\n")
    out = run_study(toml, tmp_path / "out")
    summary = json.loads((out / "summary.json").read_text())
    design = summary["design"]["runs"]
    assert [c["name"] for c in design["contrasts"]] == [
        "mean-wt",
        "mean-ko",
        "ko-minus-wt",
        "mean-over-groups",
    ]
    assert design["factors"][0]["levels"] == [
        {"level": "wt", "animals": 3},
        {"level": "ko", "animals": 3},
    ]
    diff = summary["results"]["ko-minus-wt"]["inference"]["permutation"]
    assert diff["permutations"] == 20 and diff["smallest_attainable_p"] == pytest.approx(0.1)
    assert any("ko-minus-wt" in w and "0.1" in w for w in summary["warnings"])
    # the report lists the contrasts tested, not an intercept called "mean"
    html = (out / "report.html").read_text()
    assert "contrast ko-minus-wt" in html and "contrast mean<" not in html
    # the null maxima come in identical pairs: each relabelling and its mirror
    null = pd.read_csv(out / "ko-minus-wt" / "null_max.tsv", sep="\t")["max_z"].to_numpy()
    counts = pd.Series(np.round(null, 4)).value_counts()
    assert (counts % 2 == 0).all() and len(counts) == 10
