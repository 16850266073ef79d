"""Benchmark of loading and fitting a large study within a memory budget.

A synthetic study of 40 animals × 5 runs (200 effect maps, each with a first-level
variance map) is written for two sizes of the analysis mask (250 000 and 1 000 000
in-mask voxels by default) as **uncompressed** ``.nii`` files in a temporary folder
(gzip would make the benchmark measure decompression). Each size is then run in a fresh
child process through grouplevel's own path — ``load_study`` (which validates every
map), ``load_runs``, ``fit_reml`` and ``test_contrast`` for the group mean, with
permutations = 0 — and the child reports its wall times and its peak resident memory
(``resource.getrusage(RUSAGE_SELF).ru_maxrss``). The parent prints the time to write
the maps, each size's numbers and the log-log slope of fitting time against voxels ×
maps (1 = linear).

Targets: peak RSS below 4 GiB at 1 000 000 voxels × 200 maps; time about linear.

Every study written here states its budget, ``[compute] memory_gb = 3`` by default
(``--memory-gb``): the fit and every step after it (the questions' leave-one-out and
mirrored maps, region averages, run quality, the bootstrap) size their chunks from it,
so the peak is measured against a stated budget rather than the default share of the
machine.

With ``--whole N`` the largest size is also run as a whole ``grouplevel run`` in a fresh
child:
an atlas of four areas per hemisphere is added, with the questions (symmetry and
specificity of one area, consistency, run quality) and N sign flips with TFCE and
clusters, the maps, tables and report written; the child prints its time per step and
its peak resident memory (target: below 4 GiB at 1 000 000 voxels × 200 maps).

``--design three-groups`` deals the animals in turn to three groups and fits
``formula = "1 + group"``: the whole run then tests the design's default contrasts (each
group's mean, the differences from the reference group, the mean over groups) and the
F-test ``group-any-difference``, all with the N permutations, and asks each difference
its own questions (lateralisation difference, specificity, consistency, run quality).
The default (``mean``) is one group mean, as before.

Run with ``.venv/bin/python benchmarks/bench_scale.py`` (optionally ``--voxels 250000
1000000``, ``--memory-gb 3``, ``--dir /some/scratch``, ``--whole 20``, ``--design
three-groups``). Needs about 2 GB of scratch disk per million voxels. ``--tiny``
(6 animals × 2 runs, 2 000 and 4 000 voxels) runs to the end in seconds: a check that
the script still runs (tests/end_to_end/test_benchmarks.py), not a measurement.
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

N_ANIMALS = 40
RUNS_PER_ANIMAL = 5
VOXEL_MM = 0.2  # rodent-scale voxels (common practice)
GIB = 2**30
# Simulated variance components (units² of the effect maps): between-animal τ² and
# between-run σ² drawn per voxel, first-level variances per run and voxel.
TAU2_RANGE = (0.0, 1.0)
SIG2_RANGE = (0.0, 1.0)
S2_RANGE = (0.2, 1.5)
TRUE_MEAN = 0.3
#: --design three-groups: animals dealt in turn to three groups (an animal-level factor
#: of three levels: its default contrasts, the F-test ``group-any-difference`` with
#: permutations, and the questions of each difference, lateralisation differences
#: included)
GROUP_NAMES = ("alpha", "beta", "gamma")
DESIGNS = ("mean", "three-groups")
#: --tiny sizes
TINY_ANIMALS, TINY_RUNS, TINY_VOXELS = 6, 2, (2_000, 4_000)


def grid_shape(n_voxels: int) -> tuple[int, int, int]:
    """A box with exactly ``n_voxels`` voxels: 100 × 100 × k, or a cube root fallback."""
    if n_voxels % 10_000 == 0:
        return (100, 100, n_voxels // 10_000)
    side = round(n_voxels ** (1 / 3))
    return (side, side, math.ceil(n_voxels / side**2))


def write_study(
    folder: Path,
    n_voxels: int,
    memory_gb: float,
    seed: int,
    animals: int = N_ANIMALS,
    runs: int = RUNS_PER_ANIMAL,
    design: str = "mean",
) -> float:
    """Write maps, mask, runs table and study.toml; return the seconds spent writing."""
    rng = np.random.default_rng(seed)
    shape = grid_shape(n_voxels)
    affine = np.diag([VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    mask = np.zeros(int(np.prod(shape)), dtype=np.uint8)
    mask[:n_voxels] = 1
    mask = mask.reshape(shape)
    inside = mask.astype(bool)
    nib.save(nib.Nifti1Image(mask, affine), folder / "mask.nii")
    tau2 = rng.uniform(*TAU2_RANGE, n_voxels).astype(np.float32)
    sig2 = rng.uniform(*SIG2_RANGE, n_voxels).astype(np.float32)
    groups = design == "three-groups"
    rows = ["animal\tsession\trun\teffect\tvariance" + ("\tgroup" if groups else "")]
    volume = np.zeros(shape, dtype=np.float32)
    start = time.perf_counter()
    for a in range(animals):
        u = rng.standard_normal(n_voxels, dtype=np.float32) * np.sqrt(tau2)
        for r in range(runs):
            s2 = rng.uniform(*S2_RANGE, n_voxels).astype(np.float32)
            noise = rng.standard_normal(n_voxels, dtype=np.float32)
            effect = TRUE_MEAN + u + noise * np.sqrt(sig2 + s2)
            stem = f"a{a:02d}_r{r}"
            for kind, values in (("effect", effect), ("variance", s2)):
                volume[inside] = values
                nib.save(nib.Nifti1Image(volume, affine), folder / f"{stem}_{kind}.nii")
            group = f"\t{GROUP_NAMES[a % len(GROUP_NAMES)]}" if groups else ""
            rows.append(f"a{a:02d}\t1\t{r + 1}\t{stem}_effect.nii\t{stem}_variance.nii{group}")
    seconds = time.perf_counter() - start
    (folder / "runs.tsv").write_text("\n".join(rows) + "\n")
    (folder / "study.toml").write_text(
        f'[study]\ntitle = "scale benchmark"\ntable = "runs.tsv"\nmask = "mask.nii"\n\n'
        f"[inference]\npermutations = 0\n\n[compute]\nmemory_gb = {memory_gb}\n"
        + ('\n[model]\nformula = "1 + group"\n' if groups else "")
    )
    return seconds


def add_atlas_and_questions(folder: Path, n_voxels: int, permutations: int) -> None:
    """Turn the study into a whole run: an atlas of 4 areas per hemisphere, the
    questions on two of them, and ``permutations`` sign flips with TFCE."""
    shape = grid_shape(n_voxels)
    # mmap=False: the files are rewritten below, and a mapped file must not shrink
    mask = np.asarray(nib.load(folder / "mask.nii", mmap=False).dataobj).astype(bool)
    x = np.arange(shape[0])[:, None, None]
    y = np.arange(shape[1])[None, :, None]
    area = np.minimum(4 * y // shape[1], 3) + 1  # four bands front to back
    labels = np.where(x < shape[0] // 2, area, area + 4) * mask  # left 1–4, right 5–8
    affine = np.diag([VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    affine[0, 3] = -VOXEL_MM * (shape[0] - 1) / 2  # x = 0 mm halfway across
    for path in [folder / "mask.nii", *folder.glob("a*_*.nii")]:  # the new affine
        data = np.asarray(nib.load(path, mmap=False).dataobj)
        nib.save(nib.Nifti1Image(data, affine), path)
    nib.save(nib.Nifti1Image(labels.astype(np.int16), affine), folder / "atlas.nii")
    rows = ["index\tname\tabbreviation\themisphere"]
    for side, offset in (("left", 0), ("right", 4)):
        rows += [f"{offset + k}\tarea {k}\tA{k}\t{side}" for k in range(1, 5)]
    (folder / "atlas.tsv").write_text("\n".join(rows) + "\n")
    text = (folder / "study.toml").read_text()
    text = text.replace("permutations = 0", f"permutations = {permutations}\nseed = 1")
    text += (
        '\n[atlas]\nimage = "atlas.nii"\nlabels = "atlas.tsv"\n\n'
        '[questions]\nsymmetry = ["area 2"]\ntargets = ["area 2"]\n'
    )
    (folder / "study.toml").write_text(text)


def _peak_rss_kib() -> int | None:
    """The process's peak resident memory since the last reset (Linux ``VmHWM``)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except OSError:
        pass
    return None


