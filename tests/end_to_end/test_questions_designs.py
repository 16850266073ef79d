"""The reviewer's questions for every design: group means, signs, one-sided targets, check.

Small invented studies on a 12 × 8 × 8 grid of 0.2 mm voxels with a tiny atlas
("forelimb area" on both sides of the midline, "rest", and a midline "septum"), fitted
without permutations (FDR) so that each takes seconds.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.meta_analysis import combine_effects

from grouplevel.cli import main
from grouplevel.errors import UserError
from grouplevel.pipeline import fit_study, load_study, run_study
from grouplevel.planning.plan import _chosen_rows
from grouplevel.questions.ask import EDGE_FLAG_SUFFIX, QUESTIONS
from grouplevel.questions.means import DIFFERENCE, MEAN, OTHER, contrast_kind, design_rows
from grouplevel.questions.sides import split_side
from grouplevel.report.render import _unasked
from grouplevel.symmetry import (
    NO_ACTIVATION,
    HemisphereTest,
    hemisphere_test,
    lateralisation_difference_verdict,
    symmetry_verdict,
)
from tests.conftest import save

SHAPE = (12, 8, 8)
# x = 0.2 i − 1.1: the midline x = 0 lies between i = 5 and i = 6 (RAS+: x < 0 is left)
AFFINE = np.array(
    [[0.2, 0, 0, -1.1], [0, 0.2, 0, 0.0], [0, 0, 0.2, 0.0], [0, 0, 0, 1.0]], dtype=float
)
LEFT_FL = (slice(2, 5), slice(2, 6), slice(3, 7))
RIGHT_FL = (slice(7, 10), slice(2, 6), slice(3, 7))
ATLAS_TABLE = (
    "index\tname\tabbreviation\themisphere\n"
    "1\tforelimb area\tFL\t\n"
    "2\trest\tRE\t\n"
    "3\tseptum\tSEP\tboth\n"
)


def _atlas_image() -> np.ndarray:
    labels = np.full(SHAPE, 2.0)
    labels[LEFT_FL] = 1
    labels[RIGHT_FL] = 1
    labels[5:7, 0:2, 0:2] = 3
    return labels


def _study(
    folder: Path,
    response: np.ndarray,
    *,
    amplitude: float | np.ndarray = 1.0,
    animals: int = 8,
    runs: int = 2,
    groups: list[str] | None = None,
    toml: str = "",
    seed: int = 3,
    labels: np.ndarray | None = None,
    atlas_table: str = ATLAS_TABLE,
) -> Path:
    """Write maps, runs table, atlas and study TOML; return the TOML path.

    Each run's map is ``amplitude · response · (1 + animal gain) + animal offset + run
    noise`` (animal offset SD 0.2 per voxel plus 0.2 for the whole map, run SD 0.4, gain
    SD 0.1) — invented numbers.
    """
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True)
    amp = np.broadcast_to(np.asarray(amplitude, dtype=float), (animals,))
    rows = []
    for a in range(animals):
        gain = 1.0 + rng.normal(0, 0.1)
        offset = rng.normal(0, 0.2, SHAPE) + rng.normal(0, 0.2)
        for r in range(runs):
            data = amp[a] * response * gain + offset + rng.normal(0, 0.4, SHAPE)
            path = save(folder / "maps" / f"a{a}_r{r}.nii.gz", data, AFFINE)
            row = {"animal": f"a{a}", "run": r + 1, "effect": str(path.relative_to(folder))}
            if groups is not None:
                row["group"] = groups[a]
            rows.append(row)
    pd.DataFrame(rows).to_csv(folder / "runs.tsv", sep="\t", index=False)
    save(folder / "atlas.nii.gz", _atlas_image() if labels is None else labels, AFFINE)
    (folder / "atlas.tsv").write_text(atlas_table)
    text = (
        '[study]\ntable = "runs.tsv"\n\n[inference]\npermutations = 0\n\n'
        '[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\nmidline_mm = 0.0\n\n' + toml
    )
    (folder / "study.toml").write_text(text)
    return folder / "study.toml"


def _both_sides() -> np.ndarray:
    response = np.zeros(SHAPE)
    response[LEFT_FL] = 1.0
    response[RIGHT_FL] = 1.0
    return response


def _answers(toml: Path) -> dict[str, dict]:
    return {name: a.summary(0.05) for name, a in _fitted(toml).items()}


def _fitted(toml: Path) -> dict:
    maps, _ = fit_study(load_study(toml))
    return {m.name: m.answers for m in maps}


# --------------------------------------------------------------------------------------
# 1. which contrasts are group means (pure)
# --------------------------------------------------------------------------------------


def test_contrast_kind_of_treatment_and_cell_means_coding():
    # Treatment coding: Intercept is the reference group's mean, Intercept + level the
    # other group's mean, the level's coefficient their difference (common practice).
    A = np.array([[1.0, 0.0]] * 3 + [[1.0, 1.0]] * 4)
    b = contrast_kind(A, [1.0, 1.0])
    assert b.kind == MEAN
    np.testing.assert_array_equal(b.rows_in_mean(), [False] * 3 + [True] * 4)
    np.testing.assert_allclose(b.weights, [0, 0, 0, 0.25, 0.25, 0.25, 0.25], atol=1e-12)
    assert contrast_kind(A, [1.0, 0.0]).kind == MEAN
    assert contrast_kind(A, [0.0, 1.0]).kind == DIFFERENCE
    # the sum of the two group means: weights sum to 2, neither (hand computation)
    other = contrast_kind(A, [2.0, 1.0])
    assert other.kind == OTHER and other.weight_sum == pytest.approx(2.0)
    # cell-means coding (no intercept, one indicator per group): same answers
    C = np.array([[1.0, 0.0]] * 3 + [[0.0, 1.0]] * 4)
    assert contrast_kind(C, [0.0, 1.0]).kind == MEAN
    assert contrast_kind(C, [0.5, 0.5]).kind == MEAN
    assert contrast_kind(C, [1.0, -1.0]).kind == DIFFERENCE


def test_contrast_kind_with_covariates():
    dose = np.array([1.0, 2.0, 3.0, 5.0, 7.0])
    # centred covariate: the intercept is the mean of all animals (common practice)
    centred = np.column_stack([np.ones(5), dose - dose.mean()])
    assert contrast_kind(centred, [1.0, 0.0]).kind == MEAN
    assert contrast_kind(centred, [0.0, 1.0]).kind == DIFFERENCE  # a slope
    # uncentred: the intercept is the response at dose 0, outside every animal
    raw = np.column_stack([np.ones(5), dose])
    outside = contrast_kind(raw, [1.0, 0.0])
    assert outside.kind == OTHER and "outside the range" in outside.why
    # a design without a constant in its span cannot be read as a mean
    assert contrast_kind(dose[:, None], [1.0]).kind == OTHER
    # not estimable: a contrast on a coefficient no row carries
    assert contrast_kind(np.array([[1.0, 0.0], [1.0, 0.0]]), [0.0, 1.0]).kind == OTHER


def test_design_rows_per_animal_or_per_run():
    X = np.array([[1.0, 0.0], [1.0, 0.0], [1.0, 1.0], [1.0, 1.0]])
    animal = np.array([0, 0, 1, 1])
    np.testing.assert_array_equal(design_rows(X, animal, np.array([True, True])), X[[0, 2]])
    # a condition that varies within animals: every run's row, and the condition
    # coefficient is a difference of runs
    Xw = np.array([[1.0, 0.0], [1.0, 1.0], [1.0, 0.0], [1.0, 1.0]])
    rows = design_rows(Xw, animal, np.array([True, False]))
    np.testing.assert_array_equal(rows, Xw)
    assert contrast_kind(rows, [0.0, 1.0]).kind == DIFFERENCE
    assert contrast_kind(rows, [1.0, 1.0]).kind == MEAN


# --------------------------------------------------------------------------------------
# 2. sign-aware symmetry verdict (pure)
# --------------------------------------------------------------------------------------


def _test(left, right, diff=(0.0, 0.9), tost_p=0.01, total=-1.0):
    return HemisphereTest(
        left_effect=left[0],
        left_se=0.1,
        left_p=left[1],
        right_effect=right[0],
        right_se=0.1,
        right_p=right[1],
        difference=diff[0],
        se=0.05,
        t=diff[0] / 0.05,
        df=9.0,
        p=diff[1],
        ci_low=diff[0] - 0.1,
        ci_high=diff[0] + 0.1,
        total=total,
        margin_li=0.2,
        margin=0.2,
        tost_p_lower=tost_p,
        tost_p_upper=tost_p,
        tost_p=tost_p,
        n_runs=20,
        n_animals=10,
        confidence=0.95,
    )


@pytest.mark.parametrize(
    ("sided", "label", "sign"),
    [
        ("two", "negative response, bilateral (equivalence shown)", "negative"),
        ("negative", "negative response, bilateral (equivalence shown)", "negative"),
        ("positive", NO_ACTIVATION, ""),
    ],
)
def test_negative_bilateral_response_by_sided(sided, label, sign):
    # The rule of docs/verdicts-symmetry.md (our own rule; alpha 0.05 common practice).
    v = symmetry_verdict(_test((-0.5, 0.001), (-0.5, 0.002)), sided=sided)
    assert v.label == label and v.sign == sign


def test_negative_response_dominance_is_by_magnitude():
    # L − R = −0.3 with both sides negative: the left response is the larger one
    v = symmetry_verdict(
        _test((-0.8, 0.001), (-0.5, 0.001), diff=(-0.3, 0.004)), stimulus_side="right"
    )
    assert v.label == "negative response, left-dominant"
    assert v.side == "contralateral"
    # a positive response with a negative-only rule: nothing counts
    pos = symmetry_verdict(_test((0.8, 0.001), (0.5, 0.001), diff=(0.3, 0.004)), sided="negative")
    assert pos.label == NO_ACTIVATION
    assert any("not counted" in r for r in pos.reasons)


def test_opposite_signs_and_narrowed_signs():
    v = symmetry_verdict(_test((0.5, 0.001), (-0.5, 0.001), diff=(1.0, 0.001)))
    assert v.label == "opposite signs (left positive, right negative)" and v.sign == ""
    # the questions pass the map's response signs; a positive-only map counts no negative
    narrowed = symmetry_verdict(_test((-0.5, 0.001), (-0.5, 0.001)), signs=("positive",))
    assert narrowed.label == NO_ACTIVATION


def test_lateralisation_of_a_difference_equals_statsmodels():
    # Reference: statsmodels MixedLM (REML, random intercept per animal) of the per-run
    # L − R on the group indicator: the group coefficient is the difference of the two
    # groups' hemispheric differences. Group b's response is planted on the left only.
    rng = np.random.default_rng(12)
    animals = np.repeat(np.arange(12), 2)
    group = (animals >= 6).astype(float)
    u = rng.normal(0, 0.3, 12)[animals]
    tilt = rng.normal(0, 0.3, 12)[animals]  # each animal's own left/right imbalance
    left = 0.5 + 0.8 * group + u + tilt + rng.normal(0, 0.3, 24)
    right = 0.5 + u + rng.normal(0, 0.3, 24)
    X = np.column_stack([np.ones(24), group])
    c = np.array([0.0, 1.0])
    res = hemisphere_test(left, right, animals, X=X, c=c)
    frame = pd.DataFrame({"d": left - right, "g": group, "a": animals})
    fit = smf.mixedlm("d ~ g", frame, groups=frame["a"]).fit(reml=True)
    assert res.difference == pytest.approx(float(fit.fe_params["g"]), abs=1e-4)
    assert res.se == pytest.approx(float(fit.bse_fe["g"]), rel=1e-3)
    v = lateralisation_difference_verdict(res, stimulus_side="right")
    assert res.p < 0.05
    assert v.label == "lateralisation differs (the contrast is larger on the left)"
    assert v.side == "contralateral"
    flat = lateralisation_difference_verdict(_test((0.2, 0.01), (0.2, 0.01), diff=(0.0, 0.9)))
    assert flat.label == "no evidence that the lateralisation differs"
    assert any("does not show that the lateralisation is the same" in r for r in flat.reasons)


def test_hemisphere_test_of_a_group_mean_equals_statsmodels():
    # Reference: statsmodels MixedLM (REML, random intercept per animal) of the per-run
    # L − R on the group indicator; the mean of group b is Intercept + group[T.b].
    rng = np.random.default_rng(11)
    animals = np.repeat(np.arange(10), 3)
    group = (animals >= 5).astype(float)
    u = rng.normal(0, 0.3, 10)[animals]
    left = 1.0 + 0.5 * group + u + rng.normal(0, 0.4, 30)
    right = 0.8 + 0.2 * group + u + rng.normal(0, 0.4, 30)
    X = np.column_stack([np.ones(30), group])
    res = hemisphere_test(left, right, animals, X=X, c=np.array([1.0, 1.0]))
    frame = pd.DataFrame({"d": left - right, "g": group, "a": animals})
    fit = smf.mixedlm("d ~ g", frame, groups=frame["a"]).fit(reml=True)
    cvec = np.array([1.0, 1.0])
    cov = fit.cov_params().iloc[:2, :2].to_numpy()
    assert res.difference == pytest.approx(float(fit.fe_params.to_numpy() @ cvec), abs=1e-4)
    assert res.se == pytest.approx(float(np.sqrt(cvec @ cov @ cvec)), rel=1e-3)
    assert res.df == pytest.approx(8.0)  # 10 animals − 2 animal-level columns


# --------------------------------------------------------------------------------------
# 3. end to end: a two-group design, a negative response, a one-sided target
# --------------------------------------------------------------------------------------

TWO_GROUP_TOML = """[model]
formula = "1 + group"

