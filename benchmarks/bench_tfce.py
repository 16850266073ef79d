"""Time exact TFCE and the cluster maxima on a map of about 100 000 in-mask voxels.

Prints seconds per map for grouplevel's exact TFCE (after the numba warm-up), for
``max_cluster_extent_and_mass`` and ``find_clusters``, and for nilearn's threshold-step
TFCE (``nilearn.mass_univariate._utils.calculate_tfce``, 100 steps, the function its
permutation routine calls) on the same map, with the ratio.

Run: ``.venv/bin/python benchmarks/bench_tfce.py [--repeats N] [--connectivity C]
[--tiny]``. ``--tiny`` (a map of about 2 000 voxels, 2 repeats) runs to the end in
seconds: a check that the script still runs (tests/end_to_end/test_benchmarks.py), not a
measurement. nilearn is required (it is in the test extras): without it the script stops
with an error rather than print no ratio.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import ndimage

from grouplevel.inference import find_clusters, max_cluster_extent_and_mass, neighbourhood, tfce

#: Grid and ellipsoid mask giving about 100 000 in-mask voxels (the size the permutation
#: engine is expected to meet on a rodent template).
GRID = (66, 66, 50)
SEMI_AXES = (32.0, 32.0, 24.0)
#: About 2 000 in-mask voxels for --tiny.
TINY_GRID = (18, 18, 14)
TINY_SEMI_AXES = (8.0, 8.0, 6.0)
TINY_REPEATS = 2
#: Smoothing of the random map, in voxels (FWHM 3 voxels, a typical group-level map).
SMOOTHING_SIGMA = 3.0 / np.sqrt(8 * np.log(2))
#: Cluster-forming threshold for the cluster timings (z = 3.1, common practice).
CLUSTER_THRESHOLD = 3.1


def make_map(seed: int, shape=GRID, semi_axes=SEMI_AXES) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    stat = ndimage.gaussian_filter(rng.standard_normal(shape), SMOOTHING_SIGMA)
    stat /= stat.std()
    centre = (np.array(shape) - 1) / 2
    grid = np.indices(shape) - centre[:, None, None, None]
    mask = sum((grid[k] / semi_axes[k]) ** 2 for k in range(3)) <= 1.0
    return np.where(mask, stat, 0.0), mask


def timed(fn, repeats: int) -> tuple[float, float]:
    """Fastest and median wall time of ``repeats`` calls (the fastest is least disturbed
    by other work on the machine)."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return float(np.min(times)), float(np.median(times))


def show(label: str, seconds: tuple[float, float]) -> None:
    print(f"{label:<38s} {seconds[0]:.4f} s per map (fastest), {seconds[1]:.4f} s (median)")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=None)
    parser.add_argument("--connectivity", type=int, default=6, choices=(6, 18, 26))
    parser.add_argument("--tiny", action="store_true", help="tiny sizes: checks the script runs")
    args = parser.parse_args(argv)
    # the reference is needed for the ratio: fail here, before any timing, without it
    from nilearn.mass_univariate._utils import calculate_tfce

    shape, semi_axes = (TINY_GRID, TINY_SEMI_AXES) if args.tiny else (GRID, SEMI_AXES)
    repeats = args.repeats or (TINY_REPEATS if args.tiny else 10)
    stat, mask = make_map(0, shape, semi_axes)
    c = args.connectivity
    print(f"grid {shape}, in-mask voxels {int(mask.sum())}, connectivity {c}")

    start = time.perf_counter()
    ours = tfce(stat, mask, connectivity=c)
    max_cluster_extent_and_mass(stat, mask, CLUSTER_THRESHOLD, connectivity=c)
    find_clusters(stat, mask, CLUSTER_THRESHOLD, connectivity=c)
    print(f"first calls (numba compile or cache load): {time.perf_counter() - start:.2f} s")

    t_tfce = timed(lambda: tfce(stat, mask, connectivity=c), repeats)
    t_max = timed(
        lambda: max_cluster_extent_and_mass(stat, mask, CLUSTER_THRESHOLD, connectivity=c),
        repeats,
    )
    t_find = timed(lambda: find_clusters(stat, mask, CLUSTER_THRESHOLD, connectivity=c), repeats)
    print(f"{repeats} repeats each")
    show("exact TFCE (two-sided):", t_tfce)
    show(f"max_cluster_extent_and_mass (|z|>{CLUSTER_THRESHOLD}):", t_max)
    show(f"find_clusters (|z|>{CLUSTER_THRESHOLD}):", t_find)

    structure = neighbourhood(c)
    theirs = None

    def run_nilearn() -> None:
        nonlocal theirs
        theirs = calculate_tfce(stat[..., np.newaxis], structure, two_sided_test=True)[..., 0]

    t_nilearn = timed(run_nilearn, max(1, min(repeats, 3)))
    dh = np.abs(stat).max() / 100
    peak = np.argmax(ours)
    show("nilearn calculate_tfce (100 steps):", t_nilearn)
    print(f"ratio nilearn / exact (fastest):       {t_nilearn[0] / t_tfce[0]:.1f}")
    print(f"ratio nilearn / exact (median):        {t_nilearn[1] / t_tfce[1]:.1f}")
    print(
        "peak TFCE exact vs nilearn * dh:       "
        f"{ours.flat[peak]:.2f} vs {dh * theirs.flat[peak]:.2f}"
    )


if __name__ == "__main__":
    main()
