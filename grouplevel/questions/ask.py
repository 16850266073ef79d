"""The reviewer's questions of one group map: symmetry, specificity, consistency, quality.

Glue between the fitted maps (:mod:`grouplevel.pipeline`) and the analyses in
:mod:`grouplevel.questions.symmetry`, :mod:`grouplevel.questions.specificity` and
:mod:`grouplevel.questions.quality`.

Which group contrasts are asked: every contrast that is the mean response of a set of
animals (:func:`grouplevel.questions.means.contrast_kind`: the mean of all animals, of one group,
an intercept with centred covariates), whatever the design. A difference (genotype,
drug − vehicle, a slope) gets its own versions (:func:`answers_not_asked`): whether its
lateralisation differs (:func:`grouplevel.symmetry.lateralisation_differences`), the
specificity of its surviving voxels, its consistency across animals (each animal's own
difference for a within-animal difference, the overlap of the groups for a group
difference) and the quality of the runs of each of its sides
(:mod:`grouplevel.questions.ask_differences`); what cannot be asked of a difference (a
slope over a covariate has no two groups) carries its reason. A contrast that is
neither a mean nor a difference gets the reason in one sentence
(:func:`question_plan`); :func:`skipped_warning` makes the one warning ``run`` prints.

The leave-one-animal-out maps behind run quality use the model the contrast was fitted
with (random slopes, sessions, variance groups: ``terms``). The region-level tests of
symmetry, the asymmetry map and the specificity tests still fit the random-intercept
model to their region values; for an extended design the summary says so in its notes
(:data:`EXTENDED_NOTE`).

One response for all answers: whether the map has a response, and of which sign, is
decided once, from the voxels that survive the chosen correction (which honours
``[inference] sided``). The symmetry verdict counts only sides of those signs, the
specificity verdict names the sign, and the consistency verdict counts animals of that
sign, so the three never disagree on whether there is a response. When specificity
flags an edge/rim or artefact-label pattern, the symmetry and consistency verdicts say so.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd
import scipy.sparse as sp

from grouplevel.anatomy.regions import region_values
from grouplevel.anatomy.tables import RegionData, surviving_voxels
from grouplevel.inference import fdr
from grouplevel.inference.permutation import (
    AnimalLevelData,
    PermutationResult,
    animal_level_data,
    cluster_forming_z,
    permutation_test,
)
from grouplevel.intake.design import Design
from grouplevel.intake.settings import QuestionSettings, Settings
from grouplevel.machine import available_cores
from grouplevel.model import MixedFit, between_animal_df, test_contrast
from grouplevel.model.marginal import ModelDf, RandomTerms, fit_terms
from grouplevel.model.memory import (
    LEAVE_ONE_OUT_ARRAYS,
    REGION_AVERAGE_ARRAYS,
    RUN_SCORE_ARRAYS,
    chunk_rows,
    chunk_voxels,
    voxel_chunks,
)
from grouplevel.questions.ask_differences import (
    BETWEEN,
    WITHIN,
    difference_consistency,
    difference_run_quality,
    difference_sides,
    fit_components,
    target_values,
)
from grouplevel.questions.differences import DifferenceConsistency, GroupOverlap
from grouplevel.questions.means import DIFFERENCE, MEAN, ContrastKind, contrast_kind, design_rows
from grouplevel.questions.quality import RunQuality, run_quality
from grouplevel.questions.sides import asked_rows, split_side
from grouplevel.questions.specificity import (
    VERDICT_NONE,
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
    counted_signs,
    lateralisation_differences,
    li_curves,
    mirror_index,
    symmetry_table,
)
from grouplevel.results.compute import Backend
from grouplevel.results.correction import permutation_arguments
from grouplevel.results.maps import GroupMap

# Seeds of the bootstrap and of the asymmetry map's permutations derive from the study's
# seed; these offsets keep their random streams apart from the main permutations.
_BOOTSTRAP_STREAM = 1
_ASYMMETRY_STREAM = 2
# Run quality measures a run's agreement with the group map over at least this many
# voxels (a correlation over fewer says little; our own choice), and a voxel belongs to
# the targets when at least half of it is covered by them (majority rule, common
# practice for labelling voxels from an atlas).
MIN_AGREEMENT_VOXELS = 20
TARGET_SHARE = 0.5


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


#: The questions, as summary.json keys.
QUESTIONS = ("symmetry", "specificity", "consistency", "run_quality")


@dataclass(frozen=True)
class QuestionPlan:
    """Whether a group contrast gets the questions, and why not when it does not.

    Attributes
    ----------
    asked
        True for a group mean.
    kind
        :func:`grouplevel.questions.means.contrast_kind` of the contrast.
    reason
        One plain sentence when not asked, else "".
    animals
        ``(m,)`` bool: the animals whose mean the contrast is (all False when not asked).
    """

    asked: bool
    kind: ContrastKind
    reason: str
    animals: np.ndarray


def question_plan(design, c: np.ndarray) -> QuestionPlan:
    """Decide from the design and contrast whether the questions are asked of ``c``."""
    rows = design_rows(design.matrix, design.animal, design.animal_level)
    kind = contrast_kind(rows, c)
    m = design.n_animals
    if kind.kind == DIFFERENCE:
        reason = (
            "this contrast is a difference (or slope) between responses: it is asked the "
            "difference's own versions of the questions"
        )
        return QuestionPlan(False, kind, reason, np.zeros(m, dtype=bool))
    if not kind.is_mean:
        reason = f"asked of group means and differences only; {kind.why}"
        return QuestionPlan(False, kind, reason, np.zeros(m, dtype=bool))
    weighted = kind.rows_in_mean()
    animals = np.zeros(m, dtype=bool)
    if rows.shape[0] == m and np.all(design.animal_level):
        animals = weighted
    else:
        animals[np.asarray(design.animal)[weighted]] = True
    return QuestionPlan(True, kind, "", animals)


def skipped_warning(skipped: list[str]) -> list[str]:
    """The one warning ``run`` prints about the contrasts not asked (empty when none)."""
    if not skipped:
        return []
    return [
        "the questions are asked of group means and of differences only; not asked of "
        f"{', '.join(skipped)} (neither a mean response nor a difference between "
        "responses); each result's summary gives the reason"
    ]


def comparison_note(conditions: dict[str, float]) -> str:
    """The note of a within-animal comparison's answers: what "response" means there."""
    parts = []
    for name, w in conditions.items():
        size = name if abs(w) == 1 else f"{abs(w):g}·{name}"
        sign = "−" if w < 0 else "+"
        parts.append(f"{sign} {size}" if parts else ("−" if w < 0 else "") + size)
    terms = " ".join(parts)
    return (
        f"This result is a within-animal comparison ({terms}) of the runs that carry every "
        "condition: each run's value is that run's difference, so 'response' in these "
        "answers means the difference; consistency counts each animal's own difference "
        "and run quality scores each run pair's difference."
    )


