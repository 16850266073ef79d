"""The concepts that now have one home each, checked against outside references.

- each animal's precision-weighted mean (grouplevel.model.animals) against numpy's
  weighted average and the inverse-variance standard error sqrt(1 / Σ w) of a
  fixed-effect meta-analysis (Borenstein, Hedges, Higgins & Rothstein 2009,
  Introduction to Meta-Analysis, chapter 11; value from memory);
- the p of each side of a t test (grouplevel.inference.significance) against
  scipy.stats.ttest_1samp with its ``alternative`` argument;
- the core count (grouplevel.machine) on a system without os.sched_getaffinity;
- summary.json (grouplevel.outputs.summary): written with its format, a newer format
  refused, the same message for a missing folder wherever it is read.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
from scipy import stats

from grouplevel.errors import ArgumentError, UserError
from grouplevel.inference.significance import SIDES, check_sided, sided_p
from grouplevel.machine import available_cores
from grouplevel.model.animals import VARIANCE_FLOOR, animal_means
from grouplevel.outputs.summary import SUMMARY_FORMAT, read_summary, write_summary

RNG = np.random.default_rng(20261202)


def _study(n_animals=5, runs=(2, 3, 4, 1, 3), n_columns=7):
    animal = np.repeat(np.arange(n_animals), runs)
    y = RNG.normal(1.0, 1.0, (animal.size, n_columns))
    variance = RNG.uniform(0.2, 2.0, y.shape)
    var_run = RNG.uniform(0.1, 0.5, n_columns)
    return y, animal, variance, var_run


def test_animal_means_match_numpy_weighted_average():
    y, animal, variance, var_run = _study()
    y[1, 2] = np.nan  # a run without data at one column
    means = animal_means(y, animal, variance=variance, var_run=var_run)
    for a in range(animal.max() + 1):
        for v in range(y.shape[1]):
            rows = (animal == a) & np.isfinite(y[:, v])
            w = 1.0 / (var_run[v] + variance[rows, v])
            expected = np.average(y[rows, v], weights=w)  # numpy reference
            assert means.mean[a, v] == pytest.approx(expected, rel=1e-12, abs=1e-12)
            # inverse-variance SE of a fixed-effect mean (Borenstein et al. 2009)
            assert means.se[a, v] == pytest.approx(np.sqrt(1.0 / w.sum()), rel=1e-12)
            assert means.runs[a, v] == rows.sum()


def test_animal_means_without_variances_are_plain_means_with_unknown_se():
    y, animal, _, _ = _study()
    means = animal_means(y, animal)
    for a in range(animal.max() + 1):
        np.testing.assert_allclose(means.mean[a], y[animal == a].mean(axis=0), rtol=1e-12)
    assert np.isnan(means.se).all()  # σ̂² = 0 and no s²: floored, so no sampling SE
    assert means.floored.all()
    # the floor keeps the weights finite
    assert np.all(means.precision == (np.bincount(animal)[:, None] / VARIANCE_FLOOR))


def test_animal_means_do_not_depend_on_run_order():
    y, animal, variance, var_run = _study()
    order = RNG.permutation(animal.size)
    a = animal_means(y, animal, variance=variance, var_run=var_run)
    b = animal_means(y[order], animal[order], variance=variance[order], var_run=var_run)
    np.testing.assert_allclose(a.mean, b.mean, rtol=1e-12)
    np.testing.assert_allclose(a.precision, b.precision, rtol=1e-12)


def test_animal_means_reject_bad_arguments_in_their_own_words():
    y, animal, variance, _ = _study()
    with pytest.raises(ValueError, match="animal must hold"):
        animal_means(y, animal[:-1])
    with pytest.raises(ArgumentError, match="variance has shape"):
        animal_means(y, animal, variance=variance[:, :2])


@pytest.mark.parametrize("sided", SIDES)
def test_sided_p_matches_scipy_one_sample_t_test(sided):
    x = RNG.normal(0.3, 1.0, 12)
    alternative = {"two": "two-sided", "positive": "greater", "negative": "less"}[sided]
    reference = stats.ttest_1samp(x, 0.0, alternative=alternative)  # scipy reference
    t = np.array([reference.statistic])
    assert sided_p(t, np.array([11.0]), sided)[0] == pytest.approx(reference.pvalue, rel=1e-10)


def test_unknown_side_is_refused_naming_the_argument():
    with pytest.raises(ValueError, match=r"sided = 'both' is not known"):
        check_sided("both")


def test_cores_without_sched_getaffinity(monkeypatch):
    monkeypatch.delattr(os, "sched_getaffinity", raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: 3)
    assert available_cores() == 3
    monkeypatch.setattr(os, "cpu_count", lambda: None)
    assert available_cores() == 1


def test_summary_is_written_with_its_format_and_read_back(tmp_path):
    path = write_summary(tmp_path, {"results": {"sound": {"runs": 3}}, "title": "t"})
    raw = json.loads(path.read_text())
    assert raw["format"] == SUMMARY_FORMAT
    assert read_summary(tmp_path)["results"] == {"sound": {"runs": 3}}
    assert not list(tmp_path.glob(".*partial"))  # the temporary file was renamed


def test_summary_of_a_newer_format_is_refused(tmp_path):
    (tmp_path / "summary.json").write_text(
        json.dumps({"format": SUMMARY_FORMAT + 1, "results": {}})
    )
    with pytest.raises(UserError, match="newer than this grouplevel reads"):
        read_summary(tmp_path)


def test_summary_without_a_format_entry_is_read_as_the_first(tmp_path):
    (tmp_path / "summary.json").write_text(json.dumps({"results": {"a": {}}}))
    assert read_summary(tmp_path)["results"] == {"a": {}}


def test_report_and_plan_give_the_same_error_for_a_missing_folder(tmp_path):
    from grouplevel.planning import plan_from_output
    from grouplevel.report import render_report

    messages = []
    for read in (render_report, plan_from_output):
        with pytest.raises(UserError) as caught:
            read(tmp_path / "nowhere")
        messages.append(str(caught.value))
    assert messages[0] == messages[1]
    assert "summary.json: not found" in messages[0]
