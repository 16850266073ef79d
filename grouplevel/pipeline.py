"""The one place that strings the stages together, in this order:

intake (:mod:`grouplevel.intake`) → fit (:mod:`grouplevel.model`) → correct
(:mod:`grouplevel.inference`) → label (:mod:`grouplevel.anatomy`) → ask
(:mod:`grouplevel.questions`) → write (:mod:`grouplevel.outputs`) → report
(:mod:`grouplevel.report`); each fitted and corrected contrast is a
:class:`~grouplevel.results.maps.GroupMap`.

Also the public Python API (re-exported by :mod:`grouplevel`): :func:`load_study`,
:func:`fit_study`, :func:`write_outputs` and :func:`run_study`.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import os
import secrets
import shutil
import tempfile
import time
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

from grouplevel import __version__
from grouplevel.anatomy.tables import region_data, region_tables
from grouplevel.cli.overview import design_description
from grouplevel.errors import UserError
from grouplevel.inference import Smoothness, estimate_smoothness, fdr
from grouplevel.inference.permutation import (
    animal_level_data,
    permutation_test,
)
from grouplevel.inference.significance import sided_p
from grouplevel.intake.design import weights_dict
from grouplevel.intake.images import Grid, write_map
from grouplevel.intake.settings import DEFAULT_CONTRAST_NAME, InferenceSettings, Settings
from grouplevel.intake.study import FirstLevel, Study, load_runs, load_study
from grouplevel.model import (
    between_animal_df,
    satterthwaite_df,
    test_contrast,
)
from grouplevel.outputs.folder import (
    TOOL_NAME,
    check_output_folder,
    child_path,
    study_inputs,
)
from grouplevel.outputs.summary import write_summary
from grouplevel.progress import Progress
from grouplevel.questions.ask import (
    answer_questions,
    answers_not_asked,
    question_plan,
    skipped_warning,
)
from grouplevel.report import render_report, write_manuscript_tables, write_methods
from grouplevel.results.compute import Backend, fit_voxel_chunks, open_backend
from grouplevel.results.correction import permutation_arguments
from grouplevel.results.maps import MAP_DESCRIPTIONS, Corrected, GroupMap

# Runs used for the residual smoothness estimate: at most this many, evenly spread, so
# that its full-grid float64 copies stay small on large studies (our own choice; 30 maps
# already estimate the FWHM within a few percent, see tests/test_smoothness.py).
SMOOTHNESS_MAX_RUNS = 32
_SMOOTHNESS_CHUNK = 65536


def _smoothness(y, variance, fit, X, mask: np.ndarray, grid: Grid) -> Smoothness | None:
    """Residual smoothness from standardised residuals (Kiebel et al. 1999)."""
    n_runs, n_vox = y.shape
    dof_all = n_runs - np.linalg.matrix_rank(X)
    if dof_all <= 1:
        return None
    runs = np.unique(np.linspace(0, n_runs - 1, min(n_runs, SMOOTHNESS_MAX_RUNS)).round())
    runs = runs.astype(int)
    standard = np.zeros((runs.size, n_vox), dtype=np.float32)
    for lo in range(0, n_vox, _SMOOTHNESS_CHUNK):
        sl = slice(lo, min(n_vox, lo + _SMOOTHNESS_CHUNK))
        resid = np.asarray(y[runs, sl], dtype=float) - X[runs] @ fit.beta[sl].T
        total = fit.var_animal[None, sl] + fit.var_run[None, sl]
        if variance is not None:
            total = total + variance[runs, sl]
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = resid / np.sqrt(total)
        standard[:, sl] = np.where(np.isfinite(ratio), ratio, 0.0)
    # residual degrees of freedom carried by the runs used
    dof = dof_all * runs.size / n_runs
    if dof <= 1:
        return None
    try:
        return estimate_smoothness(standard, mask, grid.voxel_size, float(dof))
    except UserError:
        return None  # e.g. a mask with no neighbouring voxels along an axis


def _correct(
    study: Study,
    c: np.ndarray,
    t: np.ndarray,
    df: np.ndarray,
    animal_data,
    smooth: Smoothness | None,
    mask: np.ndarray,
    label: str,
    quiet: bool,
    backend: Backend | None = None,
) -> Corrected:
    inf: InferenceSettings = study.settings.inference
    p_sided = sided_p(t, df, inf.sided)
    q = fdr(p_sided, alpha=inf.alpha, method=inf.fdr)
    warnings: list[str] = []
    perm = None
    if inf.permutations > 0:
        rng = np.random.default_rng(inf.seed)
        bar = Progress(f"permutations {label}", "permutations", quiet=quiet)
        perm = permutation_test(
            animal_data,
            c,
            df,
            mask,
            rng=rng,
            progress=bar.update,
            **permutation_arguments(inf, voxel_volume_mm3=study.grid.voxel_volume, backend=backend),
        )
        bar.close()
        if perm.scheme.smallest_p > inf.alpha:
            warnings.append(
                f"{label}: the smallest p that {perm.scheme.n} {perm.scheme.kind} can give "
                f"is {perm.scheme.smallest_p:.3g}, above alpha = {inf.alpha}: no voxel or "
                "cluster can reach significance with permutation inference; more animals "
                "are needed"
            )
    return Corrected(
        sided=inf.sided,
        p_sided=p_sided,
        fdr=q,
        smoothness=smooth,
        permutation=perm,
        warnings=tuple(warnings),
    )


def _fit_first_level(
    study: Study,
    fl: FirstLevel,
    log: Callable[[str], None],
    quiet: bool = True,
    backend: Backend | None = None,
) -> tuple[list[GroupMap], list[str]]:
    settings = study.settings
    warnings: list[str] = []
    label = fl.name or "the study"
    start = time.perf_counter()
    data = load_runs(study, fl)
    mask = fl.mask.copy()
    keep = np.ones(data.effect.shape[1], dtype=bool)
    if data.variance is None:
        # Without first-level variances a voxel whose runs all hold the same value has
        # no variance to estimate; it cannot be fitted.
        flat = np.nanmax(data.effect, axis=0) == np.nanmin(data.effect, axis=0)
        if flat.all():  # inspect_study refuses this; kept so no traceback can follow
            raise UserError(
                f"{label}: every run holds the same value at every voxel and there are no "
                "first-level variance maps: nothing can be fitted"
            )
        if flat.any():
            keep = ~flat
            warnings.append(
                f"{label}: {int(flat.sum())} voxel(s) left out: every run holds the same value"
            )
            idx = np.argwhere(mask)[flat]
            mask[tuple(idx.T)] = False
    # index only when needed: a boolean index copies the runs × voxels array
    y = data.effect if keep.all() else data.effect[:, keep]
    s2 = data.variance if data.variance is None or keep.all() else data.variance[:, keep]
    design = fl.design
    log(f"fitting {label}: {y.shape[1]:,} voxels, {y.shape[0]} runs, {design.n_animals} animals")
    fit = fit_voxel_chunks(
        backend or Backend(kind="local"),
        y,
        s2,
        design.matrix,
        design.animal,
        estimate_run_variance=settings.model.run_variance == "estimate",
        max_iter=settings.model.max_iter,
        memory_gb=settings.compute.memory_gb,
    )
    unfittable = np.isnan(fit.beta).any(axis=1)
    not_converged = int((~fit.converged & ~unfittable).sum())
    if not_converged:
        warnings.append(
            f"{label}: the REML fit reached the iteration limit ({settings.model.max_iter}) "
            f"at {not_converged} voxel(s); their estimates are the last iterate"
        )
    if unfittable.any():
        warnings.append(
            f"{label}: {int(unfittable.sum())} voxel(s) could not be fitted (too few runs "
            "with data there, or a design without rank on those runs); their maps are 0"
        )
    present = np.isfinite(y)
    smooth = _smoothness(y, s2, fit, design.matrix, mask, study.grid)
    animal_data = None
    if settings.inference.permutations > 0:
        animal_data = animal_level_data(
            y, s2, design.matrix, design.animal, fit.var_run, fit.var_animal, design.columns
        )
    regions = None
    if study.atlas is not None:
        regions = region_data(
            study.atlas,
            study.atlas_mask,
            mask,
            y,
            s2,
            settings.model.run_variance == "estimate",
        )
    results = []
    for cname, c in fl.contrasts:
        if settings.model.df == "satterthwaite":
            df = satterthwaite_df(fit, c)
        else:
            df = between_animal_df(design.matrix, design.animal, present, c)
        res = test_contrast(fit, c, df)
        default = cname == DEFAULT_CONTRAST_NAME
        name = fl.output_name(cname, default)
        df_full = np.broadcast_to(np.asarray(res.df, dtype=float), res.t.shape).copy()
        corrected = _correct(
            study, c, res.t, df_full, animal_data, smooth, mask, name, quiet, backend
        )
        warnings.extend(corrected.warnings)
        gm = GroupMap(
            name=name,
            first_level=fl.name,
            contrast=cname,
            weights=weights_dict(c, design.columns),
            grid=study.grid,
            mask=mask,
            effect=res.effect,
            se=res.se,
            t=res.t,
            df=df_full,
            z=res.z,
            p=res.p,
            var_animal=fit.var_animal,
            var_run=fit.var_run,
            coverage_runs=fl.coverage_runs,
            coverage_animals=fl.coverage_animals,
            not_converged=not_converged,
            n_animals=design.n_animals,
            n_runs=len(fl.runs),
            inference=corrected,
        )
        if regions is not None:
            gm = replace(gm, tables=region_tables(gm, regions, design, c, settings))
        plan = question_plan(design, c)
        if plan.asked:
            log(f"  questions of {name}: symmetry, specificity, consistency, run quality")
            answers = answer_questions(
                gm,
                y,
                s2,
                fit,
                design,
                fl.runs,
                c,
                regions,
                settings.questions_for(fl.name),
                settings,
                backend=backend,
            )
            gm = replace(gm, answers=answers)
        else:
            q = settings.questions_for(fl.name)
            answers = answers_not_asked(plan, design, c, regions, q, settings, gm, y)
            gm = replace(gm, answers=answers)
        results.append(gm)
    log(f"  done in {time.perf_counter() - start:.1f} s")
    return results, warnings


def fit_study(
    study: Study, log: Callable[[str], None] | None = None, *, quiet: bool = True
) -> tuple[list[GroupMap], list[str]]:
    """Fit the mixed model for every first-level contrast and test every group contrast.

    Returns
    -------
    maps, warnings
        One :class:`GroupMap` per (first-level contrast, group contrast), and the
        warnings raised while fitting (the study's own warnings are in
        ``study.warnings``).
    """
    log = log or (lambda _msg: None)
    maps: list[GroupMap] = []
    warnings: list[str] = []
    # one backend for the whole study: a dask cluster takes seconds to start
    with open_backend(study.settings.compute) as backend:
        if backend.distributed:
            log(f"computing on dask: {backend.workers} worker(s)")
        for fl in study.first_levels:
            m, w = _fit_first_level(study, fl, log, quiet, backend)
            maps.extend(m)
            warnings.extend(w)
    warnings.extend(skipped_warning([m.name for m in maps if m.answers and not m.answers.asked]))
    return maps, warnings


def sha256(path: Path) -> str:
    """Hex SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _inputs(study: Study) -> list[dict[str, str]]:
    s = study.settings
    items: list[tuple[str, Path]] = [("study file", s.source), ("runs table", s.study.table)]
    if s.study.template:
        items.append(("template", s.study.template))
    if s.study.mask:
        items.append(("mask", s.study.mask))
    if s.atlas:
        items += [("atlas image", s.atlas.image), ("atlas labels", s.atlas.labels)]
    for fl in study.first_levels:
        for _, row in fl.runs.iterrows():
            items.append((f"effect ({row['animal']})", Path(row["effect"])))
            if fl.variance_kind != "none":
                items.append((f"{fl.variance_kind} ({row['animal']})", Path(row[fl.variance_kind])))
    seen: set[Path] = set()
    out = []
    for role, p in items:
        if p in seen:
            continue
        seen.add(p)
        out.append({"role": role, "path": str(p), "sha256": sha256(p)})
    return out