[[contrast]]
name = "mean_a"
weights = { "Intercept" = 1.0 }

[[contrast]]
name = "mean_b"
weights = { "Intercept" = 1.0, "group[T.b]" = 1.0 }

[[contrast]]
name = "b_minus_a"
weights = { "group[T.b]" = 1.0 }

[questions]
symmetry = ["forelimb area"]
targets = ["forelimb area"]
"""


@pytest.fixture(scope="module")
def two_group(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("two_group")
    groups = ["a"] * 4 + ["b"] * 4
    toml = _study(
        folder / "study",
        _both_sides(),
        amplitude=[1.0] * 4 + [2.5] * 4,
        groups=groups,
        toml=TWO_GROUP_TOML,
    )
    return run_study(toml, folder / "out")


def test_two_group_design_asks_each_group_mean(two_group):
    summary = json.loads((two_group / "summary.json").read_text())
    for name in ("mean_a", "mean_b"):
        q = summary["results"][name]["questions"]
        assert q["asked"] and q["contrast_kind"] == "mean"
        assert q["symmetry"]["forelimb area"]["verdict"].startswith("bilateral")
        assert q["specificity"]["verdict"] == "specific to target"
        assert q["consistency"]["verdict"] == "all animals agree"
        # each group's mean is judged on its own four animals
        group = ["a0", "a1", "a2", "a3"] if name == "mean_a" else ["a4", "a5", "a6", "a7"]
        assert q["consistency"]["animals_in_mean"] == group
        assert q["consistency"]["animals_agreeing"] == 4
        # run quality compares the runs of that group only (2 runs × 4 animals)
        assert q["run_quality"]["runs"] == 8
        assert q["not_assessed"] == {}
    diff = summary["results"]["b_minus_a"]["questions"]
    assert not diff["asked"] and diff["contrast_kind"] == "difference"
    # a group difference gets its own consistency (the groups' overlap) and the run
    # quality of each group's runs among themselves
    assert diff["not_assessed"] == {}
    assert diff["consistency"]["level"] == "between-group"
    assert diff["consistency"]["groups"]["plus"]["group"] == "group b"
    assert diff["consistency"]["groups"]["plus"]["animals"] == 4
    assert diff["consistency"]["caution"]
    assert diff["run_quality"]["runs"] == 16
    quality = pd.read_csv(two_group / "b_minus_a" / "run_quality.tsv", sep="\t")
    assert sorted(set(quality["side"])) == ["group a", "group b"]
    # the difference (b larger than a, planted in the forelimb area only) is specific to
    # the target, and its direction is named
    assert diff["specificity"]["verdict"] == "specific to target (positive difference)"
    assert diff["response"]["signs"] == ["positive"]
    # the difference's own symmetry question: does the lateralisation differ? Group b
    # has a larger response on both sides alike, so no evidence that it differs.
    lat = diff["symmetry"]["forelimb area"]
    assert lat["verdict"] == "no evidence that the lateralisation differs"
    assert lat["test"]["p"] > 0.05
    assert (two_group / "b_minus_a" / "lateralisation_difference.tsv").is_file()
    # no warning of questions not asked: every contrast is a mean or a difference
    assert not [w for w in summary["warnings"] if "questions are asked of" in w]
    html = (two_group / "report.html").read_text()
    assert "the groups separate" in html
    # what the overlap does not show is among the result's cautions
    assert "The overlap compares the animals" in html
    assert "Lateralisation differs?" in html


def _area_values(summary) -> tuple[pd.DataFrame, np.ndarray]:
    """The runs and each run's mean over the forelimb area, read from the maps."""
    study = load_study(Path(summary["settings"]["source"]))
    fl = study.first_levels[0]
    area = _atlas_image() == 1
    values = [
        float(np.asarray(nib.load(row["effect"]).dataobj)[area].mean())
        for _, row in fl.runs.iterrows()
    ]
    return fl.runs, np.array(values)


