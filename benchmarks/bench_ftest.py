"""Time the F-test of a three-dose design: per voxel against statsmodels, and by permutation.

Prints

- the per-voxel speed ratio of grouplevel's vectorised Wald F (``model.ftest.test_f`` on
  a fit with one run per animal) to statsmodels OLS ``f_test`` called voxel by voxel on
  the same data (the same F: one run per animal makes the random-intercept model OLS);
- the time ratio of a permutation F-test to the permutation t test of one of its rows
  (``inference.permutation.permutation_test``, same data, same number of permutations,
  TFCE off), measured in one run.

Run: ``.venv/bin/python benchmarks/bench_ftest.py [--tiny]``. ``--tiny`` (a few hundred
voxels, a few permutations) runs to the end in seconds: a check that the script still
runs (tests/end_to_end/test_benchmarks.py), not a measurement.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import statsmodels.api as sm

from grouplevel.inference.permutation import animal_level_data, permutation_test
from grouplevel.model import between_animal_df, fit_reml
from grouplevel.model.ftest import test_f

#: 4 animals per dose, 2 runs each; a 30 × 30 × 20 grid (18 000 voxels).
PER_DOSE, RUNS = 4, 2
GRID, TINY_GRID = (30, 30, 20), (8, 8, 4)
#: statsmodels is timed on this many voxels and scaled per voxel.
REFERENCE_VOXELS, TINY_REFERENCE_VOXELS = 300, 30
PERMUTATIONS, TINY_PERMUTATIONS = 50, 4
L_DOSE = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])


def _data(shape, runs: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    m = 3 * PER_DOSE
    dose = np.repeat(np.arange(3), PER_DOSE)
    animal = np.repeat(np.arange(m), runs)
    X = np.column_stack([np.ones(m), dose == 1, dose == 2]).astype(float)[animal]
    y = rng.normal(size=(animal.size, int(np.prod(shape))))
    return y, X, animal


def per_voxel_ratio(shape, n_reference: int) -> float:
    y, X, animal = _data(shape, 1)
    start = time.perf_counter()
    fit = fit_reml(y, None, X, animal)
    df = between_animal_df(X, animal, np.ones_like(y, bool), L_DOSE.sum(axis=0))
    test_f(fit, L_DOSE, df)
    ours = (time.perf_counter() - start) / y.shape[1]
    start = time.perf_counter()
    for v in range(n_reference):
        sm.OLS(y[:, v], X).fit().f_test(L_DOSE)
    reference = (time.perf_counter() - start) / n_reference
    return reference / ours


def permutation_ratio(shape, n_permutations: int) -> float:
    y, X, animal = _data(shape, RUNS)
    s2 = np.full(y.shape, 0.2)
    fit = fit_reml(y, s2, X, animal)
    data = animal_level_data(y, s2, X, animal, fit.var_run, fit.var_animal)
    mask = np.ones(shape, dtype=bool)
    df = np.full(y.shape[1], 3.0 * PER_DOSE - 3)
    seconds = {}
    for name, c, extra in (
        ("t", L_DOSE[0], {"sided": "two"}),
        ("F", L_DOSE, {"sided": "positive", "f_test": True}),
    ):
        run = dict(n_permutations=n_permutations, use_tfce=False, threads=1, **extra)
        permutation_test(
            data, c, df, mask, rng=np.random.default_rng(1), **{**run, "n_permutations": 2}
        )
        start = time.perf_counter()
        permutation_test(data, c, df, mask, rng=np.random.default_rng(1), **run)
        seconds[name] = time.perf_counter() - start
        print(f"permutation {name}: {seconds[name]:.2f} s for {n_permutations} permutations")
    return seconds["F"] / seconds["t"]


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tiny", action="store_true", help="tiny sizes: a check that it runs")
    args = parser.parse_args(argv)
    shape = TINY_GRID if args.tiny else GRID
    n_ref = TINY_REFERENCE_VOXELS if args.tiny else REFERENCE_VOXELS
    n_perm = TINY_PERMUTATIONS if args.tiny else PERMUTATIONS
    print(f"{int(np.prod(shape))} voxels, {3 * PER_DOSE} animals in three doses")
    print(
        f"per-voxel speed ratio (statsmodels f_test / ours): {per_voxel_ratio(shape, n_ref):.1f}x"
    )
    print(f"time ratio permutation F / t: {permutation_ratio(shape, n_perm):.2f}x")


if __name__ == "__main__":
    main()
