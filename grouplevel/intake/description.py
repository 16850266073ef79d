"""The design of one first-level condition, described for ``check`` and summary.json.

What every later stage will do with it, before any computation: the coefficients and
where each varies, factors and covariates, every group contrast with its weights and
meaning, the permutation scheme each contrast gets and its exact smallest attainable p
(the same reduction to one value per animal that ``run`` makes).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from grouplevel.intake.design import (
    CONTRAST_ANIMAL,
    CONTRAST_SLOPE,
    CONTRAST_SLOPES,
    Design,
    RandomEffects,
    animal_design,
    contrast_kind,
    describe_random_effects,
    slope_design,
    weights_dict,
)
from grouplevel.intake.settings import InferenceSettings
from grouplevel.intake.study import FirstLevel, Study


def first_level_label(fl: FirstLevel) -> str:
    """``condition sound``, or ``comparison paw-minus-sound = paw - sound (within runs)``."""
    if fl.conditions is not None:
        terms = " ".join(
            f"{'-' if w < 0 else '+'} {'' if abs(w) == 1 else f'{abs(w):g} '}{c}"
            for c, w in fl.conditions.items()
        ).removeprefix("+ ")
        return f"comparison {fl.name} = {terms} (within runs)"
    return f"condition {fl.name}" if fl.name else "runs"


def _reduced_design(
    design: Design, random: RandomEffects, c: np.ndarray
) -> tuple[np.ndarray, np.ndarray] | None:
    """The animal-level design and contrast the permutations of ``c`` exchange.

    The same reduction ``run`` makes (one value per animal for the level ``c`` tests:
    the animal's intercept, its own slope, or its own combination of slopes), without
    the data; animals with no information on a tested slope take no part. None when
    ``c`` mixes levels (``check`` refuses permutations for it).
    """
    kind, slope = contrast_kind(design, random, c)
    if kind == CONTRAST_ANIMAL:
        columns = [j for j in range(len(design.columns)) if not design.within[j]]
        return animal_design(design)[:, columns], c[columns]
    if kind not in (CONTRAST_SLOPE, CONTRAST_SLOPES):
        return None
    slope_cols = (
        [random.slope_columns[slope]]
        if kind == CONTRAST_SLOPE
        else [k for k in random.slope_columns if c[k] != 0]
    )
    varies = np.zeros(design.n_animals, dtype=bool)
    for col in slope_cols:
        frame = pd.DataFrame({"a": design.animal, "x": design.matrix[:, col]})
        varies |= (frame.groupby("a")["x"].nunique() > 1).to_numpy()
    if kind == CONTRAST_SLOPE:
        G, columns = slope_design(design, random, slope)
        return G[varies], c[columns]
    return np.ones((int(varies.sum()), 1)), np.ones(1)


def _scheme(
    design: Design, random: RandomEffects, c: np.ndarray, inference: InferenceSettings
) -> dict:
    """The permutation scheme a contrast will get, without the data (what run will do)."""
    from grouplevel.inference.permutation import partition_design, plan_permutations

    if inference.permutations == 0:
        return {"kind": "none", "why": "[inference] permutations = 0: parametric maps only"}
    reduced = _reduced_design(design, random, c)
    if reduced is None:
        return {"kind": "none", "why": "the contrast mixes animal-level and within-animal columns"}
    x_i, Z = partition_design(*reduced)
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
    label = first_level_label(fl) if fl.name else "the study"
    contrasts, warnings = [], []
    for name, c in fl.contrasts:
        scheme = _scheme(design, fl.random, c, inference)
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
        "random_effects": describe_random_effects(design, fl.random),
        "center_covariates": study.settings.model.center_covariates,
        "coefficients": [
            {"name": col, "varies_between": level}
            for col, level in zip(design.columns, design.level, strict=True)
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
