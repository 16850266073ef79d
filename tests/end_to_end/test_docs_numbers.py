"""Numbers the user guide quotes about the example are the example's own numbers.

docs/verdicts-specificity.md describes the invented example's consistency and run
quality with numbers; they are read here from the page and compared with what the
example prints (the session's finished example run, tests/conftest.py
``example_output``: the same data and questions as `grouplevel demo`; its permutation
count does not enter these numbers, which come from the REML fits of the target values,
the per-animal means and the leave-one-animal-out maps). The page is the outside text
checked; the reference values are the example's summary.json and TSV files.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pandas as pd
import pytest

PAGE = Path(__file__).resolve().parents[2] / "docs" / "verdicts-specificity.md"


def _page() -> str:
    return re.sub(r"\s+", " ", PAGE.read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def sound(example_output) -> dict:
    summary = json.loads((example_output / "summary.json").read_text())
    return summary["results"]["sound"]


def test_consistency_example_is_what_the_example_prints(sound):
    m = re.search(
        r"(\d+) of (\d+) animals positive, (\d+) with CI above 0, ICC ([\d.]+), most "
        r"influential (\w+) \(leaving it out changes the target effect by ([+-][\d.]+) of "
        r"([\d.]+)\)",
        _page(),
    )
    assert m is not None, "the consistency example sentence is missing from the page"
    c = sound["questions"]["consistency"]
    assert int(m[1]) == c["animals_positive"] and int(m[2]) == c["animals"]
    assert int(m[3]) == c["animals_ci_above_zero"]
    assert float(m[4]) == pytest.approx(c["icc"], abs=0.005)  # printed to 2 decimals
    assert m[5] == c["most_influential_animal"]
    assert float(m[6]) == pytest.approx(c["most_influential_change"], abs=0.0005)
    assert float(m[7]) == pytest.approx(c["effect"], abs=0.0005)


def test_leave_one_out_example_is_what_the_example_prints(example_output):
    m = re.search(
        r"leaving out (\w+) \(the motion animal\) changes the t map most \(correlation "
        r"([\d.]+); the other animals ([\d.]+) to ([\d.]+)\)",
        _page(),
    )
    assert m is not None
    loo = pd.read_csv(example_output / "sound" / "leave_one_out.tsv", sep="\t")
    worst = loo.loc[loo["t_correlation"].idxmin()]
    assert m[1] == worst["animal"]
    assert float(m[2]) == pytest.approx(worst["t_correlation"], abs=0.005)
    others = loo[loo["animal"] != worst["animal"]]["t_correlation"]
    assert float(m[3]) == pytest.approx(others.min(), abs=0.005)
    assert float(m[4]) == pytest.approx(others.max(), abs=0.005)


def test_run_quality_example_is_what_the_example_prints(example_output):
    m = re.search(
        r"flagged are the five runs of (\w+) \(edge score ([\d.]+) to ([\d.]+) against at "
        r"most ([\d.]+) for every other run; robust z (\d+) to (\d+)\) and the three runs "
        r"the generator made noisy \(first-level variance × 4: (\w+) run (\d), (\w+) run "
        r"(\d), (\w+) run (\d); mean variance ([\d.]+) to ([\d.]+) against about ([\d.]+); "
        r"robust z (\d+) to (\d+)\)",
        _page(),
    )
    assert m is not None
    runs = pd.read_csv(example_output / "sound" / "run_quality.tsv", sep="\t")
    flagged = runs[runs["flagged"]]
    moving = flagged[flagged["animal"] == m[1]]
    assert len(moving) == 5
    assert float(m[2]) == pytest.approx(moving["edge_score"].min(), abs=0.005)
    assert float(m[3]) == pytest.approx(moving["edge_score"].max(), abs=0.005)
    rest = runs[runs["animal"] != m[1]]
    assert float(m[4]) == pytest.approx(rest["edge_score"].max(), abs=0.005)
    assert int(m[5]) == round(moving["z_edge"].min()) and int(m[6]) == round(moving["z_edge"].max())
    noisy = {(m[7], int(m[8])), (m[9], int(m[10])), (m[11], int(m[12]))}
    others = flagged[flagged["animal"] != m[1]]
    assert {(a, int(r)) for a, r in zip(others["animal"], others["run"], strict=True)} == noisy
    assert float(m[13]) == pytest.approx(others["mean_variance"].min(), abs=0.005)
    assert float(m[14]) == pytest.approx(others["mean_variance"].max(), abs=0.005)
    typical = runs[~runs["flagged"]]["mean_variance"].median()
    assert float(m[15]) == pytest.approx(typical, abs=0.02)  # "about"
    assert int(m[16]) == round(others["z_variance"].min())
    assert int(m[17]) == round(others["z_variance"].max())
    assert len(flagged) == 8  # "No other run is flagged."