def test_group_difference_overlap_equals_mann_whitney(two_group):
    # Reference: scipy.stats.mannwhitneyu on each animal's mean forelimb-area value
    # (two runs of equal weight per animal): A = U / (n_b · n_a) (McGraw & Wong 1992).
    summary = json.loads((two_group / "summary.json").read_text())
    runs, values = _area_values(summary)
    frame = pd.DataFrame({"animal": runs["animal"], "group": runs["group"], "v": values})
    means = frame.groupby("animal").agg(group=("group", "first"), v=("v", "mean"))
    b, a = means["v"][means["group"] == "b"], means["v"][means["group"] == "a"]
    ref = stats.mannwhitneyu(b, a, alternative="two-sided")
    cons = summary["results"]["b_minus_a"]["questions"]["consistency"]
    assert cons["probability_of_superiority"] == pytest.approx(ref.statistic / 16, abs=1e-12)
    assert cons["mann_whitney_p"] == pytest.approx(ref.pvalue, rel=1e-9)
    assert cons["groups"]["plus"]["median"] == pytest.approx(float(np.median(b)), rel=1e-6)
    assert cons["groups"]["minus"]["max"] == pytest.approx(float(a.max()), rel=1e-6)


def test_group_mean_consistency_equals_statsmodels(two_group):
    # Reference: statsmodels MixedLM (REML) of each run's mean over the forelimb area on
    # the group indicator; the group-b mean is the sum of the two coefficients.
    summary = json.loads((two_group / "summary.json").read_text())
    study = load_study(Path(summary["settings"]["source"]))
    fl = study.first_levels[0]
    area = _atlas_image() == 1
    values = []
    for _, row in fl.runs.iterrows():
        values.append(float(np.asarray(nib.load(row["effect"]).dataobj)[area].mean()))
    frame = pd.DataFrame({"v": values, "g": (fl.runs["group"] == "b").astype(float)})
    frame["a"] = fl.runs["animal"].to_numpy()
    fit = smf.mixedlm("v ~ g", frame, groups=frame["a"]).fit(reml=True)
    cons = summary["results"]["mean_b"]["questions"]["consistency"]
    assert cons["effect"] == pytest.approx(float(fit.fe_params.sum()), abs=1e-4)
    cons_a = summary["results"]["mean_a"]["questions"]["consistency"]
    assert cons_a["effect"] == pytest.approx(float(fit.fe_params["Intercept"]), abs=1e-4)


