"""Time the permutation engine against nilearn's permuted_ols on about 100 000 voxels.

Two kinds of study of 10 animals × 4 runs with first-level variances and about 100 000
voxels, each fitted once by REML: an ellipsoid mask with smooth noise and two Gaussian
effect blobs, and a box (the whole grid as mask) with two box-shaped activations. For
each, in the same process:

* grouplevel: ``permutation_test`` with random sign flips, two-sided, voxel max-stat +
  cluster extent and mass (cluster-forming p = 0.001) + exact TFCE, timed after a
  warm-up run (numba compilation), with the available cores; once with nilearn's
  neighbourhood (6-connectivity, faces only: the same work, which the speed-up is
  computed from) and once with grouplevel's default (26-connectivity: faces, edges and
  corners, more neighbours per voxel), whose time the 5000-permutation projection uses;
* nilearn: ``permuted_ols(..., tfce=True, threshold=0.001)`` (OLS sign flips of the 10
  animal means: max-t, cluster size and mass with 6-connectivity, TFCE by threshold
  steps with 6-connectivity: ``generate_binary_structure(3, 1)`` in its source), the
  same number of permutations, with ``n_jobs=1`` and ``n_jobs=2``.

Both are timed per permutation with their fixed cost (the unpermuted map, its TFCE,
tables) taken off: each call with the permutations minus a call with (almost) none.
The permutations are split into ``ROUNDS`` rounds; each round times grouplevel
(6-connectivity) just before and just after nilearn and takes the mean of the two, so
that a slower spell of a shared machine falls on both sides of the round's ratio; the
ratios printed and checked against the target are the medians over the rounds (each
round's ratios are printed too).

Printed: seconds per permutation of each, their ratio, the projected time of 5000
permutations, a breakdown of one grouplevel permutation (refit kernel, t → z,
clusters, TFCE), and the peak resident memory of a fresh process running 200 and 1000
permutations (it must not grow with the number of permutations).

Run: ``.venv/bin/python benchmarks/bench_inference.py [--permutations N]
[--nilearn-permutations N] [--skip-memory] [--tiny]``. ``--tiny`` runs every step on a
map of about 2 000 voxels with a few permutations, in seconds: a check that the script
still runs (tests/end_to_end/test_benchmarks.py), not a measurement.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import time
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import ndimage


@dataclass(frozen=True)
class Size:
    grid: tuple[int, int, int]
    semi_axes: tuple[float, float, float]
    blob_offset: float  # voxels from the centre to each effect blob (x) and up (z)
    permutations: int
    memory_permutations: tuple[int, int]
    breakdown_repeats: int


#: Grid and ellipsoid mask giving about 100 000 in-mask voxels (the size the permutation
#: engine is expected to meet on a rodent template; as in bench_tfce.py).
FULL = Size((66, 66, 50), (32.0, 32.0, 24.0), 14.0, 200, (200, 1000), 10)
#: About 2 000 voxels and a few permutations: the script runs to the end in seconds.
TINY = Size((18, 18, 14), (8.0, 8.0, 6.0), 4.0, 8, (4, 8), 2)
N_ANIMALS = 10
RUNS_PER_ANIMAL = 4
#: Smoothing of every noise field: FWHM 3 voxels (a typical group-level map).
SMOOTHING_SIGMA = 3.0 / np.sqrt(8 * np.log(2))
#: Cluster-forming p (two-sided) for both tools (common practice).
CLUSTER_FORMING_P = 0.001
#: Projection target.
TARGET_PERMUTATIONS = 5000
#: Rounds of paired timings (grouplevel around nilearn) the permutations are split into.
ROUNDS = 4
#: Targets: ≥ 20× faster per permutation than nilearn (n_jobs 1 and 2) on both kinds of
#: data, 5000 permutations of about 100 000 voxels with TFCE ≤ 3 minutes on 2 cores.
TARGET_SPEEDUP = 20.0
TARGET_SECONDS_5000 = 180.0


def make_study(size: Size = FULL, seed: int = 0, shape: str = "ellipsoid"):
    """Runs × voxels effects and variances, design, animal codes and the 3-D mask.

    ``shape`` "ellipsoid": an ellipsoid mask with two Gaussian effect blobs; "box": the
    whole box as mask (as many voxels as the ellipsoid) with two box-shaped effects of
    constant height, smoothed like the noise.
    """
    rng = np.random.default_rng(seed)
    centre = (np.array(size.grid) - 1) / 2
    grid = np.indices(size.grid) - centre[:, None, None, None]
    if shape == "box":
        return _box_study(size, rng)
    mask = sum((grid[k] / size.semi_axes[k]) ** 2 for k in range(3)) <= 1.0
    n = N_ANIMALS * RUNS_PER_ANIMAL
    animal = np.repeat(np.arange(N_ANIMALS), RUNS_PER_ANIMAL)

    def smooth_fields(k: int) -> np.ndarray:
        out = np.empty((k, int(mask.sum())))
        for i in range(k):
            f = ndimage.gaussian_filter(rng.standard_normal(size.grid), SMOOTHING_SIGMA)
            out[i] = (f / f.std())[mask]
        return out

    blob = np.zeros(size.grid)
    off = size.blob_offset
    for sign in (-1, 1):
        d2 = ((grid[0] - sign * off) ** 2 + grid[1] ** 2 + (grid[2] - off / 2) ** 2) / (
            2 * (off / 3.5) ** 2
        )
        blob += np.exp(-d2)
    effect = 0.8 * blob[mask]
    u = np.sqrt(0.3) * smooth_fields(N_ANIMALS)
    s2 = rng.uniform(0.2, 0.5, (n, 1)) * np.ones((1, effect.size))
    y = effect + u[animal] + np.sqrt(0.1 + s2) * smooth_fields(n)
    return y, s2, np.ones((n, 1)), animal, mask


def _box_shape(size: Size) -> tuple[int, int, int]:
    """A box with about as many voxels as the ellipsoid of ``size`` (same proportions)."""
    volume = 4 / 3 * np.pi * np.prod(size.semi_axes)
    ratio = (volume / np.prod(size.grid)) ** (1 / 3)
    return tuple(max(4, round(g * ratio)) for g in size.grid)


def _box_study(size: Size, rng: np.random.Generator):
    grid = _box_shape(size)
    mask = np.ones(grid, dtype=bool)
    n = N_ANIMALS * RUNS_PER_ANIMAL
    animal = np.repeat(np.arange(N_ANIMALS), RUNS_PER_ANIMAL)

    def smooth_fields(k: int) -> np.ndarray:
        out = np.empty((k, mask.size))
        for i in range(k):
            f = ndimage.gaussian_filter(rng.standard_normal(grid), SMOOTHING_SIGMA)
            out[i] = (f / f.std()).ravel()
        return out

    activation = np.zeros(grid)
    a, b, c = (max(2, g // 6) for g in grid)
    activation[a : 2 * a, b : 2 * b, c : 2 * c] = 1.0  # two boxes, one in each half
    activation[-2 * a : -a, b : 2 * b, c : 2 * c] = 1.0
    effect = 0.8 * ndimage.gaussian_filter(activation, SMOOTHING_SIGMA).ravel()
    u = np.sqrt(0.3) * smooth_fields(N_ANIMALS)
    s2 = rng.uniform(0.2, 0.5, (n, 1)) * np.ones((1, effect.size))
    y = effect + u[animal] + np.sqrt(0.1 + s2) * smooth_fields(n)
    return y, s2, np.ones((n, 1)), animal, mask


def prepare(y, s2, X, animal):
    from grouplevel.inference.permutation import animal_level_data
    from grouplevel.model import between_animal_df, fit_reml

    start = time.perf_counter()
    fit = fit_reml(y, s2, X, animal)
    fit_seconds = time.perf_counter() - start
    df = between_animal_df(X, animal, np.isfinite(y), [1.0])
    data = animal_level_data(y, s2, X, animal, fit.var_run, fit.var_animal)
    return data, df, fit_seconds


#: nilearn's neighbourhood for clusters and TFCE (faces only) and grouplevel's default.
SAME_AS_NILEARN, DEFAULT_CONNECTIVITY = 6, 26


def run_grouplevel(data, df, mask, n: int, seed: int = 1, connectivity: int = 26):
    from grouplevel.inference.permutation import permutation_test

    return permutation_test(
        data,
        np.array([1.0]),
        df,
        mask,
        n_permutations=n,
        rng=np.random.default_rng(seed),
        sided="two",
        cluster_forming_p=CLUSTER_FORMING_P,
        connectivity=connectivity,
        use_tfce=True,
    )


def breakdown(data, df, mask, repeats: int = 10) -> dict[str, float]:
    """Seconds of each step of one permutation (single thread), averaged.

    The refit and the t → z conversion run in one call (``refit_z_permuted``,
    what the engine calls); the refit alone (``refit_t_permuted``) is timed as well, so
    the t → z share is the difference of the two.
    """
    from grouplevel.inference import _refit_kernel
    from grouplevel.inference.clusters import ClusterWorkspace
    from grouplevel.inference.permutation import _TtoZ, cluster_forming_z
    from grouplevel.inference.tfce import TfceWorkspace

    rng = np.random.default_rng(3)
    V, m = data.mean.shape
    no_nuisance = np.zeros((V, 0)), np.zeros((m, 0))
    X = np.ones((m, 1))
    to_z = _TtoZ(np.asarray(df, float))
    tables = np.ascontiguousarray(np.array(to_z.tables))
    df_row = np.ascontiguousarray(to_z.index, dtype=np.int64)
    du = float(to_z.u[1] - to_z.u[0])
    thr = cluster_forming_z(CLUSTER_FORMING_P, "two")
    order = np.arange(m)
    limits = (_refit_kernel.REFIT_MAX_ITER, _refit_kernel.REFIT_TOL)
    sums = _refit_kernel.flip_invariant_sums(data.mean, data.precision)  # as the engine
    args = (*no_nuisance, data.mean, data.precision, np.ones(m), order, X, data.var_animal, sums)
    # warm-up: each kernel called directly compiles or loads its own cache entry once
    _refit_kernel.refit_t_permuted(*args, np.empty(V), *limits)
    _refit_kernel.refit_z_permuted(*args, tables, df_row, du, np.empty(V), *limits)
    scratch = TfceWorkspace(mask, connectivity=26)
    scratch.scores(np.zeros(V), "two")  # compiles or loads the kernels
    cluster_scratch = ClusterWorkspace(mask, connectivity=26)
    cluster_scratch.maxima(np.zeros(V), thr, "two")
    refit_only = 0.0
    out = {"refit and t -> z": 0.0, "clusters": 0.0, "TFCE": 0.0}
    for _ in range(repeats):
        sign = rng.choice([-1.0, 1.0], m)
        t = np.empty(V)
        z = np.empty(V)
        args = (*no_nuisance, data.mean, data.precision, sign, order, X, data.var_animal, sums)
        start = time.perf_counter()
        _refit_kernel.refit_t_permuted(*args, t, *limits)
        refit_only += time.perf_counter() - start
        start = time.perf_counter()
        _refit_kernel.refit_z_permuted(*args, tables, df_row, du, z, *limits)
        out["refit and t -> z"] += time.perf_counter() - start
        start = time.perf_counter()
        cluster_scratch.maxima(z, thr, "two")  # as the engine: buffers reused
        out["clusters"] += time.perf_counter() - start
        start = time.perf_counter()
        scratch.scores(z, "two")  # as the engine: the largest |TFCE|, buffers reused
        out["TFCE"] += time.perf_counter() - start
    steps = {k: v / repeats for k, v in out.items()}
    steps["(refit alone)"] = refit_only / repeats
    return steps


def nilearn_timer(y, animal, mask):
    """``seconds(n, n_jobs)``: nilearn's seconds per permutation over ``n`` permutations,
    its fixed cost (t and TFCE of the original data, timed with n_perm = 0 once per
    ``n_jobs``) taken off."""
    import nibabel as nib
    from nilearn.maskers import NiftiMasker
    from nilearn.mass_univariate import permuted_ols

    means = np.stack([y[animal == a].mean(axis=0) for a in range(N_ANIMALS)])
    masker = NiftiMasker(nib.Nifti1Image(mask.astype(np.int32), np.eye(4))).fit()
    fixed: dict[int, float] = {}

    def call(count: int, n_jobs: int, seed: int) -> float:
        start = time.perf_counter()
        with warnings.catch_warnings():
            # nilearn's own int64 label image inside TFCE, not our input
            warnings.filterwarnings("ignore", message=".*64-bit ints.*")
            permuted_ols(
                np.ones((N_ANIMALS, 1)),
                means,
                model_intercept=False,
                n_perm=count,
                two_sided_test=True,
                random_state=seed,
                n_jobs=n_jobs,
                verbose=0,
                masker=masker,
                tfce=True,
                threshold=CLUSTER_FORMING_P,
            )
        return time.perf_counter() - start

    def seconds(n: int, n_jobs: int, seed: int = 0) -> float:
        if n_jobs not in fixed:
            fixed[n_jobs] = call(0, n_jobs, seed)
        return _per_permutation(call(n, n_jobs, seed), fixed[n_jobs], n)

    return seconds


def grouplevel_timer(data, df, mask):
    """``seconds(n, connectivity, seed)``: grouplevel's seconds per permutation over
    ``n`` permutations, its fixed cost (the observed map, its clusters and TFCE, the
    t → z tables: a run of 2 permutations, timed once per connectivity) taken off;
    compiled kernels are warmed up first."""
    fixed: dict[int, float] = {}

    def timed(count: int, connectivity: int, seed: int) -> float:
        start = time.perf_counter()
        res = run_grouplevel(data, df, mask, count, seed=seed, connectivity=connectivity)
        assert res.scheme.n == count and not res.scheme.exhaustive
        return time.perf_counter() - start

    def seconds(n: int, connectivity: int, seed: int = 1) -> float:
        if connectivity not in fixed:
            timed(4, connectivity, seed)  # warm-up: compilation
            fixed[connectivity] = min(timed(2, connectivity, seed) for _ in range(3))
        return _per_permutation(timed(n, connectivity, seed), fixed[connectivity], n - 2)

    return seconds


def _per_permutation(total: float, fixed: float, n: int) -> float:
    """Seconds per permutation of a call of ``total`` seconds with ``n`` more
    permutations than the call of ``fixed`` seconds; the whole call when the difference
    is not positive (noise at tiny sizes)."""
    return (total - fixed) / n if total > fixed else total / n


def peak_memory_child(n: int, size: Size) -> None:
    """Entry of the memory subprocess: fit, run n permutations, print peak RSS in MiB."""
    y, s2, X, animal, mask = make_study(size)
    data, df, _ = prepare(y, s2, X, animal)
    del y, s2
    run_grouplevel(data, df, mask, n)
    print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)


def _compare(shape: str, size: Size, n: int, n_nilearn: int, cores: int, tiny: bool) -> None:
    """Time both engines on one kind of data, in paired rounds, and print the ratios and
    targets."""
    y, s2, X, animal, mask = make_study(size, shape=shape)
    print(f"{shape} study: {int(mask.sum()):,} in-mask voxels, grid {mask.shape}, ", end="")
    print(f"{N_ANIMALS} animals × {RUNS_PER_ANIMAL} runs, first-level variances, two-sided")
    data, df, fit_seconds = prepare(y, s2, X, animal)
    print(f"REML fit (once):                 {fit_seconds:8.2f} s")
    ours_timer = grouplevel_timer(data, df, mask)
    theirs_timer = nilearn_timer(y, animal, mask)
    rounds = 2 if tiny else ROUNDS
    per_round, per_round_nilearn = max(n // rounds, 4), max(n_nilearn // rounds, 1)
    times: dict[str, list[float]] = {"6": [], "26": [], "nilearn 1": [], "nilearn 2": []}
    for r in range(rounds):
        before = ours_timer(per_round, SAME_AS_NILEARN, seed=1 + r)
        times["nilearn 2"].append(theirs_timer(per_round_nilearn, 2, seed=r))
        times["nilearn 1"].append(theirs_timer(per_round_nilearn, 1, seed=r))
        after = ours_timer(per_round, SAME_AS_NILEARN, seed=101 + r)
        times["6"].append(0.5 * (before + after))  # on either side of nilearn's timings
        times["26"].append(ours_timer(per_round, DEFAULT_CONNECTIVITY, seed=1 + r))
        print(
            f"round {r + 1}/{rounds}: grouplevel {1e3 * times['6'][-1]:6.2f} ms (6), "
            f"{1e3 * times['26'][-1]:6.2f} ms (26), {cores} threads; nilearn "
            f"{1e3 * times['nilearn 1'][-1]:6.1f} ms (n_jobs=1), "
            f"{1e3 * times['nilearn 2'][-1]:6.1f} ms (n_jobs=2); ratios "
            f"{times['nilearn 1'][-1] / times['6'][-1]:5.1f}× and "
            f"{times['nilearn 2'][-1] / times['6'][-1]:5.1f}× per permutation"
        )
    ours, ours_default = float(np.median(times["6"])), float(np.median(times["26"]))
    for connectivity, seconds in ((SAME_AS_NILEARN, ours), (DEFAULT_CONNECTIVITY, ours_default)):
        print(
            f"grouplevel, {per_round} flips per timing, {connectivity:2d}-connectivity: "
            f"{seconds:8.4f} s per permutation ({cores} threads, median of the rounds)"
        )
    steps = breakdown(data, df, mask, size.breakdown_repeats)  # at 26-connectivity
    refit_alone = steps.pop("(refit alone)")
    total = sum(steps.values())
    for name, seconds in steps.items():
        print(f"  {name:<16s} {seconds:8.4f} s  ({100 * seconds / total:4.1f} % of one thread, 26)")
    print(f"  of which t -> z  {steps['refit and t -> z'] - refit_alone:8.4f} s (by difference)")

    speedup = {}
    for jobs in (1, 2):
        theirs = times[f"nilearn {jobs}"]
        print(
            f"nilearn permuted_ols, n_jobs={jobs}: {float(np.median(theirs)):8.4f} s per "
            "permutation (median of the rounds)"
        )
        speedup[jobs] = float(np.median(np.divide(theirs, times["6"])))
        at_default = float(np.median(np.divide(theirs, times["26"])))
        print(
            f"speed-up vs nilearn n_jobs={jobs}, {shape} (same work, 6-connectivity): "
            f"{speedup[jobs]:8.1f}×   (grouplevel at 26: {at_default:.1f}×; medians of "
            "the rounds' ratios)"
        )
    projected = ours_default * TARGET_PERMUTATIONS + fit_seconds
    print(
        f"projected {TARGET_PERMUTATIONS} permutations, {shape}, 26-connectivity: "
        f"{projected:8.1f} s (fit included)"
    )
    fast_enough = min(speedup.values()) >= TARGET_SPEEDUP
    in_time = projected <= TARGET_SECONDS_5000
    print(
        f"targets ({shape}): ≥{TARGET_SPEEDUP:.0f}× faster than nilearn -> "
        f"{'met' if fast_enough else 'MISSED'}; {TARGET_PERMUTATIONS} in "
        f"≤{TARGET_SECONDS_5000:.0f} s -> {'met' if in_time else 'MISSED'}"
        + (" (tiny sizes: not a measurement)" if tiny else "")
    )


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--permutations", type=int, default=None)
    parser.add_argument(
        "--nilearn-permutations",
        type=int,
        default=None,
        help="permutations for nilearn (default: the same as --permutations)",
    )
    parser.add_argument("--skip-memory", action="store_true")
    parser.add_argument(
        "--shapes",
        nargs="+",
        choices=("ellipsoid", "box"),
        default=["ellipsoid", "box"],
        help="kinds of data: ellipsoid mask with Gaussian blobs, box with box activations",
    )
    parser.add_argument("--tiny", action="store_true", help="tiny sizes: checks the script runs")
    parser.add_argument("--memory-child", type=int, default=0, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    size = TINY if args.tiny else FULL
    if args.memory_child:
        peak_memory_child(args.memory_child, size)
        return
    n = args.permutations or size.permutations
    n_nilearn = args.nilearn_permutations or n
    cores = len(os.sched_getaffinity(0))

    for shape in args.shapes:
        _compare(shape, size, n, n_nilearn, cores, args.tiny)

    if not args.skip_memory:
        for count in size.memory_permutations:
            command = [sys.executable, __file__, "--memory-child", str(count)]
            out = subprocess.run(
                command + (["--tiny"] if args.tiny else []),
                capture_output=True,
                text=True,
                check=True,
            )
            peak = float(out.stdout.strip().splitlines()[-1])
            print(f"peak memory, {count:5d} permutations: {peak:8.0f} MiB")


if __name__ == "__main__":
    main()