#: Note of the answers of an extended design: which internal tests use which model.
EXTENDED_NOTE = (
    "The model has random slopes, session levels or variance groups: the leave-one-out "
    "maps, run quality, consistency and the region-level symmetry and specificity tests "
    "are fitted with that model and use the map's degrees-of-freedom rule, and the "
    "asymmetry map's t is fitted with it, as are the region table's tests. Still "
    "simpler: the asymmetry map's permutations reduce each animal's data with "
    "random-intercept weights; the leave-one-out refits of the target "
    "effect use between-animal df; the per-animal means (animals.tsv, the symmetry "
    "bootstrap) weight runs by the run variance alone."
)


@dataclass(frozen=True)
class Answers:
    """Everything the questions produced for one group map.

    ``not_assessed`` maps each question not answered to the plain reason why; for a
    contrast that is not a group mean every question is in it and everything else is
    None (:meth:`not_asked`).
    """

    symmetry: pd.DataFrame | None
    li_curves: pd.DataFrame | None
    symmetry_summary: dict | None
    asymmetry: AsymmetryMap | None
    specificity: Specificity | None
    consistency: Consistency | None
    loo: LooMaps | None
    run_quality: RunQuality | None
    notes: tuple[str, ...]
    not_assessed: dict[str, str] = field(default_factory=dict)
    contrast_kind: str = MEAN
    response: dict | None = None
    consistency_summary: dict | None = None
    artefact_flag: str = ""

    @classmethod
    def not_asked(cls, plan: QuestionPlan) -> Answers:
        """The answers of a contrast that is neither a mean nor a difference: reasons."""
        return cls.for_difference(plan, {q: plan.reason for q in QUESTIONS})

    @classmethod
    def for_difference(
        cls,
        plan: QuestionPlan,
        not_assessed: dict[str, str],
        lateralisation: pd.DataFrame | None = None,
        lateralisation_summary: dict | None = None,
        spec: Specificity | None = None,
        response: dict | None = None,
        consistency: DifferenceConsistency | GroupOverlap | None = None,
        consistency_summary: dict | None = None,
        quality: RunQuality | None = None,
        notes: tuple[str, ...] = (),
    ) -> Answers:
        """The answers of a difference: lateralisation, specificity, consistency and run
        quality where asked."""
        return cls(
            lateralisation,
            None,
            lateralisation_summary,
            None,
            spec,
            consistency,
            None,
            quality,
            notes,
            not_assessed=not_assessed,
            contrast_kind=plan.kind.kind,
            response=response,
            consistency_summary=consistency_summary,
            artefact_flag=spec.flag if spec is not None else "",
        )

    @property
    def asked(self) -> bool:
        """Whether the contrast is a group mean (asked every question)."""
        return self.contrast_kind == MEAN

    def tables(self) -> dict[str, pd.DataFrame]:
        """The TSV tables, keyed by file stem."""
        if not self.asked:
            out = {}
            if self.symmetry is not None:
                out["lateralisation_difference"] = self.symmetry
            if self.specificity is not None:
                out["specificity"] = self.specificity.table()
            if self.consistency is not None:
                out["consistency"] = self.consistency.table()
            if self.run_quality is not None:
                out["run_quality"] = self.run_quality.table()
            return out
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
        out = {
            "asked": self.asked,
            "contrast_kind": self.contrast_kind,
            "not_assessed": dict(self.not_assessed),
            "response": self.response,
            "artefact_flag": self.artefact_flag,
            "symmetry": self.symmetry_summary,
            "asymmetry_map": None if self.asymmetry is None else self.asymmetry.summary(alpha),
            "specificity": None if self.specificity is None else self._specificity_summary(),
            "consistency": self.consistency_summary,
            "leave_one_out": None if self.loo is None else self.loo.summary(),
            "run_quality": None
            if self.run_quality is None
            else _quality_verdict(self.run_quality.summary()),
            "notes": list(self.notes),
        }
        return out

    def _specificity_summary(self) -> dict:
        out = self.specificity.summary()
        signs = (self.response or {}).get("signs") or []
        out["sign"] = " and ".join(signs)
        if self.contrast_kind == DIFFERENCE:
            # the direction of a difference always matters: name it
            if out["verdict"] != VERDICT_NONE and signs:
                out["verdict"] = f"{out['verdict']} ({' and '.join(signs)} difference)"
        elif out["verdict"] != VERDICT_NONE and signs and signs != ["positive"]:
            out["verdict"] = f"{out['verdict']} ({' and '.join(signs)} response)"
        return out