def _versions() -> dict[str, str]:
    """Versions of grouplevel and the libraries that shape its numbers."""
    import importlib.metadata as md
    import platform

    out = {"python": platform.python_version(), "grouplevel": __version__}
    for name in ("numpy", "scipy", "statsmodels", "nibabel", "pandas", "numba", "formulaic"):
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            out[name] = "not installed"
    return out


def _atlas_summary(study: Study) -> dict | None:
    atlas = study.atlas
    if atlas is None:
        return None
    return {
        "regions": len(atlas.regions),
        "labelled_regions": int(atlas.regions["is_leaf"].sum()),
        "resampling": atlas.resampling,
        "coverage_of_mask": round(float(atlas.coverage), 4),
        "midline_mm": float(atlas.midline_mm),
        "midline_source": atlas.midline_source,
        "mirror_dice": round(float(atlas.mirror_dice), 4),
        "orientation": atlas.orientation,
    }


def _result_summary(study: Study, gm: GroupMap) -> dict:
    fl = next(f for f in study.first_levels if f.name == gm.first_level)
    runs_per_animal = fl.runs.groupby("animal", sort=False).size()
    peak = int(np.nanargmax(np.abs(gm.t))) if gm.t.size else None
    entry: dict = {
        "first_level_contrast": gm.first_level,
        "group_contrast": gm.contrast,
        "weights": gm.weights,
        "design_columns": list(fl.design.columns),
        "animals": gm.n_animals,
        "runs": gm.n_runs,
        "runs_per_animal": {str(k): int(v) for k, v in runs_per_animal.items()},
        "excluded_runs": [
            {
                "animal": r["animal"],
                "session": r["session"],
                "run": r["run"],
                "reason": r["reason"],
                "table_line": int(r["line"]),
            }
            for _, r in fl.excluded.iterrows()
        ],
        "first_level_variance": fl.variance_kind,
        "voxels": int(gm.mask.sum()),
        "volume_mm3": float(gm.mask.sum() * study.grid.voxel_volume),
        "voxels_full_coverage": int((gm.coverage_runs[gm.mask] == gm.n_runs).sum()),
        "df_range": [float(np.min(gm.df)), float(np.max(gm.df))],
        "not_converged_voxels": gm.not_converged,
        "var_animal_median": float(np.median(gm.var_animal)),
        "var_run_median": float(np.median(gm.var_run)),
        "voxels_p_below_0.001_uncorrected": int((gm.p < 0.001).sum()),
        "inference": _inference_summary(gm, study.settings.inference.alpha),
    }
    if gm.answers is not None:
        entry["questions"] = gm.answers.summary(study.settings.inference.alpha)
    if gm.tables is not None:
        regions = gm.tables.regions
        entry["clusters"] = {
            "method": gm.tables.method,
            "significant_clusters": gm.tables.n_significant_clusters,
        }
        entry["regions"] = {
            "tested": int(regions["p"].notna().sum()),
            "fdr_significant": int(regions["fdr_significant"].fillna(False).astype(bool).sum()),
        }
    if peak is not None:
        ijk = np.argwhere(gm.mask)[peak]
        xyz = study.grid.affine[:3, :3] @ ijk + study.grid.affine[:3, 3]
        entry["peak"] = {
            "t": float(gm.t[peak]),
            "effect": float(gm.effect[peak]),
            "voxel": [int(v) for v in ijk],
            "mm": [round(float(v), 4) for v in xyz],
        }
    return entry


