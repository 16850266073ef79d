"""The short study overview that ``grouplevel check`` prints (rendered from templates/)."""

from __future__ import annotations

from importlib import resources

import jinja2
import numpy as np
import pandas as pd

from grouplevel.anatomy.coordinates import describe_orientation
from grouplevel.intake.design import Design, weights_dict
from grouplevel.intake.settings import InferenceSettings
from grouplevel.intake.study import FirstLevel, Study


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


def _label(fl: FirstLevel) -> str:
    """``condition sound``, or ``comparison paw-minus-sound = paw - sound (within runs)``."""
    if fl.conditions is not None:
        terms = " ".join(
            f"{'-' if w < 0 else '+'} {'' if abs(w) == 1 else f'{abs(w):g} '}{c}"
            for c, w in fl.conditions.items()
        ).removeprefix("+ ")
        return f"comparison {fl.name} = {terms} (within runs)"
    return f"condition {fl.name}" if fl.name else "runs"


def _column_level(design: Design, runs: pd.DataFrame, j: int) -> str:
    """``"animal"``, ``"session"`` or ``"run"``: where design column j varies."""
    if design.animal_level[j]:
        return "animal"
    sessions = runs["session"].astype(str) if "session" in runs.columns else None
    if sessions is not None and (sessions != "").any():
        frame = pd.DataFrame({"a": design.animal, "s": sessions, "x": design.matrix[:, j]})
        if (frame.groupby(["a", "s"])["x"].nunique() <= 1).all():
            return "session"
    return "run"


def _scheme(design: Design, c: np.ndarray, inference: InferenceSettings) -> dict:
    """The permutation scheme a contrast will get, without the data (what run will do)."""
    from grouplevel.inference.permutation import partition_design, plan_permutations

    if inference.permutations == 0:
        return {"kind": "none", "why": "[inference] permutations = 0: parametric maps only"}
    if not design.animal_level.all():
        return {"kind": "none", "why": "run-level design columns: not exchangeable"}
    first = np.array([np.flatnonzero(design.animal == a)[0] for a in range(design.n_animals)])
    x_i, Z = partition_design(design.matrix[first], c)
    rng = np.random.default_rng(inference.seed)
    scheme = plan_permutations(x_i, Z, inference.permutations, rng, inference.sided)
    return {
        "kind": scheme.kind,
        "exhaustive": scheme.exhaustive,
        "permutations": scheme.n,
        "distinct": scheme.n_distinct,
        "equivalent_to_identity": scheme.n_equivalent,
        "smallest_attainable_p": scheme.smallest_p,
        "above_alpha": bool(scheme.smallest_p > inference.alpha),
    }


def design_description(study: Study, fl: FirstLevel) -> dict:
    """The design of one first-level contrast, as plain JSON-ready data.

    Coefficients (and where each varies), factors with their levels, reference level
    and animals per level, covariates and their centring, every group contrast with its
    weights and meaning, its permutation scheme and smallest attainable p, and the
    warnings these raise. ``check`` prints it; summary.json stores it.
    """
    design = fl.design
    inference = study.settings.inference
    label = _label(fl) if fl.name else "the study"
    contrasts, warnings = [], []
    for name, c in fl.contrasts:
        scheme = _scheme(design, c, inference)
        if scheme.get("above_alpha"):
            how = "exhaustive" if scheme["exhaustive"] else "random"
            warnings.append(
                f"{label}, group contrast {name}: the smallest p that {scheme['permutations']} "
                f"{how} {scheme['kind']} can give is {scheme['smallest_attainable_p']:.3g}, "
                f"above alpha = {inference.alpha}: no voxel or cluster can reach "
                "significance with permutation inference; more animals are needed"
            )
        contrasts.append(
            {
                "name": name,
                "weights": weights_dict(c, design.columns),
                "meaning": fl.contrast_meanings.get(name, "defined in the study file"),
                "default": not study.settings.user_contrasts,
                "permutation": scheme,
            }
        )
    return {
        "formula": study.settings.model.formula,
        "center_covariates": study.settings.model.center_covariates,
        "coefficients": [
            {"name": col, "varies_between": _column_level(design, fl.runs, j)}
            for j, col in enumerate(design.columns)
        ],
        "variables": dict(design.variable_levels),
        "factors": [
            {
                "variable": f.variable,
                "reference": f.reference,
                "levels": [
                    {"level": lv, "animals": n} for lv, n in zip(f.levels, f.animals, strict=True)
                ],
            }
            for f in design.factors
        ],
        "covariates": [
            {"variable": cv.variable, "centring": cv.centring, "centre": cv.centre}
            for cv in design.covariates
        ],
        "contrasts": contrasts,
        "left_out": list(design.left_out) if not study.settings.user_contrasts else [],
        "notes": [
            f"{f.variable} has {len(f.levels)} levels: each is tested against the reference "
            f"({f.reference}) on its own; an F-test across all levels is not done"
            for f in design.factors
            if len(f.levels) > 2
        ],
        "warnings": warnings,
    }


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
                "label": _label(fl),
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