# Consistency verdict (docs/verdicts-specificity.md): the share of animals whose own
# target effect has the sign of the response, and whether leaving out any one animal
# keeps the group effect's sign. "Most" = at least this share of animals (our own rule).
MOST_ANIMALS = 0.75

#: Added to the symmetry and consistency verdicts when specificity flags an artefact.
EDGE_FLAG_SUFFIX = " — but most of it lies in the brain-edge rim; see specificity"
LABEL_FLAG_SUFFIX = (
    " — but much of it lies in artefact labels (ventricles, vessels); see specificity"
)


def _consistency_verdict(
    cons: Consistency, response: dict, flag_suffix: str, in_mean: np.ndarray
) -> dict:
    """A plain, sign-aware verdict and its reasons for the consistency summary.

    Only the animals whose mean the contrast is (``in_mean``, in the order of
    ``cons.animals``) are counted: the mean of one group is judged on that group.
    """
    summary = cons.summary()
    table = cons.animals
    has = (table["runs"].to_numpy() > 0) & np.asarray(in_mean, dtype=bool)
    effects = table["effect"].to_numpy(dtype=float)
    n = int(has.sum())
    signs = response["signs"]
    effect = summary.get("effect")
    if not signs:
        sign = ""
    elif len(signs) == 1:
        sign = signs[0]
    else:
        sign = "negative" if (effect or 0.0) < 0 else "positive"
    s = -1.0 if sign == "negative" else 1.0
    agree = int((has & (np.nan_to_num(s * effects) > 0)).sum())
    ci_side = table["ci_high"] if sign == "negative" else table["ci_low"]
    ci_clear = int((has & (np.nan_to_num(s * ci_side.to_numpy(dtype=float)) > 0)).sum())
    low, high = summary.get("loo_effect_range") or [None, None]
    keeps_sign = low is not None and high is not None and s * low > 0 and s * high > 0
    word = "negative response" if sign == "negative" else "response"
    if not sign:
        verdict = "no response to be consistent about"
    elif effect is None or s * effect <= 0:
        verdict = f"animals disagree (the target's group effect is not of the {sign} sign)"
    elif agree == n and keeps_sign:
        verdict = "all animals agree"
    elif agree >= MOST_ANIMALS * n and keeps_sign:
        verdict = f"most animals agree ({agree} of {n})"
    else:
        verdict = f"animals disagree ({agree} of {n} with the {sign} sign)"
    if sign == "negative" and not verdict.startswith("no response"):
        verdict = f"{verdict} ({word})"
    if sign and flag_suffix:
        verdict += flag_suffix
    reasons = [_response_sentence(response)]
    if sign:
        reasons.append(
            f"{agree} of {n} animals have a target effect of the {sign} sign; {ci_clear} have "
            f"a 95% CI {'below' if sign == 'negative' else 'above'} 0"
        )
    reasons += [
        f"target group effect {effect:.3g} (p = {summary['p']:.2g})"
        if effect is not None and summary.get("p") is not None
        else "no target group effect",
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
    return {
        "verdict": verdict,
        "sign": sign,
        "reasons": reasons,
        **summary,
        "animals_in_mean": [str(a) for a in table["animal"][has]],
        "animals_counted": n,
        "animals_agreeing": agree,
        "animals_ci_clear_of_zero": ci_clear,
    }


def _response_sentence(response: dict) -> str:
    """One sentence: the map's response, as every verdict counts it."""
    counted = " or ".join(response["counted"])
    if not response["signs"]:
        return (
            f"No voxel survives {response['method']} ({counted} effects counted), so the map "
            "shows no response"
        )
    parts = [f"{response[f'{sign}_voxels']} {sign}" for sign in response["signs"]]
    text = (
        f"The map's response: {' and '.join(parts)} voxels survive {response['method']} "
        f"({counted} effects counted)"
    )
    minor = [
        f"{response[f'{sign}_voxels']} {sign}"
        for sign in response["counted"]
        if sign not in response["signs"] and response[f"{sign}_voxels"]
    ]
    if minor:
        text += (
            f"; {' and '.join(minor)} surviving voxel(s) are no more than "
            f"{100 * response['minor_sign_share']:g}% of the surviving voxels and are not "
            "counted as a response"
        )
    return text


def map_response(
    surviving: np.ndarray, z: np.ndarray, method: str, sided: str, alpha: float
) -> dict:
    """The map's response: the signs of the surviving voxels, as the verdicts count them.

    A sign is part of the response when ``sided`` counts it and it holds more than a
    share ``alpha`` of the surviving voxels. FDR lets up to that share of the surviving
    voxels be false discoveries (Benjamini & Hochberg 1995, J R Stat Soc B 57:289), so a
    handful of voxels of the other sign beside a large response is not called a
    response of that sign; their count is kept in the summary.
    """
    counted = counted_signs(sided)
    z = np.nan_to_num(np.asarray(z, dtype=float))
    surviving = np.asarray(surviving, dtype=bool)
    counts = {
        "positive": int((surviving & (z > 0)).sum()),
        "negative": int((surviving & (z < 0)).sum()),
    }
    total = counts["positive"] + counts["negative"]
    signs = [sign for sign in counted if counts[sign] > 0 and counts[sign] > alpha * total]
    return {
        "signs": signs,
        "counted": list(counted),
        "method": method,
        "positive_voxels": counts["positive"],
        "negative_voxels": counts["negative"],
        "minor_sign_share": float(alpha),
    }


def _flag_suffix(spec: Specificity | None) -> str:
    if spec is None or not spec.flag:
        return ""
    return EDGE_FLAG_SUFFIX if (spec.edge_rule or spec.rim_rule) else LABEL_FLAG_SUFFIX


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


def _voxel_chunk(settings: Settings, n_runs: int) -> int:
    """Voxels the questions take together: the fit's chunk for ``[compute] memory_gb``
    (:func:`grouplevel.model.memory.chunk_voxels`)."""
    return chunk_voxels(n_runs, settings.compute.memory_gb)


def _loo_chunk(settings: Settings, n_runs: int, n_animals: int) -> int:
    """Voxels downdated together for the leave-one-animal-out maps: the fit's chunk,
    or fewer when the (voxels, animals + 1) arrays of the downdate would pass the same
    share of ``[compute] memory_gb``."""
    memory_gb = settings.compute.memory_gb
    per_voxel = n_animals + 1
    return min(
        chunk_voxels(n_runs, memory_gb), chunk_voxels(per_voxel, memory_gb, LEAVE_ONE_OUT_ARRAYS)
    )


def _row_chunk(memory_gb: float | None, n_voxels: int, arrays: int) -> int | None:
    """Runs the questions take together for ``[compute] memory_gb`` (None: all)
    (:func:`grouplevel.model.memory.chunk_rows`)."""
    return None if memory_gb is None else chunk_rows(n_voxels, memory_gb, arrays)


def _asymmetry(
    gm: GroupMap,
    y: np.ndarray,
    s2: np.ndarray | None,
    design: Design,
    c: np.ndarray,
    settings: Settings,
    midline_mm: float,
    backend: Backend | None,
    terms: RandomTerms | None = None,
    model_df: ModelDf | None = None,
) -> AsymmetryMap:
    """Each run minus its mirror image, through the same model and inference.

    The t map comes from the model the contrast was fitted with (``terms``) and its df
    from the map's rule (``model_df``; default between-animal df); the permutations
    reduce each animal's data with that fit's intercept and run variances (the
    random-intercept reduction).
    """
    mirror = mirror_index(gm.mask, gm.grid.affine, midline_mm)
    half = mirror.left & (mirror.index >= 0)
    inf = settings.inference
    # the runs × kept voxels differences are made, fitted and reduced one chunk of
    # voxels at a time (every number is per voxel); only per-voxel results are kept
    chunk = _voxel_chunk(settings, y.shape[0])
    parts = [
        _asymmetry_part(y, s2, mirror, sl, design, c, settings, terms, model_df)
        for sl in voxel_chunks(int(half.sum()), chunk) or [slice(0, 0)]
    ]
    t, z, p, df = (np.concatenate([part[k] for part in parts]) for k in range(4))
    half_mask = mirror.half_mask(half)
    q = fdr(np.where(np.isnan(p), 1.0, p), alpha=inf.alpha, method=inf.fdr).q
    perm = None
    if inf.permutations > 0:
        pieces = [part[4] for part in parts]
        animal_data = AnimalLevelData(
            mean=np.concatenate([a.mean for a in pieces]),
            precision=np.concatenate([a.precision for a in pieces]),
            design=pieces[0].design,
            var_animal=np.concatenate([a.var_animal for a in pieces]),
        )
        perm = permutation_test(
            animal_data,
            c,
            df,
            half_mask,
            rng=np.random.default_rng([inf.seed, _ASYMMETRY_STREAM]),
            **permutation_arguments(
                inf, voxel_volume_mm3=gm.grid.voxel_volume, backend=backend, sided="two"
            ),
        )
    return AsymmetryMap(mask=half_mask, t=t, z=z, q=q, permutation=perm)


def _asymmetry_part(y, s2, mirror, columns, design, c, settings, terms, model_df):
    """One chunk of the mirrored maps: fitted with the contrast's model and tested.

    Returns ``(t, z, p, df, animal_data)`` of the chunk's voxels; ``animal_data`` (the
    permutations' reduction) is None without permutations.
    """
    data = asymmetry_data(y, s2, mirror, columns)
    estimate = settings.model.run_variance == "estimate"
    fit = fit_terms(
        data.y,
        data.variance,
        design.matrix,
        design.animal,
        terms,
        estimate_run_variance=estimate or data.variance is None,
        max_iter=settings.model.max_iter,
    )
    present = np.isfinite(data.y)
    if model_df is None:
        df = between_animal_df(design.matrix, design.animal, present, c)
    else:
        df = model_df(fit, present, c)
    res = test_contrast(fit, c, df)
    animal_data = None
    if settings.inference.permutations > 0:
        animal_data = animal_level_data(
            data.y,
            data.variance,
            design.matrix,
            design.animal,
            fit.var_run,
            fit.var_animal,
            design.columns,
        )
    df = np.broadcast_to(np.asarray(res.df, dtype=float), res.t.shape)
    return res.t, res.z, res.p, df, animal_data


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
    plan: QuestionPlan | None = None,
    *,
    backend: Backend | None = None,
    terms: RandomTerms | None = None,
    model_df: ModelDf | None = None,
) -> Answers:
    """Answer the configured questions of one group mean (see the module docstring).

    ``plan`` is :func:`question_plan` of ``c`` (computed when omitted); a contrast that
    is not a group mean gets :meth:`Answers.not_asked`. ``backend`` is where the
    permutations of the asymmetry maps run (``None``: local threads), the same as for
    the group maps. ``terms`` are the random terms of the fitted model (default: a
    random intercept per animal); the leave-one-out maps and the region-level refits use
    them. ``model_df(fit, present, c)`` is the group map's df rule, used by the
    region-level tests (default: between-animal df).
    """
    plan = plan or question_plan(design, c)
    terms = terms or RandomTerms()
    if not plan.asked:
        return answers_not_asked(
            plan,
            design,
            c,
            regions,
            questions,
            settings,
            gm,
            y,
            s2=s2,
            fit=fit,
            runs=runs,
            terms=terms,
            model_df=model_df,
        )
    estimate = settings.model.run_variance == "estimate"
    alpha = settings.inference.alpha
    notes: list[str] = [EXTENDED_NOTE] if terms.extended else []
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
        components=fit_components(fit) if terms.extended else None,
        terms=terms,
        chunk=_loo_chunk(settings, y.shape[0], design.n_animals),
        workers=available_cores(),
    )
    weighted = plan.kind.rows_in_mean()
    in_runs = weighted if weighted.size == len(design.animal) and weighted.any() else None
    method = settings.clusters.resolved_method(settings.inference)
    surviving = surviving_voxels(gm, alpha)[method]
    agreement = _agreement_voxels(regions, questions, surviving, method)
    quality = _run_quality(
        y,
        s2,
        design,
        runs,
        loo,
        shell,
        questions,
        plan.animals,
        agreement,
        in_runs,
        settings.compute.memory_gb,
    )
    # the answers keep the leave-one-out numbers, not the (animals, voxels) maps that
    # only the run quality reads: they would be held until the outputs are written
    loo = replace(loo, effect=None)
    response = map_response(surviving, gm.z, method, settings.inference.sided, alpha)
    if regions is None:
        reason = "the study has no [atlas], so no region can be asked about"
        return Answers(
            None,
            None,
            None,
            None,
            None,
            None,
            loo,
            quality,
            tuple(notes),
            not_assessed={q: reason for q in ("symmetry", "specificity", "consistency")},
            response=response,
        )
    atlas = regions.atlas
    not_assessed: dict[str, str] = {}
    spec = cons = cons_summary = None
    if questions.targets:
        spec, cons = _specificity_and_consistency(
            gm,
            y,
            design,
            c,
            atlas,
            surviving,
            shell,
            questions,
            terms,
            model_df,
            settings.compute.memory_gb,
        )
    else:
        reason = "no [questions] targets were named"
        not_assessed.update(specificity=reason, consistency=reason)
    suffix = _flag_suffix(spec)
    if cons is not None:
        cons_summary = _consistency_verdict(cons, response, suffix, plan.animals)
    sym = curves = sym_summary = asym = None
    if questions.symmetry:
        sym, curves, sym_summary = _symmetry(
            gm,
            y,
            s2,
            fit,
            design,
            c,
            regions,
            questions,
            settings,
            plan,
            response,
            suffix,
            terms,
            model_df,
        )
        asym = _asymmetry(
            gm, y, s2, design, c, settings, atlas.midline_mm, backend, terms, model_df
        )
    else:
        not_assessed["symmetry"] = "no [questions] symmetry regions were named"
    return Answers(
        sym,
        curves,
        sym_summary,
        asym,
        spec,
        cons,
        loo,
        quality,
        tuple(notes),
        not_assessed=not_assessed,
        response=response,
        consistency_summary=cons_summary,
        artefact_flag=spec.flag if spec is not None else "",
    )