def _unfitted_as_null(key: str, values: np.ndarray) -> np.ndarray:
    """Unfittable voxels hold NaN: written as p = 1 in p-type maps (0 elsewhere)."""
    if key in ("p", "q") or key.startswith("p_"):
        return np.where(np.isnan(values), 1.0, values)
    return values


def _write_group_map(folder: Path, gm: GroupMap) -> None:
    """Every map and table of one group contrast into its own folder."""
    folder.mkdir()
    grid = gm.grid
    label = f"{gm.first_level or ''} {gm.contrast}".strip()
    dfs = np.unique(gm.df[np.isfinite(gm.df)])
    for key, what in MAP_DESCRIPTIONS.items():
        write_map(
            folder / f"{key}.nii.gz",
            _unfitted_as_null(key, getattr(gm, key)),
            gm.mask,
            grid,
            f"grouplevel {what} [{label}]",
            df=float(dfs[0]) if key == "t" and dfs.size == 1 else None,
        )
    full = np.ones(grid.shape, dtype=bool)
    for stem, values, what, dtype in (
        ("coverage", gm.coverage_runs, "runs with data", np.int16),
        ("coverage_animals", gm.coverage_animals, "animals with data", np.int16),
        ("mask", gm.mask.astype(np.uint8), "analysis mask", np.uint8),
    ):
        write_map(
            folder / f"{stem}.nii.gz",
            values,
            full,
            grid,
            f"grouplevel {what} [{label}]",
            dtype=dtype,
        )
    _write_inference(folder, gm, label)
    if gm.answers is not None:
        _write_answers(folder, gm, label)
    if gm.tables is not None:
        for stem, frame in (
            ("clusters", gm.tables.clusters),
            ("regions", gm.tables.regions),
            ("animals", gm.tables.animals),
        ):
            frame.to_csv(
                folder / f"{stem}.tsv", sep="\t", index=False, float_format="%.6g", na_rep="n/a"
            )


