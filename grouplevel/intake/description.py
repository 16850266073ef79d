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
    FTEST_SUFFIX,
    Design,
    RandomEffects,
    animal_design,
    contrast_kind,
    describe_random_effects,
    own_effect_rows,
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
    ``c`` mixes levels (``check`` refuses permutations for it). ``c`` may be the (q, p)
    rows of an F-test (reduced column-wise; rows on several slopes reduce to each
    animal's vector of own effects, one row per animal that estimates all of them).
    """
    kind, slope = contrast_kind(design, random, np.abs(np.atleast_2d(c)).sum(axis=0))
    if kind == CONTRAST_ANIMAL:
        columns = [j for j in range(len(design.columns)) if not design.within[j]]
        return animal_design(design)[:, columns], c[..., columns]
    if kind == CONTRAST_SLOPES and c.ndim > 1:
        taking_part = _vector_animals(design, random, c)
        return np.ones((int(taking_part.sum()), 1)), np.ones((1, 1))
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
        return G[varies], c[..., columns]
    return np.ones((int(varies.sum()), 1)), np.ones(1)


def _vector_animals(design: Design, random: RandomEffects, weights: np.ndarray) -> np.ndarray:
    """(m,) the animals whose own runs estimate every row of an F-test on several slopes
    (where every run has data)."""
    from grouplevel.inference.vector_flips import estimable_animals

    own = design.matrix[:, list(random.slope_columns)]
    return estimable_animals(own, design.animal, own_effect_rows(random, weights))


def _scheme(
    design: Design, random: RandomEffects, c: np.ndarray, inference: InferenceSettings
) -> dict:
    """The permutation scheme a contrast (or the (q, p) rows of an F-test) will get,
    without the data (what run will do)."""
    from grouplevel.inference.permutation import partition_design, plan_permutations

    if inference.permutations == 0:
        return {"kind": "none", "why": "[inference] permutations = 0: parametric maps only"}
    f_test = c.ndim > 1
    reduced = _reduced_design(design, random, c)
    if reduced is None:
        why = "the contrast mixes animal-level and within-animal columns"
        if f_test:
            why = (
                "its rows mix levels, or weight several random slopes that animal-level "
                "columns moderate"
            )
        return {"kind": "none", "why": why}
    rng = np.random.default_rng(inference.seed)
    if f_test and contrast_kind(design, random, np.abs(c).sum(axis=0))[0] == CONTRAST_SLOPES:
        from grouplevel.inference.vector_flips import plan_vector_flips

        m = reduced[0].shape[0]  # the animals that estimate every row
        return _scheme_entry(
            plan_vector_flips(m, c.shape[0], inference.permutations, rng), inference
        )
    x_i, Z = partition_design(*reduced)
    if f_test and random.variance_groups is not None:
        # the G statistic: sign flips of whole animals only (as run does)
        x_i, Z = np.ones(x_i.shape[0]), Z[:, :0]
    sided = "positive" if f_test else inference.sided
    scheme = plan_permutations(x_i, Z, inference.permutations, rng, sided, f_test)
    return _scheme_entry(scheme, inference)


def _scheme_entry(scheme, inference: InferenceSettings) -> dict:
    """A permutation scheme as described for check and summary.json."""
    return {
        "kind": scheme.kind,
        "exhaustive": scheme.exhaustive,
        "permutations": scheme.n,
        "distinct": scheme.n_distinct,
        "equivalent_to_identity": scheme.n_equivalent,
        "smallest_attainable_p": scheme.smallest_p,
        "above_alpha": bool(scheme.smallest_p > inference.alpha),
    }


def ftest_df_rule(design: Design, random: RandomEffects, weights: np.ndarray) -> str:
    """The denominator degrees of freedom of an F-test in words, with their value where
    every run has data (docs/model.md, "F-tests")."""
    text = _ftest_df_words(design, random, weights)
    if random.animal_group is not None:
        text += "; with variance groups at most the smallest Welch–Satterthwaite df of its rows"
    return text


def _ftest_df_words(design: Design, random: RandomEffects, weights: np.ndarray) -> str:
    kind, slope = contrast_kind(design, random, np.abs(weights).sum(axis=0))
    if kind == CONTRAST_ANIMAL:
        columns = [j for j in range(len(design.columns)) if not design.within[j]]
        rank = np.linalg.matrix_rank(animal_design(design)[:, columns]) if columns else 0
        return (
            f"animals − rank of the animal-level design = {design.n_animals} − {rank} = "
            f"{design.n_animals - rank} (where every animal has data)"
        )
    if kind == CONTRAST_SLOPE:
        G, _ = slope_design(design, random, slope)
        rank = np.linalg.matrix_rank(G)
        return (
            f"animals whose runs vary {design.columns[random.slope_columns[slope]]} − rank "
            f"of the slope's animal-level design ({rank}) (the slope df, as for its t "
            "contrasts)"
        )
    if kind == CONTRAST_SLOPES:
        return "the smallest slope df of the slopes in its rows (as for t contrasts)"
    return "the smaller of the animal-level and slope df (as for t contrasts)"


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
    ftests = []
    for ft in fl.ftests:
        scheme = _scheme(design, fl.random, ft.weights, inference)
        if scheme.get("above_alpha"):
            warnings.append(
                f"{label}, F-test {ft.name}: the smallest p that {scheme['permutations']} "
                f"{scheme['kind']} can give is {scheme['smallest_attainable_p']:.3g}, above "
                f"alpha = {inference.alpha}: permutation inference cannot reach significance"
            )
        ftests.append(
            {
                "name": ft.name,
                "rows": [
                    {"contrast": row, "weights": weights_dict(w, design.columns)}
                    for row, w in zip(ft.rows, ft.weights, strict=True)
                ],
                "meaning": ft.meaning,
                "default": not ft.declared,
                "df_numerator": len(ft.rows),
                "df_denominator": ftest_df_rule(design, fl.random, ft.weights),
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
        "ftests": ftests,
        "left_out": list(design.left_out) if not study.settings.user_contrasts else [],
        "notes": [
            f"{f.variable} has {len(f.levels)} levels: each is tested against the reference "
            f"({f.reference}) on its own, and all at once by the F-test "
            f"{f.variable}-{FTEST_SUFFIX}"
            for f in design.factors
            if len(f.levels) > 2
        ],
        "warnings": warnings,
    }