def answers_not_asked(
    plan,
    design,
    c,
    regions,
    questions,
    settings,
    gm=None,
    y=None,
    *,
    s2: np.ndarray | None = None,
    fit=None,
    runs: pd.DataFrame | None = None,
    terms: RandomTerms | None = None,
    model_df: ModelDf | None = None,
) -> Answers:
    """A contrast that is not a group mean.

    A difference is asked whether its lateralisation differs (with ``[questions]
    symmetry``), whether it is specific to the targets and whether it is consistent
    across animals (with ``[questions] targets``), and the quality of the runs of each
    of its sides (:mod:`grouplevel.questions.ask_differences`). These need the group map
    ``gm``, the runs' data ``y`` (and first-level variances ``s2``), the ``fit``, the
    runs table ``runs``, the model's random ``terms`` and, for the target's test, the
    map's degrees-of-freedom rule ``model_df(fit, present, c)`` (default: between-animal
    df). Whatever cannot be asked carries its reason. Any other contrast gets only the
    reasons.
    """
    if plan.kind.kind != DIFFERENCE:
        return Answers.not_asked(plan)
    terms = terms or RandomTerms()
    not_assessed: dict[str, str] = {}
    notes = (EXTENDED_NOTE,) if terms.extended else ()
    sides = difference_sides(design, runs, c) if runs is not None else None
    quality = None
    shell = None if gm is None else edge_shell(gm.mask, questions.edge_distance_voxels)
    if sides is None or fit is None or y is None or gm is None:
        not_assessed["run_quality"] = "the runs' data were not given to the questions"
    elif not sides.level or (sides.level == BETWEEN and not sides.two_groups):
        not_assessed["run_quality"] = (
            "the difference has no two sides of runs (two groups or two conditions) whose "
            "runs could be scored among themselves: " + sides.reason
        )
    else:
        quality = difference_run_quality(
            y,
            s2,
            fit,
            design,
            runs,
            sides,
            shell,
            questions.outlier_z,
            terms,
            settings.model.run_variance == "estimate" or s2 is None,
            loo_chunk=_loo_chunk(settings, y.shape[0], design.n_animals),
            chunk_rows=_row_chunk(settings.compute.memory_gb, y.shape[1], RUN_SCORE_ARRAYS),
        )
        if quality is None:
            not_assessed["run_quality"] = (
                "neither side of the difference has two runs to compare with each other"
            )
    if regions is None:
        reason = "the study has no [atlas], so no region can be asked about"
        not_assessed.update(symmetry=reason, specificity=reason, consistency=reason)
        return Answers.for_difference(plan, not_assessed, quality=quality, notes=notes)
    spec = response = cons = cons_summary = None
    if questions.targets and gm is not None and y is not None:
        method = settings.clusters.resolved_method(settings.inference)
        alpha = settings.inference.alpha
        surviving = surviving_voxels(gm, alpha)[method]
        response = map_response(surviving, gm.z, method, settings.inference.sided, alpha)
        spec = _target_specificity(
            gm,
            y,
            design,
            c,
            regions.atlas,
            surviving,
            shell,
            questions,
            terms,
            model_df,
            _row_chunk(settings.compute.memory_gb, y.shape[1], REGION_AVERAGE_ARRAYS),
        )
        if sides is None:
            not_assessed["consistency"] = "the runs table was not given to the questions"
        elif sides.reason:
            not_assessed["consistency"] = sides.reason
        else:
            values = target_values(
                y,
                design,
                regions.atlas,
                questions,
                _row_chunk(settings.compute.memory_gb, y.shape[1], REGION_AVERAGE_ARRAYS),
            )
            cons, why = difference_consistency(values, design, c, sides, terms, model_df)
            if cons is None:
                not_assessed["consistency"] = why
            else:
                suffix = _flag_suffix(spec)
                cons_summary = _difference_consistency_verdict(cons, response, suffix)
    else:
        reason = "no [questions] targets were named"
        not_assessed.update(specificity=reason, consistency=reason)
    table = summary = None
    if questions.symmetry:
        table, summary = lateralisation_differences(
            list(questions.symmetry),
            regions.atlas,
            region_values=regions.values,
            animal=design.animal,
            X=design.matrix,
            c=c,
            alpha=settings.inference.alpha,
            stimulus_side=questions.stimulus_side,
            terms=terms,
            model_df=model_df,
        )
        suffix = _flag_suffix(spec)
        if suffix:
            for entry in summary.values():
                if entry["numbers"]["larger_side"]:
                    entry["verdict"] += suffix
            table["verdict"] = [entry["verdict"] for entry in summary.values()]
    else:
        not_assessed["symmetry"] = "no [questions] symmetry regions were named"
    return Answers.for_difference(
        plan,
        not_assessed,
        table,
        summary,
        spec,
        response,
        consistency=cons,
        consistency_summary=cons_summary,
        quality=quality,
        notes=notes,
    )