def _write_answers(folder: Path, gm: GroupMap, label: str) -> None:
    """Tables of the questions and the left-minus-mirror asymmetry maps."""
    answers = gm.answers
    for stem, frame in answers.tables().items():
        frame.to_csv(
            folder / f"{stem}.tsv", sep="\t", index=False, float_format="%.6g", na_rep="n/a"
        )
    asym = answers.asymmetry
    if asym is None:
        return
    maps = {
        "asymmetry_t": (asym.t, "t of left minus mirror (right)"),
        "asymmetry_z": (asym.z, "z of left minus mirror (right)"),
        "asymmetry_q": (asym.q, "FDR q of left minus mirror"),
    }
    if asym.permutation is not None:
        maps["asymmetry_p_fwe_voxel"] = (
            asym.permutation.p_fwe_voxel,
            "FWE p voxel, left minus mirror",
        )
        if asym.permutation.p_fwe_tfce is not None:
            maps["asymmetry_p_fwe_tfce"] = (
                asym.permutation.p_fwe_tfce,
                "FWE p TFCE, left minus mirror",
            )
    for stem, (values, what) in maps.items():
        write_map(
            folder / f"{stem}.nii.gz",
            _unfitted_as_null(stem.replace("asymmetry_", ""), values),
            asym.mask,
            gm.grid,
            f"grouplevel {what} [{label}]",
        )