QUESTIONS_TOML = """[questions]
symmetry = ["forelimb area"]
targets = ["forelimb area"]
"""


@pytest.fixture(scope="module")
def negative(tmp_path_factory) -> dict[str, dict]:
    out = {}
    for sided in ("two", "negative", "positive"):
        folder = tmp_path_factory.mktemp(f"negative_{sided}")
        toml = _study(folder / "study", _both_sides(), amplitude=-1.0, toml=QUESTIONS_TOML)
        text = toml.read_text().replace(
            "permutations = 0\n", f'permutations = 0\nsided = "{sided}"\n'
        )
        toml.write_text(text)
        out[sided] = _answers(toml)["mean"]
    return out


@pytest.mark.parametrize("sided", ["two", "negative"])
def test_negative_response_verdicts_agree(negative, sided):
    q = negative[sided]
    assert q["response"]["signs"] == ["negative"]
    # a stray positive voxel or two among the FDR discoveries is not a response: at most
    # alpha of the surviving voxels (Benjamini & Hochberg 1995 bound the false share)
    counts = q["response"]
    assert counts["negative_voxels"] > 50
    total = counts["positive_voxels"] + counts["negative_voxels"]
    assert counts["positive_voxels"] <= 0.05 * total
    sym = q["symmetry"]["forelimb area"]
    assert sym["verdict"].startswith("negative response, bilateral")
    assert sym["sign"] == "negative"
    assert q["specificity"]["verdict"] == "specific to target (negative response)"
    assert q["consistency"]["verdict"] == "all animals agree (negative response)"
    assert q["consistency"]["animals_agreeing"] == 8
    # the LIs describe the magnitude of the negative response: near 0, not undefined
    assert abs(sym["li_effect"]) < 0.3


