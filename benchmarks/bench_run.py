"""Benchmark of a whole parametric ``grouplevel run`` against a statsmodels loop.

The synthetic study of ``bench_scale`` (uncompressed ``.nii`` effect and variance maps,
a box-shaped mask, no atlas) with 107 520 voxels and 10 animals × 4 runs is run by
``grouplevel run --permutations 0`` in a fresh child process, as a user would run it:
import, validation, reading the maps, the REML fit, the contrast and its correction, the
maps, summary.json and the report. The child prints the wall time per step from the
run's own clock (:class:`grouplevel.timing.StepClock`) and the import time; the parent
times statsmodels ``MixedLM`` (REML, random intercept, the same model without
first-level variances) on sampled voxels of the same data, per voxel.

Printed ratios (one run, so a busy machine slows both sides alike):

* ``end-to-end speed ratio (statsmodels loop / whole run)``: statsmodels' time per voxel ×
  voxels, over the whole run's wall time (target ≥ 300×);
* ``whole run / fit alone``: the run's wall time over its fit step (target ≤ 3).

Run with ``.venv/bin/python benchmarks/bench_run.py`` (optionally ``--voxels N``).
``--tiny`` (2 000 voxels, 6 animals × 2 runs, 10 voxels for statsmodels) runs to the end
in seconds: a check that the script still runs (tests/end_to_end/test_benchmarks.py),
not a measurement.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd

N_ANIMALS, RUNS_PER_ANIMAL, N_VOXELS = 10, 4, 107_520
N_STATSMODELS = 100  # voxels fitted by the statsmodels loop
TINY_ANIMALS, TINY_RUNS, TINY_VOXELS, TINY_STATSMODELS = 6, 2, 2_000, 10


def _bench_scale():
    """The sibling script whose synthetic study this benchmark reuses."""
    path = Path(__file__).with_name("bench_scale.py")
    spec = importlib.util.spec_from_file_location("bench_scale", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def child(toml: str, out: str) -> None:
    """Import grouplevel and run the study as ``grouplevel run`` does; print JSON times."""
    t0 = time.perf_counter()
    from grouplevel import pipeline
    from grouplevel.timing import StepClock

    import_s = time.perf_counter() - t0
    lines: list[str] = []
    clock = StepClock()
    t0 = time.perf_counter()
    pipeline.run_study(toml, out, force=True, log=lines.append, clock=clock)
    run_s = time.perf_counter() - t0
    print(json.dumps({"import_s": import_s, "run_s": run_s, "steps": clock.seconds}))


def statsmodels_seconds_per_voxel(folder: Path, n_sample: int, seed: int) -> float:
    """statsmodels MixedLM (REML, random intercept) per voxel on sampled voxels."""
    from statsmodels.regression.mixed_linear_model import MixedLM

    runs = pd.read_csv(folder / "runs.tsv", sep="\t")
    mask = np.asarray(nib.load(folder / "mask.nii").dataobj).astype(bool)
    rng = np.random.default_rng(seed)
    columns = np.sort(rng.choice(int(mask.sum()), n_sample, replace=False))
    y = np.stack([np.asarray(nib.load(folder / f).dataobj)[mask][columns] for f in runs["effect"]])
    animal = runs["animal"].to_numpy()
    t0 = time.perf_counter()
    for v in range(n_sample):
        df = pd.DataFrame({"y": y[:, v], "animal": animal})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            MixedLM.from_formula("y ~ 1", df, groups="animal").fit(reml=True)
    return (time.perf_counter() - t0) / n_sample


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--voxels", type=int, default=None)
    parser.add_argument("--dir", default=None, help="scratch folder (default: system temp)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--tiny", action="store_true", help="tiny sizes: checks the script runs")
    parser.add_argument("--child", nargs=2, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        child(*args.child)
        return
    if args.tiny:
        animals, runs, n_vox, n_sm = TINY_ANIMALS, TINY_RUNS, TINY_VOXELS, TINY_STATSMODELS
    else:
        animals, runs, n_vox, n_sm = N_ANIMALS, RUNS_PER_ANIMAL, N_VOXELS, N_STATSMODELS
    n_vox = args.voxels or n_vox
    with tempfile.TemporaryDirectory(dir=args.dir, prefix="grouplevel-run-") as tmp:
        folder = Path(tmp)
        _bench_scale().write_study(folder, n_vox, 4.0, args.seed, animals, runs)
        print(
            f"study: {n_vox:,} voxels, {animals} animals × {runs} runs, effect + variance "
            "maps, no atlas; `grouplevel run --permutations 0` in a child process"
        )
        # as a user's interpreter runs it: with its byte-code cache (a shell that sets
        # PYTHONDONTWRITEBYTECODE recompiles every grouplevel module at each start)
        env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
        done = subprocess.run(
            [sys.executable, __file__, "--child", str(folder / "study.toml"), str(folder / "out")],
            capture_output=True,
            text=True,
            env=env,
        )
        if done.returncode:
            sys.exit(f"the child run failed:\n{done.stderr}")
        res = json.loads(done.stdout.strip().splitlines()[-1])
        per_voxel = statsmodels_seconds_per_voxel(folder, n_sm, args.seed)
    steps = {"import": res["import_s"], **res["steps"]}
    whole = res["import_s"] + res["run_s"]
    for name, seconds in steps.items():
        print(f"  {name:<18} {seconds:7.2f} s  ({100 * seconds / whole:4.1f} %)")
    other = whole - sum(steps.values())
    print(f"  {'(other)':<18} {other:7.2f} s  ({100 * other / whole:4.1f} %)")
    print(f"whole run (import + run): {whole:.2f} s")
    sm_total = per_voxel * n_vox
    print(
        f"statsmodels MixedLM loop: {1000 * per_voxel:.1f} ms per voxel × {n_vox:,} voxels "
        f"= {sm_total:,.0f} s (measured on {n_sm} voxels)"
    )
    fit_s = max(res["steps"].get("fit", float("nan")), 1e-9)
    print(
        f"beyond the fit: {whole - fit_s:.2f} s; the 3x target leaves {2 * fit_s:.2f} s "
        f"({whole - 3 * fit_s:+.2f} s to go)"
    )
    print(f"end-to-end speed ratio (statsmodels loop / whole run): {sm_total / whole:,.0f}x")
    print(f"fit-alone speed ratio (statsmodels loop / fit step): {sm_total / fit_s:,.0f}x")
    print(f"whole run / fit alone: {whole / fit_s:.1f}x")


if __name__ == "__main__":
    main()
