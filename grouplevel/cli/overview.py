"""The short study overview that ``grouplevel check`` prints (rendered from templates/)."""

from __future__ import annotations

from importlib import resources

import jinja2
import numpy as np

from grouplevel.anatomy.coordinates import describe_orientation
from grouplevel.intake.description import design_description, first_level_label
from grouplevel.intake.study import Study


def _environment() -> jinja2.Environment:
    loader = jinja2.FunctionLoader(
        lambda name: (
            resources.files("grouplevel.templates").joinpath(name).read_text(encoding="utf-8")
        )
    )
    # Plain-text output; autoescape stays on for .html templates only.
    return jinja2.Environment(
        loader=loader,
        autoescape=jinja2.select_autoescape(["html"]),
        keep_trailing_newline=True,
        trim_blocks=True,
        lstrip_blocks=True,
        undefined=jinja2.StrictUndefined,
    )


def study_overview(study: Study) -> str:
    """Plain-text overview: grid, orientation, mask, animals, runs, exclusions."""
    s = study.settings
    grid = study.grid
    mask = study.user_mask
    first_levels = []
    for fl in study.first_levels:
        per_animal = fl.runs.groupby("animal", sort=False).size()
        excluded = [
            f"{r['animal']} session {r['session'] or '-'} run {r['run'] or '-'}"
            f" (line {r['line']}): {r['reason'] or 'no reason given'}"
            for _, r in fl.excluded.iterrows()
        ]
        first_levels.append(
            {
                "label": first_level_label(fl),
                "n_animals": fl.design.n_animals,
                "n_runs": len(fl.runs),
                "n_excluded": len(fl.excluded),
                "runs_per_animal": list(per_animal.items()),
                "excluded": excluded,
                "mask_voxels": int(fl.mask.sum()),
                "mask_volume": float(fl.mask.sum() * grid.voxel_volume),
                "design": design_description(study, fl),
            }
        )
    kind = study.first_levels[0].variance_kind if study.first_levels else "none"
    variance_words = {
        "variance": "first-level variance maps",
        "se": "first-level standard-error maps (squared on load)",
        "none": "none given (the model estimates all run-level variance)",
    }[kind]
    atlas = None
    if study.atlas is not None:
        a = study.atlas
        atlas = {
            "n_regions": len(a.regions),
            "n_leaves": int(a.regions["is_leaf"].sum()),
            "resampling": a.resampling,
            "coverage": a.coverage,
            "orientation": a.orientation,
            "midline_mm": a.midline_mm,
            "midline_source": a.midline_source,
            "mirror_dice": a.mirror_dice,
            "notes": list(a.notes),
        }
    return (
        _environment()
        .get_template("check_summary.txt.j2")
        .render(
            atlas=atlas,
            title=s.study.title,
            source=s.source,
            table=s.study.table,
            grid=grid,
            voxel_size=[f"{v:.4g}" for v in grid.voxel_size],
            orientation=describe_orientation(grid.affine),
            header_words=_header_words(s.space),
            mask_voxels=None if mask is None else int(mask.sum()),
            mask_volume=None if mask is None else float(np.sum(mask) * grid.voxel_volume),
            origin_name=s.space.origin_name,
            origin_mm=[f"{v:g}" for v in s.space.origin_mm],
            variance_words=variance_words,
            formula=s.model.formula,
            run_variance=s.model.run_variance,
            df=s.model.df,
            first_levels=first_levels,
            warnings=list(study.warnings),
        )
    )


def _header_words(space) -> str | None:
    """How the image headers are read, when ``[space]`` declares them scaled or their
    axes exchanged; None for true headers."""
    if not space.header_declared:
        return None
    axes = ", ".join(f"{a} {w}" for a, w in zip("xyz", space.header_axes, strict=True))
    return (
        f"read as {space.header_units_per_mm:g} header units per true mm, header axes "
        f"growing towards: {axes} ([space]); every mm, mm3 and coordinate below and in "
        "the outputs is true; output maps keep the headers' own affine"
    )