#: What the consistency of a within-animal difference does not show (summary and report).
WITHIN_CAUTION = (
    "Each animal's difference is estimated from its own runs only (GLS over its runs and "
    "sessions, the fitted run and session variances taken as known), so its interval is "
    "wide with few runs; animals agreeing in sign does not show that the difference has "
    "the same size in every animal (see I²), and the target value averages the whole "
    "target region, not the surviving voxels."
)
#: What the overlap of two groups does not show.
BETWEEN_CAUTION = (
    "The overlap compares the animals' mean target values between the two groups; it "
    "does not show that every animal of one group differs from every animal of the "
    "other, nor why they differ, and with few animals per group its interval is wide. "
    "The target value averages the whole target region, not the surviving voxels."
)


def _difference_consistency_verdict(cons, response: dict, flag_suffix: str) -> dict:
    """The consistency verdict of a difference: animals' own differences (within
    animals) or the overlap of the two groups (between groups)."""
    if isinstance(cons, GroupOverlap):
        return _overlap_verdict(cons, response, flag_suffix)
    in_difference = np.isfinite(cons.animals["effect"].to_numpy(dtype=float))
    out = _consistency_verdict(cons, response, flag_suffix, in_difference)
    # the same rules as a mean's, in the words of a difference
    out["verdict"] = (
        out["verdict"]
        .replace("no response to be", "no difference to be")
        .replace("(negative response)", "(negative difference)")
    )
    het = cons.heterogeneity
    if np.isfinite(het.q):
        out["reasons"].append(
            f"heterogeneity of the animals' own differences: Cochran's Q = {het.q:.3g} on "
            f"{het.df} df (p = {het.p:.2g}), I² = {100 * het.i_squared:.0f}%"
        )
    if cons.not_estimable:
        out["reasons"].append(
            f"{len(cons.not_estimable)} animal(s) cannot estimate the difference from their "
            f"own runs (e.g. runs of one side only) and are not counted: "
            f"{', '.join(cons.not_estimable)}"
        )
    out["level"] = WITHIN
    out["caution"] = WITHIN_CAUTION
    return out