def _write_inference(folder: Path, gm: GroupMap, label: str) -> None:
    """Corrected maps, cluster labels and the permutation null of the maxima."""
    grid = gm.grid
    inf = gm.inference
    write_map(
        folder / "q.nii.gz",
        _unfitted_as_null("q", inf.q),
        gm.mask,
        grid,
        f"grouplevel FDR q ({inf.fdr.method}, {inf.sided}) [{label}]",
    )
    perm = inf.permutation
    if perm is None:
        return
    write_map(
        folder / "p_fwe_voxel.nii.gz",
        perm.p_fwe_voxel,
        gm.mask,
        grid,
        f"grouplevel FWE p, voxel max-stat [{label}]",
    )
    full = np.ones(grid.shape, dtype=bool)
    write_map(
        folder / "clusters.nii.gz",
        perm.clusters.labels,
        full,
        grid,
        f"grouplevel clusters at z>{perm.cluster_forming_z:.2f}, 1=largest [{label}]",
        dtype=np.int32,
    )
    for stem, p_cluster, what in (
        ("p_fwe_cluster", perm.p_fwe_cluster_extent, "extent"),
        ("p_fwe_cluster_mass", perm.p_fwe_cluster_mass, "mass"),
    ):
        per_voxel = np.ones(grid.shape)
        inside = perm.clusters.labels > 0
        per_voxel[inside] = p_cluster[perm.clusters.labels[inside] - 1]
        write_map(
            folder / f"{stem}.nii.gz",
            per_voxel,
            gm.mask,
            grid,
            f"grouplevel FWE p, cluster {what} [{label}]",
        )
    if perm.tfce is not None:
        write_map(
            folder / "tfce.nii.gz", perm.tfce, gm.mask, grid, f"grouplevel TFCE of z [{label}]"
        )
        write_map(
            folder / "p_fwe_tfce.nii.gz",
            perm.p_fwe_tfce,
            gm.mask,
            grid,
            f"grouplevel FWE p, TFCE [{label}]",
        )
    voxel_volume = grid.voxel_volume
    null = pd.DataFrame(
        {
            "permutation": np.arange(perm.scheme.n),
            "max_z": perm.null_max_stat,
            "max_cluster_voxels": perm.null_max_extent.astype(int),
            "max_cluster_mm3": perm.null_max_extent * voxel_volume,
            "max_cluster_mass": perm.null_max_mass,
        }
    )
    if perm.null_max_tfce is not None:
        null["max_tfce"] = perm.null_max_tfce
    null.to_csv(folder / "null_max.tsv", sep="\t", index=False, float_format="%.6g")


