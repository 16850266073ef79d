"""Benchmark of the vectorised REML fitter against a statsmodels MixedLM loop.

Synthetic study: 100 000 voxels, 10 animals with 4 runs each (40 runs), first-level
variances at every run. Prints the whole-fit wall time, voxels per second, the peak
memory allocated during the fit (tracemalloc) relative to the effect array, and the
per-voxel time ratio against statsmodels ``MixedLM`` (REML) on 200 sampled voxels
measured in the same run. statsmodels cannot use first-level variances, so the ratio is
reported twice: against our fit of the same data without them (the same model as
statsmodels), and against the full fit with them.

Run with ``.venv/bin/python benchmarks/bench_model.py`` (optionally ``--voxels N``).
``--tiny`` (2 000 voxels, 20 voxels for statsmodels) runs to the end in seconds: a check
that the script still runs (tests/end_to_end/test_benchmarks.py), not a measurement.
"""

from __future__ import annotations

import argparse
import os
import time
import tracemalloc
import warnings

import numpy as np
import pandas as pd
from statsmodels.regression.mixed_linear_model import MixedLM

from grouplevel.model import fit_reml

N_ANIMALS = 10
RUNS_PER_ANIMAL = 4
N_STATSMODELS = 200  # voxels fitted by the statsmodels loop
TINY_VOXELS, TINY_STATSMODELS = 2_000, 20


def make_data(n_vox: int, rng: np.random.Generator):
    animal = np.repeat(np.arange(N_ANIMALS), RUNS_PER_ANIMAL)
    n = animal.size
    tau2 = rng.uniform(0.0, 1.0, n_vox)
    sig2 = rng.uniform(0.0, 1.0, n_vox)
    variance = rng.uniform(0.2, 1.5, (n, n_vox))
    u = rng.normal(size=(N_ANIMALS, n_vox)) * np.sqrt(tau2)
    y = 0.3 + u[animal] + rng.normal(size=(n, n_vox)) * np.sqrt(sig2 + variance)
    return y, variance, np.ones((n, 1)), animal


def timed_fit(y, variance, X, animal):
    tracemalloc.start()
    t0 = time.perf_counter()
    c0 = time.process_time()
    fit = fit_reml(y, variance, X, animal)
    cpu = time.process_time() - c0
    wall = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return fit, wall, cpu, peak


def statsmodels_time(y, animal, columns):
    t0 = time.perf_counter()
    for v in columns:
        df = pd.DataFrame({"y": y[:, v], "animal": animal})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            MixedLM.from_formula("y ~ 1", df, groups="animal").fit(reml=True)
    return (time.perf_counter() - t0) / len(columns)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--voxels", type=int, default=None)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--tiny", action="store_true", help="tiny sizes: checks the script runs")
    args = parser.parse_args(argv)
    n_vox = args.voxels or (TINY_VOXELS if args.tiny else 100_000)
    n_sm = TINY_STATSMODELS if args.tiny else N_STATSMODELS
    rng = np.random.default_rng(args.seed)
    y, variance, X, animal = make_data(n_vox, rng)

    t0 = time.perf_counter()
    fit_reml(y[:, :8], variance[:, :8], X, animal)  # compile (or load the cached kernel)
    warmup = time.perf_counter() - t0

    fit, wall, cpu, peak = timed_fit(y, variance, X, animal)
    fit_plain, wall_plain, _, peak_plain = timed_fit(y, None, X, animal)
    columns = rng.choice(n_vox, size=n_sm, replace=False)
    per_voxel_sm = statsmodels_time(y, animal, columns)

    print(f"data: {n_vox} voxels x {y.shape[0]} runs x {N_ANIMALS} animals")
    print(f"first call (compile or cache load): {warmup:.2f} s")
    print(f"fit with first-level variances:  {wall:.3f} s, {n_vox / wall:,.0f} voxels/s")
    print(f"  CPU time {cpu:.3f} s over {os.cpu_count()} cores (other load slows the wall time)")
    print(f"  converged {fit.converged.mean():.4%}, iterations mean {fit.n_iter.mean():.2f}")
    print(f"  peak memory {peak / y.nbytes:.2f} x the effect array ({y.nbytes / 2**20:.1f} MiB)")
    print(f"fit without first-level variances: {wall_plain:.3f} s")
    print(f"  converged {fit_plain.converged.mean():.4%}")
    print(f"  peak memory {peak_plain / y.nbytes:.2f} x the effect array")
    print(f"statsmodels MixedLM: {per_voxel_sm * 1e3:.2f} ms per voxel ({n_sm} voxels)")
    print(f"per-voxel speed ratio, same model (no s²): {per_voxel_sm / (wall_plain / n_vox):,.0f}x")
    print(f"per-voxel speed ratio, full fit (with s²): {per_voxel_sm / (wall / n_vox):,.0f}x")


if __name__ == "__main__":
    main()