def _reset_peak_rss() -> bool:
    """Reset ``VmHWM`` to the current resident memory (Linux ≥ 4.0); False elsewhere."""
    try:
        Path("/proc/self/clear_refs").write_text("5")
        return True
    except OSError:
        return False


def whole_child(toml: str, out: str) -> None:
    """A whole `grouplevel run` (questions, permutations, report); one JSON line with
    the time and, where Linux lets a process reset its peak, the peak RSS of each step."""
    from contextlib import contextmanager

    from grouplevel.pipeline import run_study
    from grouplevel.timing import StepClock

    step_peaks: dict[str, float] = {}

    class PeakClock(StepClock):
        @contextmanager
        def step(self, name):
            overall = _peak_rss_kib()  # the reset below forgets the peak so far
            if overall is not None:
                step_peaks["_overall"] = max(step_peaks.get("_overall", 0.0), overall / 2**20)
            measured = _reset_peak_rss()
            with super().step(name):
                yield
            peak = _peak_rss_kib()
            if measured and peak is not None:
                step_peaks[name] = max(step_peaks.get(name, 0.0), peak / 2**20)

    clock = PeakClock()
    t0 = time.perf_counter()
    run_study(toml, out, force=True, clock=clock)
    seconds = time.perf_counter() - t0
    # resetting VmHWM resets ru_maxrss too: the peak is the largest of all seen
    peak_gib = max(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20, *step_peaks.values())
    step_peaks.pop("_overall", None)
    print(
        json.dumps(
            {
                "run_s": seconds,
                "steps": clock.seconds,
                "step_peak_rss_gib": step_peaks,
                "peak_rss_gib": peak_gib,
                "results": sorted(p.name for p in Path(out).iterdir() if p.is_dir()),
            }
        )
    )