def test_positive_only_inference_sees_no_negative_response(negative):
    q = negative["positive"]
    assert q["response"]["signs"] == []
    assert q["symmetry"]["forelimb area"]["verdict"] == NO_ACTIVATION
    assert q["specificity"]["verdict"] == "no activation"
    assert q["consistency"]["verdict"] == "no response to be consistent about"


@pytest.fixture(scope="module")
def one_sided(tmp_path_factory) -> Path:
    response = np.zeros(SHAPE)
    response[RIGHT_FL] = 1.0  # a left-side stimulus drives the right hemisphere
    folder = tmp_path_factory.mktemp("one_sided")
    toml = """[questions]
stimulus_side = "left"
targets = ["forelimb area (contralateral)"]
symmetry = ["forelimb area"]
"""
    return _study(folder / "study", response, amplitude=0.6, toml=toml, seed=5)


def test_one_sided_target_uses_that_hemisphere(one_sided):
    answers = _fitted(one_sided)["mean"]
    q = answers.summary(0.05)
    # Hand computation: each run's mean over the right forelimb area's voxels, then the
    # REML intercept of statsmodels MixedLM with a random intercept per animal.
    study = load_study(one_sided)
    runs = study.first_levels[0].runs
    values = [float(np.asarray(nib.load(p).dataobj)[RIGHT_FL].mean()) for p in runs["effect"]]
    frame = pd.DataFrame({"v": values, "a": runs["animal"].to_numpy()})
    fit = smf.mixedlm("v ~ 1", frame, groups=frame["a"]).fit(reml=True)
    cons = q["consistency"]
    assert cons["effect"] == pytest.approx(float(fit.fe_params["Intercept"]), abs=1e-4)
    # each animal's own effect is the plain mean of its runs (equal weights without
    # first-level variances; hand computation)
    own = frame.groupby("a", sort=False)["v"].mean()
    animals = answers.consistency.animals.set_index("animal")
    np.testing.assert_allclose(animals.loc[own.index, "effect"], own.to_numpy(), atol=1e-6)
    assert q["specificity"]["targets"] == ["forelimb area (right)"]
    # both sides as the target: the unstimulated side halves the effect (hand computation)
    both = _answers_with_targets(one_sided, '["forelimb area"]')
    both_values = [
        float(np.asarray(nib.load(p).dataobj)[_atlas_image() == 1].mean()) for p in runs["effect"]
    ]
    frame_b = pd.DataFrame({"v": both_values, "a": runs["animal"].to_numpy()})
    fit_b = smf.mixedlm("v ~ 1", frame_b, groups=frame_b["a"]).fit(reml=True)
    assert both["consistency"]["effect"] == pytest.approx(
        float(fit_b.fe_params["Intercept"]), abs=1e-4
    )
    assert both["consistency"]["effect"] < 0.7 * cons["effect"]
    # the symmetry verdict names the stimulated side's opposite as the responding one
    sym = q["symmetry"]["forelimb area"]
    assert sym["verdict"].startswith("unilateral (right)")
    assert sym["side"] == "contralateral"


