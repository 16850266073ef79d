"""Benchmark of the leave-one-animal-out maps against full REML refits, on the example.

The invented example study (``grouplevel example``) is loaded and its first condition
fitted; the leave-one-animal-out t maps are then computed three ways:

* **refits**: a full REML fit without each animal (variance components re-estimated);
* **fixed**: exact GLS downdates at the full fit's variance components;
* **one step**: the downdates after one Fisher-scoring step of the variance components
  without each animal (what the questions use; ``grouplevel/model/leave_one_out.py``).

Printed: each shortcut's largest and median |Δt| against the refits over every animal
and fitted voxel, the largest |Δeffect|, the time ratios refits / shortcut and shortcut / one full
fit, measured in this run.

Run with ``.venv/bin/python benchmarks/bench_leave_one_out.py``. ``--tiny`` uses only
the first 2 000 fitted voxels: a check that the script still runs
(tests/end_to_end/test_benchmarks.py), not a measurement.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from grouplevel.example import write_example
from grouplevel.intake.study import load_runs, load_study
from grouplevel.model import fit_reml, test_contrast
from grouplevel.model.leave_one_out import leave_one_animal_out

TINY_VOXELS = 2_000


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tiny", action="store_true", help="2 000 voxels: checks the script runs")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="grouplevel-loo-") as tmp:
        study = load_study(write_example(Path(tmp) / "example"), permutations=0)
        fl = study.first_levels[0]
        data = load_runs(study, fl)
    y, s2 = data.effect, data.variance
    if args.tiny:
        y = y[:, :TINY_VOXELS]
        s2 = None if s2 is None else s2[:, :TINY_VOXELS]
    X, animal = fl.design.matrix, fl.design.animal
    c = np.zeros(X.shape[1])
    c[0] = 1.0
    t0 = time.perf_counter()
    fit = fit_reml(y, s2, X, animal)
    fit_s = time.perf_counter() - t0
    m = int(animal.max()) + 1
    print(
        f"example study, condition {fl.name!r}: {y.shape[1]:,} voxels, {y.shape[0]} runs, "
        f"{m} animals"
    )
    t0 = time.perf_counter()
    refit_t, refit_e = [], []
    for a in range(m):
        keep = animal != a
        codes = np.unique(animal[keep], return_inverse=True)[1]
        sub = None if s2 is None else s2[keep]
        res = test_contrast(fit_reml(y[keep], sub, X[keep], codes), c, 1.0)
        refit_t.append(res.t)
        refit_e.append(res.effect)
    refit_s = time.perf_counter() - t0
    refit_t, refit_e = np.array(refit_t), np.array(refit_e)
    for label, update in (("fixed components", False), ("one step", True)):
        t0 = time.perf_counter()
        down = leave_one_animal_out(
            y, s2, X, animal, c, fit.var_animal, fit.var_run, update_variances=update
        )
        seconds = time.perf_counter() - t0
        dt = np.abs(down.t - refit_t)
        de = np.abs(down.effect - refit_e)
        print(
            f"{label:>16}: max |Δt| {np.nanmax(dt):.3f}, median |Δt| {np.nanmedian(dt):.4f}, "
            f"99th percentile {np.nanpercentile(dt, 99):.3f}; max |Δeffect| "
            f"{np.nanmax(de):.4f} (largest |effect| {np.nanmax(np.abs(refit_e)):.3f})"
        )
        print(f"time ratio refits / {label}: {refit_s / seconds:.1f}x")
        print(f"time ratio {label} / one full fit: {seconds / fit_s:.2f}x")


if __name__ == "__main__":
    main()
