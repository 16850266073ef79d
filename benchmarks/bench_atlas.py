"""Time atlas building for a large synthetic mouse atlas.

The atlas has 8 top-level structures, each a binary tree 8 levels deep (2,040 table rows,
1,024 painted bilateral leaves that the build splits into left and right, 4,088 regions
in all). The statistics live on a 0.1 mm mouse-brain grid; the label image is built on
the same grid, at 50 µm and at 33 µm (about 32 million voxels). Prints seconds per case.

Also printed: the ratio of each label grid's time to the time on the statistics grid,
against the ratio of their voxel counts (about linear when the two are close).

Run: ``.venv/bin/python benchmarks/bench_atlas.py [--large-ids] [--tiny]``
(``--large-ids`` gives the regions nine-digit indices, which forces the sorted-search
label lookup; ``--tiny`` uses a 20 × 24 × 16 grid and a 4-level hierarchy and runs in
seconds: a check that the script still runs (tests/end_to_end/test_benchmarks.py), not a
measurement).
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np
import pandas as pd

from grouplevel.atlas import build_atlas
from grouplevel.images import Grid

GRID_SHAPE = (114, 132, 80)  # 11.4 × 13.2 × 8 mm at 0.1 mm: a mouse brain's bounding box
VOXEL_MM = 0.1
ROOTS = 8
LEVELS = 8  # depths 0..7
CELL_MM = 0.35  # edge of the cubic cells painted with one leaf each
BRAIN_RADII_MM = (4.8, 5.8, 3.2)
#: --tiny: a 2 × 2.4 × 1.6 mm box and 4 levels (240 rows)
TINY_GRID_SHAPE = (20, 24, 16)
TINY_LEVELS = 4
TINY_BRAIN_RADII_MM = (0.9, 1.1, 0.7)


def centred_affine(shape: tuple[int, int, int], voxel: float) -> np.ndarray:
    affine = np.diag([voxel, voxel, voxel, 1.0])
    affine[:3, 3] = [-voxel * (n - 1) / 2.0 for n in shape]
    return affine


def hierarchy(large_ids: bool, levels: int = LEVELS) -> tuple[pd.DataFrame, np.ndarray]:
    """Table rows and the indices of the painted leaves."""
    offset = 100_000_000 if large_ids else 1
    rows = []
    leaves = []
    counter = 0
    for root in range(ROOTS):
        ids: dict[tuple[int, int], int] = {}
        for depth in range(levels):
            for k in range(2**depth):
                index = offset + counter
                counter += 1
                ids[(depth, k)] = index
                parent = "" if depth == 0 else str(ids[(depth - 1, k // 2)])
                rows.append(
                    (index, f"structure {root}.{depth}.{k}", f"S{root}_{depth}_{k}", "", parent)
                )
                if depth == levels - 1:
                    leaves.append(index)
    table = pd.DataFrame(rows, columns=["index", "name", "abbreviation", "hemisphere", "parent"])
    return table, np.asarray(leaves, dtype=np.int64)


def label_image(shape, affine, leaves: np.ndarray, brain_radii) -> np.ndarray:
    """Bilateral cells (mirror-symmetric in x) inside an ellipsoid brain."""
    labels = np.zeros(shape, dtype=np.int32)
    j = np.arange(shape[1])[:, None]
    k = np.arange(shape[2])[None, :]
    y = affine[1, 1] * j + affine[1, 3]
    z = affine[2, 2] * k + affine[2, 3]
    for i in range(shape[0]):
        x = affine[0, 0] * i + affine[0, 3]
        inside = (x / brain_radii[0]) ** 2 + (y / brain_radii[1]) ** 2 + (z / brain_radii[2]) ** 2
        cell = (
            np.floor(abs(x) / CELL_MM) * 7919
            + np.floor((y + 20) / CELL_MM) * 104729
            + np.floor((z + 20) / CELL_MM) * 1299709
        ).astype(np.int64)
        labels[i] = np.where(inside <= 1.0, leaves[cell % leaves.size], 0)
    return labels


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--large-ids", action="store_true")
    parser.add_argument("--tiny", action="store_true", help="tiny sizes: checks the script runs")
    args = parser.parse_args(argv)
    base_shape = TINY_GRID_SHAPE if args.tiny else GRID_SHAPE
    radii = TINY_BRAIN_RADII_MM if args.tiny else BRAIN_RADII_MM
    grid = Grid(base_shape, centred_affine(base_shape, VOXEL_MM))
    x, y, z = np.meshgrid(
        *[grid.affine[d, d] * np.arange(base_shape[d]) + grid.affine[d, 3] for d in range(3)],
        indexing="ij",
    )
    mask = (x / radii[0]) ** 2 + (y / radii[1]) ** 2 + (z / radii[2]) ** 2 <= 1.0
    table, leaves = hierarchy(args.large_ids, TINY_LEVELS if args.tiny else LEVELS)
    print(f"table rows {len(table)}, painted leaves {leaves.size}, mask voxels {mask.sum()}")
    first = None
    for factor in (1, 2, 3):
        shape = tuple(n * factor for n in base_shape)
        affine = centred_affine(shape, VOXEL_MM / factor)
        labels = label_image(shape, affine, leaves, radii)
        start = time.perf_counter()
        atlas = build_atlas(labels, affine, table, grid, mask)
        seconds = time.perf_counter() - start
        peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        print(
            f"atlas {VOXEL_MM / factor * 1000:.0f} µm, {labels.size / 1e6:.1f} M voxels: "
            f"{seconds:.2f} s ({atlas.resampling}; {len(atlas.regions)} regions, "
            f"{atlas.shares.nnz} non-zero shares, coverage {atlas.coverage:.3f}, "
            f"midline {atlas.midline_mm:+.3f} mm [{atlas.midline_source}]; "
            f"peak memory so far {peak_mb:.0f} MB)"
        )
        if first is None:
            first = (seconds, labels.size)
        else:
            print(
                f"  ratio to the statistics grid: time {seconds / first[0]:.1f}x for "
                f"{labels.size / first[1]:.0f}x the label voxels"
            )
        del labels, atlas


if __name__ == "__main__":
    main()