def _answers_with_targets(toml: Path, targets: str) -> dict:
    text = toml.read_text()
    other = toml.parent / "study_both.toml"
    other.write_text(text.replace('["forelimb area (contralateral)"]', targets))
    return _answers(other)["mean"]


def test_plan_uses_the_named_hemisphere():
    table = pd.DataFrame(
        {
            "index": [1, 4, 5],
            "name": ["forelimb area"] * 3,
            "hemisphere": ["both", "left", "right"],
            "p": [0.01, 0.2, 0.001],
        }
    )
    path = Path("regions.tsv")
    rows = _chosen_rows(table, None, ["forelimb area (contralateral)"], path, "left")
    np.testing.assert_array_equal(rows, [2])
    rows = _chosen_rows(table, ["forelimb area (left)"], [], path)
    np.testing.assert_array_equal(rows, [1])
    assert len(_chosen_rows(table, None, ["forelimb area"], path)) == 3
    with pytest.raises(UserError, match="stimulus_side"):
        _chosen_rows(table, None, ["forelimb area (ipsilateral)"], path, None)


def test_split_side_spelling():
    assert split_side("forelimb area (Right)") == ("forelimb area", "right")
    assert split_side("forelimb area ( contralateral )") == ("forelimb area", "contralateral")
    assert split_side("area (CA1)") == ("area (CA1)", "")
    assert split_side("forelimb area") == ("forelimb area", "")


# --------------------------------------------------------------------------------------
# 4. the edge-artefact flag in every answer
# --------------------------------------------------------------------------------------


def test_edge_artefact_flag_reaches_symmetry_and_consistency(tmp_path):
    # A response confined to the dorsal surface layer of the brain (the whole grid):
    # the specificity edge rule fires (docs/verdicts-specificity.md, our own rule).
    labels = np.full(SHAPE, 2.0)
    labels[:, :, 6:] = 1
    table = "index\tname\tabbreviation\themisphere\n1\tcortex\tCX\t\n2\tdeep\tDP\t\n"
    response = np.zeros(SHAPE)
    response[:, :, 7] = 1.0
    toml = '[questions]\nsymmetry = ["cortex"]\ntargets = ["cortex"]\n'
    path = _study(
        tmp_path / "study", response, amplitude=1.5, toml=toml, labels=labels, atlas_table=table
    )
    q = _answers(path)["mean"]
    assert q["specificity"]["verdict"] == "likely artefact (edge)"
    assert q["artefact_flag"]
    sym = q["symmetry"]["cortex"]["verdict"]
    assert sym.startswith("bilateral") and sym.endswith(EDGE_FLAG_SUFFIX)
    assert q["consistency"]["verdict"] == "all animals agree" + EDGE_FLAG_SUFFIX


# --------------------------------------------------------------------------------------
# 5. check validates every [questions] region
# --------------------------------------------------------------------------------------


def test_check_refuses_bad_question_regions(tmp_path, capsys):
    toml = """[questions]
symmetry = ["septum", "forelimb area", "FL"]
targets = ["forelimb area (contralateral)", "septum (left)", "nowhere"]
"""
    path = _study(tmp_path / "study", _both_sides(), toml=toml, animals=3)
    code = main(["check", str(path)])
    text = capsys.readouterr().err
    assert code == 2
    assert "symmetry: region 'septum'" in text and "0 left and 0 right" in text
    assert "same left/right pair" in text  # FL is the forelimb area's abbreviation
    assert "stimulus_side" in text  # contralateral without a stimulated side
    assert "no left-hemisphere part of 'septum'" in text
    assert "'nowhere' is not in the atlas" in text
    assert "Traceback" not in text


_WORDS = ("bilateral", "specific", "consistent", "run quality")


