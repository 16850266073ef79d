"""Every script in benchmarks/ still runs to the end (at its ``--tiny`` sizes).

The benchmarks measure speed against a reference library in the same run (statsmodels
``MixedLM``, nilearn ``permuted_ols`` and its TFCE) and print ratios; timings are never
asserted (they belong to the scripts, run by hand at full size). These tests only keep
the scripts from rotting: each is imported from its file and its ``main(["--tiny"])`` is
called; the test checks that the ratio lines came out with finite positive numbers. A
missing reference library makes the script, and so the test, fail: the test extras
install statsmodels and nilearn.
"""

from __future__ import annotations

import importlib.util
import math
import re
import sys
from pathlib import Path

import pytest

BENCHMARKS = Path(__file__).resolve().parents[2] / "benchmarks"
NUMBER = r"([0-9][0-9,]*(?:\.[0-9]+)?)"

#: script -> the patterns of its ratio lines (each with one number)
RATIO_LINES = {
    "bench_atlas": [
        rf"ratio to the statistics grid: time {NUMBER}x for 8x the label voxels",
        rf"ratio to the statistics grid: time {NUMBER}x for 27x the label voxels",
    ],
    "bench_ftest": [
        rf"per-voxel speed ratio \(statsmodels f_test / ours\): {NUMBER}x",
        rf"time ratio permutation F / t: {NUMBER}x",
    ],
    "bench_inference": [
        rf"speed-up vs nilearn n_jobs=1, ellipsoid \(same work, 6-connectivity\): +{NUMBER}×",
        rf"speed-up vs nilearn n_jobs=2, ellipsoid \(same work, 6-connectivity\): +{NUMBER}×",
        rf"speed-up vs nilearn n_jobs=1, box \(same work, 6-connectivity\): +{NUMBER}×",
        rf"speed-up vs nilearn n_jobs=2, box \(same work, 6-connectivity\): +{NUMBER}×",
        rf"projected 5000 permutations, ellipsoid, 26-connectivity: +{NUMBER} s",
        rf"projected 5000 permutations, box, 26-connectivity: +{NUMBER} s",
        rf"peak memory, +4 permutations: +{NUMBER} MiB",
        rf"peak memory, +8 permutations: +{NUMBER} MiB",
    ],
    "bench_leave_one_out": [
        rf"time ratio refits / one step: {NUMBER}x",
        rf"time ratio one step / one full fit: {NUMBER}x",
    ],
    "bench_mixed": [
        rf"per-voxel speed ratio \(statsmodels / ours\): {NUMBER}x",
        rf"same ratio in CPU time \(process_time; robust to a busy machine\): {NUMBER}x",
    ],
    "bench_model": [
        rf"per-voxel speed ratio, same model \(no s²\): {NUMBER}x",
        rf"per-voxel speed ratio, full fit \(with s²\): {NUMBER}x",
    ],
    "bench_run": [
        rf"end-to-end speed ratio \(statsmodels loop / whole run\): {NUMBER}x",
        rf"whole run / fit alone: {NUMBER}x",
    ],
    "bench_scale": [
        rf"log-log slope of fit time against voxels × maps: (-?{NUMBER[1:-1]})",
        rf"log-log slope of load time against voxels × maps: (-?{NUMBER[1:-1]})",
        rf"whole-run peak RSS: {NUMBER} GiB",
    ],
    "bench_tfce": [
        rf"ratio nilearn / exact \(fastest\): +{NUMBER}",
        rf"ratio nilearn / exact \(median\): +{NUMBER}",
    ],
}


def _load(name: str):
    spec = importlib.util.spec_from_file_location(f"benchmark_{name}", BENCHMARKS / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up there
    spec.loader.exec_module(module)
    return module


def test_every_benchmark_is_covered():
    assert sorted(p.stem for p in BENCHMARKS.glob("bench_*.py")) == sorted(RATIO_LINES)


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(RATIO_LINES))
def test_benchmark_runs_at_tiny_size(name, capsys):
    _load(name).main(["--tiny"])
    out = capsys.readouterr().out
    for pattern in RATIO_LINES[name]:
        found = re.search(pattern, out)
        assert found, f"{name}: no line matching {pattern!r} in:\n{out}"
        value = float(found.group(1).replace(",", ""))
        assert math.isfinite(value), (name, pattern, value)
        if not pattern.startswith("log-log"):
            assert value > 0, (name, pattern, value)