def _overlap_verdict(go: GroupOverlap, response: dict, flag_suffix: str) -> dict:
    """Sign-aware verdict on how much the two groups' animals overlap."""
    summary = go.summary()
    signs = response["signs"]
    if not signs:
        sign = ""
    elif len(signs) == 1:
        sign = signs[0]
    else:
        sign = "negative" if go.effect < 0 else "positive"
    plus, minus = go.names
    o = go.overlap
    # A read in the direction of the map's difference
    a_dir = o.a if sign != "negative" else 1.0 - o.a
    low = o.ci[0] if sign != "negative" else 1.0 - o.ci[1]
    s = -1.0 if sign == "negative" else 1.0
    if not sign:
        verdict = "no difference to be consistent about"
    elif not np.isfinite(go.effect) or s * go.effect <= 0:
        verdict = f"the groups do not differ in the target with the map's {sign} sign"
    elif o.separated:
        verdict = "the groups separate: no animal of one group falls among the other's"
    elif np.isfinite(low) and low > 0.5:
        verdict = f"the groups differ with some overlap (A = {a_dir:.2f})"
    else:
        verdict = f"the groups overlap (A = {a_dir:.2f})"
    if sign and flag_suffix:
        verdict += flag_suffix
    above = "above" if sign != "negative" else "below"
    reasons = [_response_sentence(response)]
    ci = (
        f"95% CI {o.ci[0]:.2f} to {o.ci[1]:.2f}"
        if np.isfinite(o.ci[0])
        else "no interval: the groups separate completely"
    )
    reasons.append(
        f"probability that an animal of {plus} has a larger target value than one of "
        f"{minus}: A = {o.a:.2f} ({ci}; Mann–Whitney p = {o.p:.2g}, {o.n_plus} vs "
        f"{o.n_minus} animals)"
    )
    for side in summary["groups"].values():
        if side["animals"]:
            reasons.append(
                f"{side['group']}: {side['animals']} animals, median target value "
                f"{side['median']:.3g} (range {side['min']:.3g} to {side['max']:.3g}), "
                f"{side['animals_positive']} positive"
            )
    if sign:
        reasons.append(f"the map's difference is {sign}: {plus} {above} {minus} is expected")
    reasons.append(
        f"target group difference {go.effect:.3g} (p = {go.p:.2g})"
        if np.isfinite(go.effect)
        else "no target group difference"
    )
    return {
        "verdict": verdict,
        "sign": sign,
        "reasons": reasons,
        "level": BETWEEN,
        "caution": BETWEEN_CAUTION,
        **summary,
    }