def test_report_never_says_not_assessed_without_a_reason():
    # a result not asked: every question with the summary's reason
    reason = "asked of group means and differences only; the weights sum to 2"
    questions = {"asked": False, "not_assessed": dict.fromkeys(QUESTIONS, reason)}
    unasked = _unasked({}, questions, {})
    assert unasked == [f"{word} — {reason}" for word in _WORDS]
    # an older folder without reasons: the reason is that none was recorded
    old = _unasked({}, {}, {})
    assert len(old) == 3 and all("no reason recorded" in u for u in old)
    # answered questions are not listed
    assert _unasked({}, {"symmetry": {"x": {}}, "not_assessed": {}}, {"consistency": 1}) == [
        "specific — no reason recorded (this folder was written by an older version, which "
        "asked the questions only of the mean of an intercept-only design)"
    ]


# --------------------------------------------------------------------------------------
# 4. a within-animal difference with a random slope (drug − vehicle runs)
# --------------------------------------------------------------------------------------

DRUG_TOML = """[model]
formula = "1 + drug"

[[contrast]]
name = "drug_minus_vehicle"
weights = { "drug[T.yes]" = 1.0 }

[[contrast]]
name = "drug_mean"
weights = { "Intercept" = 1.0, "drug[T.yes]" = 1.0 }

[questions]
targets = ["forelimb area"]
symmetry = ["forelimb area"]
"""


@pytest.fixture(scope="module")
def drug(tmp_path_factory) -> tuple[Path, dict]:
    """Six animals, two vehicle and two drug runs each; the drug adds a forelimb-area
    response whose size varies from animal to animal (invented numbers)."""
    folder = tmp_path_factory.mktemp("drug") / "study"
    folder.mkdir()
    rng = np.random.default_rng(11)
    response = _both_sides()
    rows = []
    for a in range(6):
        offset = rng.normal(0, 0.2, SHAPE)
        slope = 2.0 + rng.normal(0, 0.3)
        for r, given in enumerate(["no", "no", "yes", "yes"]):
            data = offset + (slope * response if given == "yes" else 0) + rng.normal(0, 0.3, SHAPE)
            path = save(folder / "maps" / f"a{a}_r{r}.nii.gz", data, AFFINE)
            rows.append({"animal": f"a{a}", "run": r + 1, "drug": given, "effect": str(path)})
    pd.DataFrame(rows).to_csv(folder / "runs.tsv", sep="\t", index=False)
    save(folder / "atlas.nii.gz", _atlas_image(), AFFINE)
    (folder / "atlas.tsv").write_text(ATLAS_TABLE)
    (folder / "study.toml").write_text(
        '[study]\ntable = "runs.tsv"\n\n[inference]\npermutations = 0\n\n'
        '[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\nmidline_mm = 0.0\n\n' + DRUG_TOML
    )
    maps, _ = fit_study(load_study(folder / "study.toml"))
    return folder / "study.toml", {m.name: m for m in maps}


def test_within_animal_difference_counts_each_animals_own_difference(drug):
    # References: each animal's own difference by brute force (mean of its drug runs −
    # mean of its vehicle runs: two runs of equal weight each); its SE and the group
    # difference against statsmodels MixedLM (REML, random intercept and drug slope per
    # animal) on the runs' forelimb-area values; Cochran's Q against statsmodels
    # combine_effects.
    toml, maps = drug
    gm = maps["drug_minus_vehicle"]
    q = gm.answers.summary(0.05)
    assert q["contrast_kind"] == "difference"
    assert q["not_assessed"] == {}
    # the lateralisation difference is tested like the map: slope df = animals − 1
    # (common practice for a within-animal effect with a random slope; the run-level
    # df would be 24 runs − 6 animals − 1 = 17)
    assert q["symmetry"]["forelimb area"]["test"]["df"] == pytest.approx(5.0)
    cons = q["consistency"]
    assert cons["level"] == "within-animal" and cons["caution"]
    assert cons["verdict"] == "all animals agree"
    runs = load_study(toml).first_levels[0].runs
    area = _atlas_image() == 1
    values = np.array([float(np.asarray(nib.load(p).dataobj)[area].mean()) for p in runs["effect"]])
    frame = pd.DataFrame({"v": values, "d": (runs["drug"] == "yes").astype(float)})
    frame["a"] = runs["animal"].to_numpy()
    own = frame[frame.d == 1].groupby("a").v.mean() - frame[frame.d == 0].groupby("a").v.mean()
    table = gm.answers.consistency.table().set_index("animal")
    # float32 maps: the region means agree to float32 rounding
    np.testing.assert_allclose(table.loc[own.index, "effect"], own.to_numpy(), rtol=1e-6)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm("v ~ d", frame, groups=frame["a"], re_formula="~d").fit(reml=True)
    assert cons["effect"] == pytest.approx(float(ref.fe_params["d"]), rel=2e-3)
    assert cons["se"] == pytest.approx(float(ref.bse_fe["d"]), rel=5e-3)
    # the region table fits the same slope model, with the slope's df (animals − 1)
    regions = gm.tables.regions
    row = regions[(regions["name"] == "forelimb area") & (regions["hemisphere"] == "both")]
    assert float(row["effect"].iloc[0]) == pytest.approx(float(ref.fe_params["d"]), rel=2e-3)
    assert float(row["se"].iloc[0]) == pytest.approx(float(ref.bse_fe["d"]), rel=5e-3)
    assert float(row["df"].iloc[0]) == pytest.approx(5.0)
    np.testing.assert_allclose(table["se"], np.sqrt(ref.scale), rtol=5e-3)  # √(σ²/2 + σ²/2)
    meta = combine_effects(table["effect"].to_numpy(), table["se"].to_numpy() ** 2)
    assert cons["heterogeneity"]["cochran_q"] == pytest.approx(float(meta.q), rel=1e-9)
    # run quality: the vehicle runs and the drug runs, each among themselves
    quality = gm.answers.run_quality.table()
    assert sorted(set(quality["side"])) == ["drug no", "drug yes"]
    assert len(quality) == 24
    # the model has a random slope: the notes say which internal tests use it
    assert any("random slopes" in n for n in q["notes"])