def _inference_summary(gm: GroupMap, alpha: float) -> dict:
    inf = gm.inference
    out: dict = {
        "sided": inf.sided,
        "fdr": {
            "method": inf.fdr.method,
            "alpha": inf.fdr.alpha,
            "threshold_p": None if np.isnan(inf.fdr.threshold_p) else inf.fdr.threshold_p,
            "surviving_voxels": inf.fdr.n_significant,
        },
        "smoothness": None
        if inf.smoothness is None
        else {
            "fwhm_mm": [round(float(v), 4) for v in inf.smoothness.fwhm_mm],
            "fwhm_voxels": [round(float(v), 3) for v in inf.smoothness.fwhm_voxels],
        },
        "permutation": None,
    }
    perm = inf.permutation
    if perm is not None:
        sig_clusters = perm.p_fwe_cluster_extent <= alpha
        sig_mass = perm.p_fwe_cluster_mass <= alpha
        out["permutation"] = {
            "kind": perm.scheme.kind,
            "permutations": perm.scheme.n,
            "exhaustive": perm.scheme.exhaustive,
            "distinct_permutations": perm.scheme.n_distinct,
            "smallest_attainable_p": perm.scheme.smallest_p,
            "equivalent_to_identity": perm.scheme.n_equivalent,
            "cluster_forming_z": perm.cluster_forming_z,
            "surviving": {
                "voxel": int((perm.p_fwe_voxel <= alpha).sum()),
                "cluster_extent": {
                    "clusters": int(sig_clusters.sum()),
                    "voxels": int(perm.clusters.extent_voxels[sig_clusters].sum()),
                },
                "cluster_mass": {
                    "clusters": int(sig_mass.sum()),
                    "voxels": int(perm.clusters.extent_voxels[sig_mass].sum()),
                },
                "tfce": None if perm.p_fwe_tfce is None else int((perm.p_fwe_tfce <= alpha).sum()),
            },
        }
    return out