def _agreement_voxels(
    regions: RegionData | None, questions: QuestionSettings, surviving: np.ndarray, method: str
) -> tuple[np.ndarray | None, str]:
    """Where a run's agreement with the group map is measured, and that place in words.

    The targets when ``[questions] targets`` names them (chosen before the data were
    seen); else the voxels surviving the map's correction when there are at least
    :data:`MIN_AGREEMENT_VOXELS`; else the whole analysed brain.
    """
    if regions is not None and questions.targets:
        atlas = regions.atlas
        rows = asked_rows(atlas, questions.targets, questions.stimulus_side, "[questions] targets")
        share = np.asarray(atlas.shares[:, leaf_rows(atlas, rows)].sum(axis=1)).ravel()
        inside = share >= TARGET_SHARE
        if inside.sum() >= MIN_AGREEMENT_VOXELS:
            return inside, f"inside the targets ({', '.join(questions.targets)})"
    surviving = np.asarray(surviving, dtype=bool)
    if surviving.sum() >= MIN_AGREEMENT_VOXELS:
        return surviving, f"inside the voxels surviving {method}"
    return None, "the whole analysed brain (too few surviving voxels, no targets)"


def _run_quality(
    y, s2, design, runs, loo, shell, questions, in_mean, agreement, in_runs=None, memory_gb=None
) -> RunQuality:
    """Run quality among the runs of the animals whose mean is asked about.

    The robust z compares runs with each other; runs of another group (with another
    response) would make the runs of either group look unusual. For the mean of one
    level of a within-animal variable (the drug runs), ``in_runs`` keeps only that
    level's runs: the other runs show another response. ``agreement`` is
    :func:`_agreement_voxels`.
    """
    where_mask, where = agreement
    keep = np.asarray(in_mean, dtype=bool)[design.animal]
    if in_runs is not None:
        keep &= np.asarray(in_runs, dtype=bool)
    animals, codes = np.unique(design.animal[keep], return_inverse=True)
    every = animals.size == len(loo.effect)  # every animal: no copy of the maps
    return run_quality(
        y,
        s2,
        codes,
        runs[keep].reset_index(drop=True),
        loo.effect if every else loo.effect[animals],
        shell,
        threshold=questions.outlier_z,
        agreement=where_mask,
        agreement_where=where,
        rows=np.flatnonzero(keep),
        chunk_rows=_row_chunk(memory_gb, y.shape[1], RUN_SCORE_ARRAYS),
    )