def child(toml: str) -> None:
    """Load, fit and test one study; print one JSON line with times and peak RSS."""
    from grouplevel.model import between_animal_df, fit_reml, test_contrast
    from grouplevel.study import load_runs, load_study

    times = {}
    t0 = time.perf_counter()
    study = load_study(toml, permutations=0)
    times["validate_s"] = time.perf_counter() - t0
    fl = study.first_levels[0]
    t0 = time.perf_counter()
    data = load_runs(study, fl)
    times["load_s"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    fit = fit_reml(
        data.effect,
        data.variance,
        fl.design.matrix,
        fl.design.animal,
        memory_gb=study.settings.compute.memory_gb,
    )
    times["fit_s"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    c = np.zeros(fl.design.matrix.shape[1])
    c[0] = 1.0  # the intercept: the group mean, or the reference group's mean
    present = np.isfinite(data.effect) & np.isfinite(data.variance)
    df = between_animal_df(fl.design.matrix, fl.design.animal, present, c)
    result = test_contrast(fit, c, df)
    times["contrast_s"] = time.perf_counter() - t0
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    print(
        json.dumps(
            {
                **times,
                "runs": int(data.effect.shape[0]),
                "voxels": int(data.effect.shape[1]),
                "dtype": str(data.effect.dtype),
                "arrays_gib": (data.effect.nbytes + data.variance.nbytes) / GIB,
                "peak_rss_gib": peak_kib * 1024 / GIB,
                "mean_effect": float(np.nanmean(result.effect)),
                "converged_share": float(fit.converged.mean()),
            }
        )
    )


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--voxels", type=int, nargs="+", default=None)
    parser.add_argument(
        "--memory-gb", type=float, default=3.0, help="[compute] memory_gb of the studies"
    )
    parser.add_argument("--dir", default=None, help="scratch folder (default: system temp)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--tiny", action="store_true", help="tiny sizes: checks the script runs")
    parser.add_argument(
        "--whole",
        type=int,
        default=None,
        metavar="PERMUTATIONS",
        help="also time a whole `run` (atlas, questions, this many sign flips with TFCE)",
    )
    parser.add_argument(
        "--design",
        choices=DESIGNS,
        default="mean",
        help="mean: one group mean (default); three-groups: an animal-level factor of three "
        "levels (its contrasts, the F-test of any difference with permutations, the "
        "questions of each difference)",
    )
    parser.add_argument("--child", default=None, help=argparse.SUPPRESS)
    parser.add_argument("--whole-child", nargs=2, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        child(args.child)
        return
    if args.whole_child:
        whole_child(*args.whole_child)
        return
    if args.tiny and args.whole is None:
        args.whole = 4
    animals, runs = (TINY_ANIMALS, TINY_RUNS) if args.tiny else (N_ANIMALS, RUNS_PER_ANIMAL)
    sizes = args.voxels or (list(TINY_VOXELS) if args.tiny else [250_000, 1_000_000])
    n_maps = animals * runs
    print(
        f"{animals} animals × {runs} runs = {n_maps} effect maps + {n_maps} "
        f"variance maps, uncompressed .nii, [compute] memory_gb = {args.memory_gb}, "
        f"design {args.design}"
    )
    results = []
    for n_vox in sizes:
        with tempfile.TemporaryDirectory(dir=args.dir, prefix="grouplevel-scale-") as tmp:
            folder = Path(tmp)
            write_s = write_study(
                folder, n_vox, args.memory_gb, args.seed, animals, runs, args.design
            )
            out = subprocess.run(
                [sys.executable, __file__, "--child", str(folder / "study.toml")],
                capture_output=True,
                text=True,
                check=True,
            )
            res = json.loads(out.stdout.strip().splitlines()[-1])
            res["write_s"] = write_s
            results.append(res)
            total = res["load_s"] + res["fit_s"] + res["contrast_s"]
            print(
                f"{n_vox:>10,} voxels × {n_maps} maps: write {write_s:6.1f} s, validate "
                f"{res['validate_s']:6.1f} s, load {res['load_s']:6.1f} s, fit "
                f"{res['fit_s']:7.1f} s, contrast {res['contrast_s']:5.2f} s "
                f"(load+fit+contrast {total:7.1f} s); arrays {res['arrays_gib']:.2f} GiB "
                f"{res['dtype']}, peak RSS {res['peak_rss_gib']:.2f} GiB; mean effect "
                f"{res['mean_effect']:.3f} (true {TRUE_MEAN}), converged "
                f"{100 * res['converged_share']:.2f} %",
                flush=True,
            )
            if args.whole and n_vox == sizes[-1]:  # the largest size only
                add_atlas_and_questions(folder, n_vox, args.whole)
                whole = subprocess.run(
                    [
                        sys.executable,
                        __file__,
                        "--whole-child",
                        str(folder / "study.toml"),
                        str(folder / "out"),
                    ],
                    capture_output=True,
                    text=True,
                )
                if whole.returncode:
                    sys.exit(f"the whole run failed:\n{whole.stderr}")
                w = json.loads(whole.stdout.strip().splitlines()[-1])
                peaks = w.get("step_peak_rss_gib") or {}
                steps = ", ".join(
                    f"{k} {v:.1f} s" + (f" / {peaks[k]:.2f} GiB" if k in peaks else "")
                    for k, v in w["steps"].items()
                )
                print(
                    f"{n_vox:>10,} voxels × {n_maps} maps, whole run with questions and "
                    f"{args.whole} permutations: {w['run_s']:.1f} s ({steps}); "
                    f"whole-run peak RSS: {w['peak_rss_gib']:.2f} GiB",
                    flush=True,
                )
                print(f"folders of the whole run: {', '.join(w['results'])}", flush=True)
    if len(results) >= 2:
        size = np.log([r["voxels"] * r["runs"] for r in results])
        for key in ("fit_s", "load_s"):
            slope = np.polyfit(size, np.log([r[key] for r in results]), 1)[0]
            print(f"log-log slope of {key[:-2]} time against voxels × maps: {slope:.2f}")


if __name__ == "__main__":
    main()
