"""The reviewer's questions of one group map: symmetry, specificity, consistency, quality.

Glue between the fitted maps (:class:`~grouplevel.results.maps.GroupMap`) and the
analyses in :mod:`~grouplevel.questions.symmetry`, :mod:`~grouplevel.questions.specificity`
and :mod:`~grouplevel.questions.quality`.
The questions are asked of the group mean ("mean" contrast) of a first-level contrast
whose design is intercept-only; for other designs this version answers none of them and
says so in summary.json (a left/right test or a target effect of a group difference
needs rules of its own).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp

from grouplevel.anatomy.atlas import Atlas
from grouplevel.anatomy.regions import region_values
from grouplevel.anatomy.tables import RegionData, surviving_voxels
from grouplevel.errors import ArgumentError, UserError
from grouplevel.inference import fdr
from grouplevel.inference.permutation import (
    PermutationResult,
    animal_level_data,
    cluster_forming_z,
    permutation_test,
)
from grouplevel.intake.design import Design
from grouplevel.intake.settings import QuestionSettings, Settings
from grouplevel.model import MixedFit, between_animal_df, fit_reml, test_contrast
from grouplevel.questions.quality import RunQuality, run_quality
from grouplevel.questions.specificity import (
    Consistency,
    LooMaps,
    Specificity,
    artefact_rows,
    consistency,
    edge_shell,
    inner_layer,
    leaf_rows,
    loo_group_maps,
    specificity,
)
from grouplevel.questions.symmetry import (
    analyse_symmetry,
    asymmetry_data,
    li_curves,
    mirror_index,
    region_pair,
    symmetry_table,
)
from grouplevel.results.compute import Backend
from grouplevel.results.correction import permutation_arguments
from grouplevel.results.maps import GroupMap

# Seeds of the bootstrap and of the asymmetry map's permutations derive from the study's
# seed; these offsets keep their random streams apart from the main permutations.
_BOOTSTRAP_STREAM = 1
_ASYMMETRY_STREAM = 2


@dataclass(frozen=True)
class AsymmetryMap:
    """Left-minus-mirror group map on the left half of the brain (in-mask vectors)."""

    mask: np.ndarray  # 3-D: the left-half voxels with a mirror partner
    t: np.ndarray
    z: np.ndarray
    q: np.ndarray
    permutation: PermutationResult | None

    def summary(self, alpha: float) -> dict:
        out = {
            "voxels": int(self.mask.sum()),
            "max_abs_z": float(np.nanmax(np.abs(self.z))) if self.z.size else None,
            "fdr_surviving_voxels": int((np.nan_to_num(self.q, nan=1.0) <= alpha).sum()),
        }
        if self.permutation is not None:
            perm = self.permutation
            out["voxel_fwe_surviving_voxels"] = int((perm.p_fwe_voxel <= alpha).sum())
            if perm.p_fwe_tfce is not None:
                out["tfce_fwe_surviving_voxels"] = int((perm.p_fwe_tfce <= alpha).sum())
        return out


@dataclass(frozen=True)
class Answers:
    """Everything the questions produced for one group map."""

    symmetry: pd.DataFrame | None
    li_curves: pd.DataFrame | None
    symmetry_summary: dict | None
    asymmetry: AsymmetryMap | None
    specificity: Specificity | None
    consistency: Consistency | None
    loo: LooMaps
    run_quality: RunQuality
    notes: tuple[str, ...]

    def tables(self) -> dict[str, pd.DataFrame]:
        """The TSV tables, keyed by file stem."""
        out = {"run_quality": self.run_quality.table(), "leave_one_out": self.loo.table()}
        if self.symmetry is not None:
            out["symmetry"] = self.symmetry
            out["li_curves"] = self.li_curves
        if self.specificity is not None:
            out["specificity"] = self.specificity.table()
        if self.consistency is not None:
            out["consistency"] = self.consistency.table()
        return out

    def summary(self, alpha: float) -> dict:
        return {
            "symmetry": self.symmetry_summary,
            "asymmetry_map": None if self.asymmetry is None else self.asymmetry.summary(alpha),
            "specificity": None if self.specificity is None else self.specificity.summary(),
            "consistency": None
            if self.consistency is None
            else _consistency_verdict(self.consistency.summary()),
            "leave_one_out": self.loo.summary(),
            "run_quality": _quality_verdict(self.run_quality.summary()),
            "notes": list(self.notes),
        }


# Consistency verdict (docs/verdicts-specificity.md): the share of animals whose own
# target effect has the sign of the group effect, and whether leaving out any one animal
# keeps the group effect's sign. "Most" = at least this share of animals (our own rule).
MOST_ANIMALS = 0.75


def _consistency_verdict(summary: dict) -> dict:
    """Add a plain verdict and its reasons to the consistency summary."""
    n = summary["animals"]
    positive = summary["animals_positive"]
    effect = summary.get("effect") or 0.0
    agree = positive if effect >= 0 else n - positive
    low, high = summary.get("loo_effect_range") or [None, None]
    keeps_sign = low is not None and high is not None and (low > 0 or high < 0)
    if agree == n and keeps_sign:
        verdict = "all animals agree"
    elif agree >= MOST_ANIMALS * n and keeps_sign:
        verdict = f"most animals agree ({agree} of {n})"
    else:
        verdict = f"animals disagree ({agree} of {n} with the group's sign)"
    reasons = [
        f"{agree} of {n} animals have a target effect of the group's sign; "
        f"{summary['animals_ci_above_zero']} have a 95% CI above 0",
        f"leaving out one animal at a time, the target effect ranges from {low:.3g} to {high:.3g}"
        if low is not None
        else "no leave-one-out range",
        f"the animal that moves it most is {summary['most_influential_animal']} "
        f"(change {summary['most_influential_change']:.3g})"
        if summary.get("most_influential_change") is not None
        else "no single animal stands out",
    ]
    if summary.get("icc") is not None:
        reasons.append(
            f"between-animal share of variance (ICC) in the target: {summary['icc']:.2f}"
        )
    return {"verdict": verdict, "reasons": reasons, **summary}


def _quality_verdict(summary: dict) -> dict:
    """Add a plain verdict (how many runs are flagged) and the flagged runs as reasons."""
    flagged = summary["flagged_runs"]
    verdict = (
        "no run flagged"
        if not flagged
        else f"{len(flagged)} of {summary['runs']} runs flagged (kept; exclude them in the "
        "runs table if you judge them unusable)"
    )
    reasons = [f"{r['animal']} run {r['run']}: {r['why']}" for r in flagged]
    return {"verdict": verdict, "reasons": reasons, **summary}


def asks_questions(design_columns: tuple[str, ...], contrast: str) -> bool:
    """Whether the questions apply: the group mean of an intercept-only design."""
    return contrast == "mean" and design_columns == ("Intercept",)


def _check_symmetry_regions(atlas: Atlas, names: Sequence[str]) -> None:
    """Every ``[questions] symmetry`` name is one left/right region pair, named once."""
    seen: dict[tuple[int, int], str] = {}
    for name in names:
        try:
            pair = region_pair(atlas, name)
        except ArgumentError as exc:
            raise UserError(f"[questions] symmetry: {exc}") from None
        if pair in seen:
            raise UserError(
                f"[questions] symmetry: {name!r} and {seen[pair]!r} name the same region "
                "pair; give each region once"
            )
        seen[pair] = name


def _target_rows(atlas: Atlas, names: Sequence[str]) -> list[int]:
    rows: list[int] = []
    for name in names:
        rows.extend(atlas.region_rows(name))
    return sorted(set(rows))


def _asymmetry(
    gm: GroupMap,
    y: np.ndarray,
    s2: np.ndarray | None,
    design: Design,
    c: np.ndarray,
    settings: Settings,
    midline_mm: float,
    backend: Backend | None,
) -> AsymmetryMap:
    """Each run minus its mirror image, through the same model and inference."""
    mirror = mirror_index(gm.mask, gm.grid.affine, midline_mm)
    data = asymmetry_data(y, s2, mirror)
    half_mask = mirror.half_mask(data.half)
    estimate = settings.model.run_variance == "estimate"
    fit = fit_reml(
        data.y,
        data.variance,
        design.matrix,
        design.animal,
        estimate_run_variance=estimate or data.variance is None,
        max_iter=settings.model.max_iter,
    )
    df = between_animal_df(design.matrix, design.animal, np.isfinite(data.y), c)
    res = test_contrast(fit, c, df)
    inf = settings.inference
    p = np.where(np.isnan(res.p), 1.0, res.p)
    q = fdr(p, alpha=inf.alpha, method=inf.fdr).q
    perm = None
    if inf.permutations > 0:
        animal_data = animal_level_data(
            data.y,
            data.variance,
            design.matrix,
            design.animal,
            fit.var_run,
            fit.var_animal,
            design.columns,
        )
        perm = permutation_test(
            animal_data,
            c,
            np.broadcast_to(np.asarray(res.df, dtype=float), res.t.shape),
            half_mask,
            rng=np.random.default_rng([inf.seed, _ASYMMETRY_STREAM]),
            **permutation_arguments(
                inf, voxel_volume_mm3=gm.grid.voxel_volume, backend=backend, sided="two"
            ),
        )
    return AsymmetryMap(mask=half_mask, t=res.t, z=res.z, q=q, permutation=perm)


def answer_questions(
    gm: GroupMap,
    y: np.ndarray,
    s2: np.ndarray | None,
    fit: MixedFit,
    design: Design,
    runs: pd.DataFrame,
    c: np.ndarray,
    regions: RegionData | None,
    questions: QuestionSettings,
    settings: Settings,
    *,
    backend: Backend | None = None,
) -> Answers:
    """Answer the configured questions of one group map (see the module docstring).

    ``backend`` is where the permutations of the asymmetry maps run (``None``: local
    threads), the same as for the group maps.
    """
    estimate = settings.model.run_variance == "estimate"
    alpha = settings.inference.alpha
    notes: list[str] = []
    shell = edge_shell(gm.mask, questions.edge_distance_voxels)
    loo = loo_group_maps(
        y,
        s2,
        design.matrix,
        design.animal,
        c,
        animal_ids=design.animal_ids,
        estimate_run_variance=estimate or s2 is None,
        var_animal=fit.var_animal,
        var_run=fit.var_run,
    )
    quality = run_quality(
        y, s2, design.animal, runs, loo.effect, shell, threshold=questions.outlier_z
    )
    sym = curves = sym_summary = asym = spec = cons = None
    if regions is None:
        if questions.symmetry or questions.targets:
            notes.append("no atlas: symmetry, specificity and consistency were not assessed")
        return Answers(None, None, None, None, None, None, loo, quality, tuple(notes))
    atlas = regions.atlas
    method = settings.clusters.resolved_method(settings.inference)
    surviving = surviving_voxels(gm, alpha)[method]
    present = np.isfinite(y)
    if questions.symmetry:
        _check_symmetry_regions(atlas, questions.symmetry)
        results = analyse_symmetry(
            list(questions.symmetry),
            atlas,
            y=y,
            present=present,
            animal=design.animal,
            z=gm.z,
            effect=gm.effect,
            region_values=regions.values,
            rng=np.random.default_rng([settings.inference.seed, _BOOTSTRAP_STREAM]),
            variance=s2,
            var_run=fit.var_run,
            threshold=cluster_forming_z(settings.inference.cluster_forming_p, "positive"),
            equivalence_margin=questions.equivalence_margin,
            alpha=alpha,
            stimulus_side=questions.stimulus_side,
        )
        sym = symmetry_table(results)
        curves = li_curves(results)
        sym_summary = {}
        for r in results:
            detail = r.summary()
            verdict = detail["verdict"]
            sym_summary[r.region] = {
                "verdict": verdict["label"],
                "side": verdict["side"],
                "reasons": verdict["reasons"],
                **{k: v for k, v in detail.items() if k != "verdict"},
                "numbers": verdict["numbers"],
            }
        asym = _asymmetry(gm, y, s2, design, c, settings, atlas.midline_mm, backend)
    if questions.targets:
        rows = _target_rows(atlas, questions.targets)
        height = (np.argwhere(gm.mask) @ gm.grid.affine[:3, :3].T + gm.grid.affine[:3, 3])[:, 2]
        spec = specificity(
            surviving,
            gm.z,
            gm.effect,
            atlas,
            rows,
            shell,
            inner_layer(gm.mask, questions.edge_distance_voxels),
            height,
            artefact_rows(atlas),
            y,
            design.matrix,
            design.animal,
            c,
        )
        leaves = leaf_rows(atlas, rows)
        weights = sp.csr_matrix(np.asarray(atlas.shares[:, leaves].sum(axis=1)))
        target_values, _ = region_values(y, present, weights)
        cons = consistency(
            target_values[:, 0],
            None,
            design.matrix,
            design.animal,
            design.animal_ids,
            c,
            estimate_run_variance=True,
        )
    return Answers(sym, curves, sym_summary, asym, spec, cons, loo, quality, tuple(notes))