def test_extended_model_smoothness_standardises_by_the_slope_models_variance(drug):
    # Reference: brute force — each run's residual divided by the square root of the
    # diagonal of Z T Zᵀ + σ² written out from the slope model's components (Laird &
    # Ware 1982), then the same smoothness estimate; and the residual standard deviation
    # of a random-intercept reading (τ² + σ²) differs for the drug runs, so the test can
    # tell the two apart.
    from grouplevel.inference import estimate_smoothness
    from grouplevel.pipeline import _fit, _fitted_voxels, _smoothness
    from grouplevel.results.compute import random_terms

    toml, _ = drug
    study = load_study(toml)
    fl = study.first_levels[0]
    y, s2, mask = _fitted_voxels(study, fl, "t", [])
    fitted = _fit(study, fl, "t", y, s2, mask, lambda _m: None, None, [])
    fit, design = fitted.fit, fl.design
    terms = random_terms(design, fl.random)
    got = _smoothness(y, s2, fit, design.matrix, design.animal, terms, mask, study.grid)
    comps = fit.components
    (name,) = [k for k in comps if k.startswith("slope[")]
    cov_name = "cov[" + name[len("slope[") :]
    z = design.matrix[:, list(fl.random.slope_columns)][:, 0]
    total = comps["animal"] + 2 * z[:, None] * comps[cov_name] + z[:, None] ** 2 * comps[name]
    total = total + comps["run"]
    resid = y - design.matrix @ fit.beta.T
    standard = np.where(np.isfinite(resid / np.sqrt(total)), resid / np.sqrt(total), 0.0)
    dof = y.shape[0] - np.linalg.matrix_rank(design.matrix)
    ref = estimate_smoothness(standard, mask, study.grid.voxel_size, float(dof))
    np.testing.assert_allclose(got.fwhm_mm, ref.fwhm_mm, rtol=1e-5)
    intercept_only = comps["animal"] + comps["run"]
    drug_runs = z != 0
    assert np.nanmedian(np.abs(total[drug_runs] / intercept_only - 1)) > 0.05


def test_a_mean_of_a_slope_model_is_asked_with_that_model(drug):
    # Reference: statsmodels MixedLM (REML, random intercept and drug slope per animal)
    # on the runs' forelimb-area values; the mean of the drug runs is the sum of its
    # two coefficients.
    toml, maps = drug
    gm = maps["drug_mean"]
    q = gm.answers.summary(0.05)
    assert q["asked"] and q["not_assessed"] == {}
    assert any("random slopes" in n for n in q["notes"])
    runs = load_study(toml).first_levels[0].runs
    area = _atlas_image() == 1
    values = np.array([float(np.asarray(nib.load(p).dataobj)[area].mean()) for p in runs["effect"]])
    frame = pd.DataFrame({"v": values, "d": (runs["drug"] == "yes").astype(float)})
    frame["a"] = runs["animal"].to_numpy()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm("v ~ d", frame, groups=frame["a"], re_formula="~d").fit(reml=True)
    cvec = np.array([1.0, 1.0])
    cov = ref.cov_params().iloc[:2, :2].to_numpy()
    assert q["consistency"]["effect"] == pytest.approx(float(ref.fe_params.sum()), rel=2e-3)
    assert q["consistency"]["se"] == pytest.approx(float(np.sqrt(cvec @ cov @ cvec)), rel=5e-3)
    # the asymmetry map is fitted with the same model; the run-quality reference maps
    # are downdates of it; only the drug runs (those in the mean) are scored
    assert np.isfinite(gm.answers.asymmetry.t).any()
    quality = gm.answers.run_quality.table()
    assert len(quality) == 12 and set(quality["run"]) == {"3", "4"}