def write_outputs(
    study: Study,
    maps: list[GroupMap],
    out_dir: str | Path,
    *,
    warnings: list[str] | None = None,
    force: bool = False,
) -> Path:
    """Write every map, the masks and summary.json into ``out_dir`` atomically.

    Everything is written to a hidden sibling folder first and moved into place at the
    end, so an interrupted run never leaves a folder that looks complete.

    Raises
    ------
    UserError
        When ``out_dir`` may not be written (see
        :func:`grouplevel.outputs.folder.check_output_folder`): it exists and ``force``
        is false, it holds an input of the study, it is not a folder grouplevel wrote,
        or it cannot be created.
    """
    out = check_output_folder(out_dir, force, inputs=study_inputs(study))
    out.parent.mkdir(parents=True, exist_ok=True)
    # a new, unique hidden folder (mkdir honours the umask, so the finished folder gets
    # the usual permissions; an existing folder of that name is never touched)
    tmp = out.parent / f".{out.name}.partial-{os.getpid()}-{secrets.token_hex(4)}"
    tmp.mkdir()
    try:
        grid = study.grid
        for gm in maps:
            _write_group_map(child_path(tmp, gm.name), gm)
        summary = {
            "tool": {"name": TOOL_NAME, "version": __version__, "versions": _versions()},
            "created": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
            "title": study.settings.study.title,
            "inputs": _inputs(study),
            "settings": study.settings.to_dict(),
            "grid": {
                "shape": list(grid.shape),
                "voxel_size_mm": [float(v) for v in grid.voxel_size],
                "orientation": grid.orientation,
                "affine": grid.affine.tolist(),
            },
            "atlas": _atlas_summary(study),
            "design": {
                fl.name or "runs": design_description(study, fl) for fl in study.first_levels
            },
            "results": {gm.name: _result_summary(study, gm) for gm in maps},
            "warnings": list(study.warnings) + list(warnings or []),
        }
        write_summary(tmp, summary)
        # the human-readable outputs are made from the folder just written, exactly as
        # `grouplevel report DIR` makes them later
        write_methods(tmp)
        write_manuscript_tables(tmp)
        render_report(tmp)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    old = None
    if out.exists():
        # the earlier output moves into a hidden holder first, so a crash between the
        # two renames leaves it intact there
        old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.parent))
        out.rename(old / out.name)
    tmp.rename(out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
    return out


def run_study(
    path: str | Path,
    out_dir: str | Path,
    *,
    force: bool = False,
    log: Callable[[str], None] | None = None,
    permutations: int | None = None,
    seed: int | None = None,
) -> Path:
    """Validate, fit and write a study in one call (what ``grouplevel run`` does).

    ``permutations`` and ``seed`` override the study file's ``[inference]`` values. A
    progress bar is shown for the permutations when ``log`` is given.
    """
    quiet = log is None
    log = log or (lambda _msg: None)
    # the cheap checks first (before the maps are read), then with every input known
    check_output_folder(out_dir, force, inputs=[("study file", Path(path))], ownership=False)
    study = load_study(path, permutations=permutations, seed=seed)
    out = check_output_folder(out_dir, force, inputs=study_inputs(study))
    for w in study.warnings:
        log(f"warning: {w}")
    maps, warnings = fit_study(study, log, quiet=quiet)
    for w in warnings:
        log(f"warning: {w}")
    return write_outputs(study, maps, out, warnings=warnings, force=force)


__all__ = [
    "GroupMap",
    "Settings",
    "check_output_folder",
    "fit_study",
    "load_study",
    "run_study",
    "write_outputs",
]