def _target_specificity(
    gm, y, design, c, atlas, surviving, shell, questions, terms=None, model_df=None, rows_chunk=None
) -> Specificity:
    """Specificity of the surviving voxels for the (possibly one-sided) targets."""
    rows = asked_rows(atlas, questions.targets, questions.stimulus_side, "[questions] targets")
    height = (np.argwhere(gm.mask) @ gm.grid.affine[:3, :3].T + gm.grid.affine[:3, 3])[:, 2]
    return specificity(
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
        terms=terms,
        model_df=model_df,
        chunk_rows=rows_chunk,
    )


def _specificity_and_consistency(
    gm, y, design, c, atlas, surviving, shell, questions, terms, model_df=None, memory_gb=None
):
    """Specificity of the surviving voxels and consistency of the target effect."""
    rows_chunk = _row_chunk(memory_gb, y.shape[1], REGION_AVERAGE_ARRAYS)
    spec = _target_specificity(
        gm, y, design, c, atlas, surviving, shell, questions, terms, model_df, rows_chunk
    )
    rows = asked_rows(atlas, questions.targets, questions.stimulus_side, "[questions] targets")
    leaves = leaf_rows(atlas, rows)
    weights = sp.csr_matrix(np.asarray(atlas.shares[:, leaves].sum(axis=1)))
    target_values, _ = region_values(y, np.isfinite(y), weights, chunk_rows=rows_chunk)
    cons = consistency(
        target_values[:, 0],
        None,
        design.matrix,
        design.animal,
        design.animal_ids,
        c,
        estimate_run_variance=True,
        terms=terms,
        model_df=model_df,
    )
    return spec, cons


def _symmetry(
    gm,
    y,
    s2,
    fit,
    design,
    c,
    regions,
    questions,
    settings,
    plan,
    response,
    suffix,
    terms=None,
    model_df=None,
):
    """Symmetry of each named region pair, counted with the map's response signs."""
    alpha = settings.inference.alpha
    results = analyse_symmetry(
        list(questions.symmetry),
        regions.atlas,
        y=y,
        present=np.isfinite(y),
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
        sided=settings.inference.sided,
        signs=response["signs"],
        X=design.matrix,
        c=c,
        bootstrap_animals=plan.animals,
        terms=terms,
        model_df=model_df,
        memory_gb=settings.compute.memory_gb,
    )
    table = symmetry_table(results)
    summary = {}
    labels = []
    for r in results:
        detail = r.summary()
        verdict = detail["verdict"]
        label = verdict["label"]
        reasons = [_response_sentence(response), *verdict["reasons"]]
        if suffix and verdict["sign"]:
            label += suffix
        named = split_side(r.region)[1]
        if named:
            reasons.append(
                f"The region was named with the {named} side; symmetry compares both sides "
                "of the structure"
            )
        labels.append(label)
        summary[r.region] = {
            "verdict": label,
            "side": verdict["side"],
            "sign": verdict["sign"],
            "reasons": reasons,
            **{k: v for k, v in detail.items() if k != "verdict"},
            "numbers": verdict["numbers"],
        }
    table["verdict"] = labels
    return table, li_curves(results), summary
