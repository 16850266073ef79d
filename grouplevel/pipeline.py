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
import re
import secrets
import shutil
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from grouplevel import __version__
from grouplevel.anatomy.regions import RegionModel
from grouplevel.anatomy.tables import RegionData, region_data, region_tables, surviving_voxels
from grouplevel.distributions import f_median
from grouplevel.errors import ArgumentError, UserError
from grouplevel.inference import Smoothness, estimate_smoothness, fdr
from grouplevel.inference.permutation import (
    AnimalLevelData,
    animal_effect_data,
    animal_level_data,
    permutation_test,
)
from grouplevel.inference.significance import sided_p
from grouplevel.inference.vector_flips import (
    AnimalEffectVectors,
    animal_effect_vectors,
    vector_flip_test,
)
from grouplevel.intake.description import design_description
from grouplevel.intake.design import (
    CONTRAST_ANIMAL,
    CONTRAST_SLOPE,
    CONTRAST_SLOPES,
    Design,
    GroupFTest,
    RandomEffects,
    animal_design,
    contrast_kind,
    describe_random_effects,
    ftest_permutation_refusal,
    own_effect_rows,
    slope_design,
    weights_dict,
)
from grouplevel.intake.images import Grid, headers_read_once, write_map
from grouplevel.intake.settings import DEFAULT_CONTRAST_NAME, InferenceSettings, Settings
from grouplevel.intake.study import FirstLevel, Study, load_runs, load_study
from grouplevel.model import (
    between_animal_df,
    satterthwaite_df,
    test_contrast,
)
from grouplevel.model.contrasts import session_df, slope_df
from grouplevel.model.ftest import test_f
from grouplevel.model.marginal import RandomTerms, marginal_run_variance
from grouplevel.model.memory import REGION_AVERAGE_ARRAYS, chunk_rows, chunk_voxels, voxel_chunks
from grouplevel.outputs.animal_maps import (
    RUN_VALUES_MAX,
    animal_maps_summary,
    write_animal_maps,
)
from grouplevel.outputs.files import parallel_saves
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
    comparison_note,
    question_plan,
    skipped_warning,
)
from grouplevel.questions.means import DIFFERENCE
from grouplevel.questions.sides import asked_region
from grouplevel.questions.specificity import leaf_rows
from grouplevel.results.compute import Backend, fit_design, open_backend, random_terms
from grouplevel.results.correction import permutation_arguments
from grouplevel.results.maps import (
    FTEST_MAP_DESCRIPTIONS,
    MAP_DESCRIPTIONS,
    AnimalEffects,
    Corrected,
    FTestMap,
    GroupMap,
)
from grouplevel.timing import StepClock

# Variance components written on top of var_animal and var_run (general model only):
# component-name pattern -> (file stem, header description). ``{0}`` is the slope or
# group name made safe for a file name.
_COMPONENT_FILES = (
    (r"animal\[(.+)\]", "var_animal_{0}", "between-animal variance of group {1} (REML)"),
    (r"slope\[(.+)\]\[(.+)\]", "var_slope_{0}_{2}", "variance of the {1} slope, group {3}"),
    (r"slope\[(.+)\]", "var_slope_{0}", "between-animal variance of the {1} slope (REML)"),
    (r"cov\[(.+)\]\[(.+)\]", "cov_{0}_{2}", "covariance of animal intercept/slope {1}, group {3}"),
    (r"cov\[(.+)\]", "cov_{0}", "covariance of the animal intercept and the {1} slope (REML)"),
    (r"session", "var_session", "between-session variance within animals omega^2 (REML)"),
)

# Variance groups: a warning when, without [model] variance_groups, the groups of an
# animal-level factor differ this much in their spread of per-animal means (median over
# fitted voxels of the ratio of the groups' sample variances, divided by the median of
# the F distribution it follows when they are equal; our own choice of threshold).
VARIANCE_RATIO_WARNING = 1.5


def safe_stem(name: str) -> str:
    """A component, slope or group name made safe for a file name."""
    return re.sub(r"[^A-Za-z0-9.-]+", "_", name).strip("_.") or "unnamed"


def component_files(components: dict[str, np.ndarray]) -> dict[str, tuple[str, str]]:
    """File stem and header description of every component beyond animal and run."""
    out = {}
    for name in components:
        if name in ("animal", "run"):
            continue
        for pattern, stem, what in _COMPONENT_FILES:
            match = re.fullmatch(pattern, name)
            if match:
                groups = match.groups()
                args = [x for g in groups for x in (safe_stem(g), g)]
                out[name] = (stem.format(*args), what.format(*args))
                break
        else:
            out[name] = (f"var_{safe_stem(name)}", f"variance component {name} (REML)")
    return out


# Runs used for the residual smoothness estimate: at most this many, evenly spread, so
# that its full-grid float64 copies stay small on large studies (our own choice; 30 maps
# already estimate the FWHM within a few percent, see tests/test_smoothness.py).
SMOOTHNESS_MAX_RUNS = 32
# voxels standardised together when no budget is given (the run passes its own)
_SMOOTHNESS_CHUNK = 65536


def _smoothness(
    y,
    variance,
    fit,
    X,
    animal,
    terms: RandomTerms,
    mask: np.ndarray,
    grid: Grid,
    chunk: int = _SMOOTHNESS_CHUNK,
) -> Smoothness | None:
    """Residual smoothness from standardised residuals (Kiebel et al. 1999).

    Each run's residual is divided by its marginal standard deviation under the model
    that was fitted (random slopes, session and group variances included:
    :func:`grouplevel.model.marginal.marginal_run_variance`), ``chunk`` voxels at a time.
    """
    n_runs, n_vox = y.shape
    dof_all = n_runs - np.linalg.matrix_rank(X)
    if dof_all <= 1:
        return None
    runs = np.unique(np.linspace(0, n_runs - 1, min(n_runs, SMOOTHNESS_MAX_RUNS)).round())
    runs = runs.astype(int)
    standard = np.zeros((runs.size, n_vox), dtype=np.float32)
    for sl in voxel_chunks(n_vox, chunk):
        resid = np.asarray(y[runs, sl], dtype=float) - X[runs] @ fit.beta[sl].T
        components = {k: np.asarray(v)[sl] for k, v in _components(fit).items()}
        s2 = None if variance is None else variance[:, sl]
        total = marginal_run_variance(components, X, animal, terms, s2)[runs]
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
    variance_groups: np.ndarray | None = None,
    f_p: np.ndarray | None = None,
    permute: bool = True,
) -> Corrected:
    """FDR and permutation inference of one contrast (``t``), or of an F-test when its
    upper-tail ``f_p`` is given (``c`` then holds its rows; the side is the upper tail).
    ``animal_data`` as :class:`AnimalEffectVectors` (an F-test of several random slopes)
    flips each animal's vector of own effects (``c`` is then not used)."""
    inf: InferenceSettings = study.settings.inference
    f_test = f_p is not None
    sided = "positive" if f_test else inf.sided
    p_sided = f_p if f_test else sided_p(t, df, inf.sided)
    q = fdr(p_sided, alpha=inf.alpha, method=inf.fdr)
    warnings: list[str] = []
    perm = None
    if inf.permutations > 0 and permute:
        rng = np.random.default_rng(inf.seed)
        bar = Progress(f"permutations {label}", "permutations", quiet=quiet)
        arguments = permutation_arguments(
            inf, voxel_volume_mm3=study.grid.voxel_volume, backend=backend, sided=sided
        )
        if isinstance(animal_data, AnimalEffectVectors):
            perm = vector_flip_test(
                animal_data,
                df,
                mask,
                rng=rng,
                progress=bar.update,
                variance_groups=variance_groups,
                **arguments,
            )
        else:
            perm = permutation_test(
                animal_data,
                c,
                df,
                mask,
                rng=rng,
                progress=bar.update,
                variance_groups=variance_groups,
                f_test=f_test,
                **arguments,
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
        sided=sided,
        p_sided=p_sided,
        fdr=q,
        smoothness=smooth,
        permutation=perm,
        warnings=tuple(warnings),
    )


def _components(fit) -> dict[str, np.ndarray]:
    """The fit's variance components by name (both fit types)."""
    comps = getattr(fit, "components", None)
    if comps is not None:
        return dict(comps)
    return {"animal": fit.var_animal, "run": fit.var_run}


def _pooled_var_animal(fit, random: RandomEffects) -> np.ndarray:
    """The between-animal intercept variance; with variance groups the animal-weighted
    mean of the groups' variances (each group's own is written as its own map)."""
    if random.animal_group is None:
        return fit.var_animal
    counts = np.bincount(random.animal_group, minlength=len(random.group_names))
    total = np.zeros_like(fit.var_animal)
    for g, name in enumerate(random.group_names):
        total = total + counts[g] * fit.components[f"animal[{name}]"]
    return total / counts.sum()


def _target_variance(
    fit, design: Design, random: RandomEffects, slope: int | None, group=None, weights=None
):
    """Between-animal variance of the animals' intercepts (slope None), of a slope, or
    of a combination of slopes (``weights``, one per slope; one variance group only)."""
    comps = _components(fit)
    if weights is not None:
        names = [design.columns[j] for j in random.slope_columns]
        total = np.zeros_like(fit.var_run)
        for i, a in enumerate(names):
            for k, b in enumerate(names):
                key = f"slope[{a}]" if i == k else f"cov[{a},{b}]"
                if i != k and key not in comps:
                    key = f"cov[{b},{a}]"
                if key in comps:
                    total = total + weights[i] * weights[k] * comps[key]
        return np.maximum(total, 0.0)
    suffix = "" if group is None else f"[{group}]"
    if slope is None:
        if random.animal_group is not None and group is None:
            return _pooled_var_animal(fit, random)
        return comps[f"animal{suffix}"]
    name = design.columns[random.slope_columns[slope]]
    if random.animal_group is not None and group is None:
        counts = np.bincount(random.animal_group, minlength=len(random.group_names))
        parts = [counts[g] * comps[f"slope[{name}][{n}]"] for g, n in enumerate(random.group_names)]
        return sum(parts) / counts.sum()
    return comps[f"slope[{name}]{suffix}"]


def _reduced_data(
    y, s2, fit, design: Design, random: RandomEffects, c: np.ndarray
) -> tuple[AnimalLevelData, np.ndarray, np.ndarray]:
    """One value per animal and voxel for the level contrast ``c`` tests, the contrast on
    the reduced design, and which animals take part (those with information on the
    target at some voxel).

    An animal-level contrast reduces each animal to its own intercept, a contrast of one
    random slope to the animal's own slope (with the slope's animal-level design), a
    combination of slopes to the animal's own combination of them. The
    random-intercept model without run-level columns keeps the exact reduction to
    precision-weighted animal means (:func:`animal_level_data`).
    """
    comps = _components(fit)
    if not random.extended and design.animal_level.all():
        data = animal_level_data(
            y, s2, design.matrix, design.animal, fit.var_run, fit.var_animal, design.columns
        )
        return data, c, np.ones(design.n_animals, dtype=bool)
    kind, slope = contrast_kind(design, random, c)
    within = design.within
    nuisance = [j for j in np.flatnonzero(within) if not random.terms or random.terms[j] is None]
    offset = None
    if nuisance:
        offset = design.matrix[:, nuisance] @ fit.beta[:, nuisance].T
    weights = None
    if kind == CONTRAST_SLOPE:
        G, columns = slope_design(design, random, slope)
        target: int | np.ndarray = 1 + slope
        c_reduced = c[columns]
    elif kind == CONTRAST_SLOPES:
        weights = np.array([c[j] for j in random.slope_columns])
        target = np.concatenate([[0.0], weights])
        G, c_reduced = np.ones((design.n_animals, 1)), np.ones(1)
    else:  # animal-level (check refuses the other kinds for permutations)
        columns = [j for j in range(len(design.columns)) if not within[j]]
        G = animal_design(design)[:, columns]
        target, c_reduced = 0, c[columns]
    data = animal_effect_data(
        y,
        s2,
        design.matrix[:, list(random.slope_columns)],
        target,
        design.animal,
        G,
        fit.var_run,
        _target_variance(fit, design, random, slope, weights=weights),
        session=design.session if random.sessions else None,
        var_session=comps.get("session"),
        offset=offset,
    )
    # an animal with no information on the target anywhere (e.g. only vehicle runs for
    # a drug effect) takes no part in the rearrangements: flipping it changes nothing,
    # and counting it would double the number of distinct ones
    informative = (data.precision > 0).any(axis=0)
    if not informative.all():
        data = replace(
            data,
            mean=np.ascontiguousarray(data.mean[:, informative]),
            precision=np.ascontiguousarray(data.precision[:, informative]),
            design=data.design[informative],
        )
    return data, c_reduced, informative


def _effect_vectors(
    y, s2, fit, design: Design, random: RandomEffects, weights: np.ndarray
) -> tuple[AnimalEffectVectors, np.ndarray]:
    """Each animal's own estimates of the rows of an F-test on several random slopes
    (its vector of own effects), and which animals take part (those that estimate every
    row at some voxel). Within-animal columns without a random slope are removed first
    at their fitted values, as :func:`_reduced_data` does."""
    within = design.within
    nuisance = [j for j in np.flatnonzero(within) if not random.terms or random.terms[j] is None]
    offset = None
    if nuisance:
        offset = design.matrix[:, nuisance] @ fit.beta[:, nuisance].T
    data = animal_effect_vectors(
        y,
        s2,
        design.matrix[:, list(random.slope_columns)],
        own_effect_rows(random, weights),
        design.animal,
        fit.var_run,
        session=design.session if random.sessions else None,
        var_session=_components(fit).get("session"),
        offset=offset,
    )
    # an animal without every condition the rows need takes no part (as for one slope)
    taking_part = data.valid.any(axis=0)
    return data.animals(taking_part), taking_part


def _unsloped_df(
    design: Design, random: RandomEffects, present: np.ndarray, c: np.ndarray
) -> np.ndarray:
    """Containment df of a contrast whose within-animal columns have no random slope.

    With a session level fitted, columns constant within sessions (drug one day,
    vehicle another) are judged against the sessions within animals
    (:func:`~grouplevel.model.contrasts.session_df`), together with the animal-level
    part of the contrast when it has one; otherwise the run-level rule of
    :func:`~grouplevel.model.contrasts.between_animal_df` applies.
    """
    c = np.asarray(c, dtype=float)
    weighted = np.flatnonzero(c != 0)
    free = [
        j for j in weighted if design.within[j] and (not random.terms or random.terms[j] is None)
    ]
    if not (random.sessions and free and all(design.level[j] == "session" for j in free)):
        return between_animal_df(design.matrix, design.animal, present, c)
    on_sessions = np.where(np.isin(np.arange(c.size), free), c, 0.0)
    df = session_df(design.matrix, design.animal, design.session, present, on_sessions)
    animal_part = np.where(design.within, 0.0, c)
    if animal_part.any():
        df = np.minimum(df, between_animal_df(design.matrix, design.animal, present, animal_part))
    return df


def _contrast_df(
    study: Study, fl: FirstLevel, fit, present: np.ndarray, c: np.ndarray
) -> np.ndarray:
    """Degrees of freedom of one contrast at every voxel (docs/model.md, df rule)."""
    design, random = fl.design, fl.random
    if study.settings.model.df == "satterthwaite":
        if random.extended:
            from grouplevel.model.mixed import mixed_satterthwaite_df

            return mixed_satterthwaite_df(fit, c)
        return satterthwaite_df(fit, c)
    kind, slope = contrast_kind(design, random, c)
    if kind == CONTRAST_SLOPE:
        G, _ = slope_design(design, random, slope)
        df = slope_df(design.matrix, design.animal, present, random.slope_columns[slope], G)
    elif kind == CONTRAST_SLOPES:
        # the smallest between-animal df of the slopes combined
        ones = np.ones((design.n_animals, 1))
        df = np.min(
            [
                slope_df(design.matrix, design.animal, present, col, ones)
                for col, weight in ((k, c[k]) for k in random.slope_columns)
                if weight != 0
            ],
            axis=0,
        )
    else:
        df = _unsloped_df(design, random, present, c)
        if kind != CONTRAST_ANIMAL and random.slope_columns:
            # mixed levels: the smaller df of the animal-level part and of each slope
            for i in range(len(random.slope_columns)):
                G, _ = slope_design(design, random, i)
                df = np.minimum(
                    df,
                    slope_df(design.matrix, design.animal, present, random.slope_columns[i], G),
                )
    if random.animal_group is not None:
        # one between-animal variance per group: Welch–Satterthwaite df, each group's
        # share of the contrast's variance judged against that group's own animals;
        # never above the between-animal rule
        from grouplevel.model.mixed import group_welch_df

        welch = group_welch_df(fit, c, design.matrix, design.animal, random.animal_group)
        df = np.where(np.isfinite(welch), np.minimum(welch, df), df)
    return df


def _group_variance_warning(
    label: str, fl: FirstLevel, animal_data: Callable[[], AnimalLevelData]
) -> str | None:
    """Caution when the groups of an animal-level factor look unequally variable.

    The rule (docs/model.md): for every animal-level text variable of the formula with
    two or more animals per level, the per-voxel ratio of two groups' sample variances
    of the per-animal estimates is divided by the median of the F distribution it
    follows when the groups are equally variable; the median of that over fitted voxels
    beyond ``VARIANCE_RATIO_WARNING`` (or below its inverse) gives the warning.
    """
    design, random = fl.design, fl.random
    if random.variance_groups is not None:
        return None
    runs = fl.runs
    first = np.array([np.flatnonzero(design.animal == a)[0] for a in range(design.n_animals)])
    factors = {}
    for var in sorted(
        {v for j in np.flatnonzero(design.animal_level) for v in design.column_variables[j]}
    ):
        if var not in runs.columns or pd.api.types.is_numeric_dtype(runs[var]):
            continue
        level = runs[var].astype(str).to_numpy()[first]
        names = sorted(set(level))
        if len(names) >= 2 and min((level == n).sum() for n in names) >= 2:
            factors[var] = (level, names)
    if not factors:
        return None
    data, taking_part = animal_data()
    worst = None
    for var, (level, names) in factors.items():
        spread = {}
        for n in names:
            sel = (level == n)[taking_part]
            values = np.where(data.precision[:, sel] > 0, data.mean[:, sel], np.nan)
            spread[n] = (np.nanvar(values, axis=1, ddof=1), int(sel.sum()) - 1)
        for i, a in enumerate(names):
            for b in names[i + 1 :]:
                (va, da), (vb, db) = spread[a], spread[b]
                with np.errstate(divide="ignore", invalid="ignore"):
                    ratio = va / vb
                ratio = ratio[np.isfinite(ratio) & (ratio > 0)]
                if not ratio.size:
                    continue
                score = float(np.median(ratio) / f_median(da, db))
                big = max(score, 1.0 / score)
                if big >= VARIANCE_RATIO_WARNING and (worst is None or big > worst[0]):
                    more, less = (a, b) if score > 1 else (b, a)
                    worst = (big, var, more, less)
    if worst is None:
        return None
    big, var, more, less = worst
    return (
        f"{label}: animals of {var} = {more} differ from each other about {big:.1f} times "
        f"as much as animals of {var} = {less} (median over voxels of the ratio of the "
        "groups' variances of per-animal estimates, against its value for equal "
        "variances); one between-animal variance for all animals then gives wrong p-values "
        f'for group comparisons. Consider [model] variance_groups = "{var}"'
    )


@dataclass(frozen=True)
class _FittedLevel:
    """One first-level contrast's fitted model and what all its group contrasts share."""

    fl: FirstLevel
    label: str  # the first-level contrast in messages
    y: np.ndarray  # (runs, fitted voxels) effects
    s2: np.ndarray | None  # (runs, fitted voxels) first-level variances, or None
    mask: np.ndarray  # the fitted voxels (3-D bool)
    fit: Any
    not_converged: int  # fitted voxels where REML stopped at the iteration limit
    described: str  # the random effects, in words
    present: np.ndarray  # (runs, fitted voxels): where a run has data
    components: dict[str, np.ndarray]
    var_animal: np.ndarray
    smooth: Smoothness | None
    # the animal-level data of each level tested (see reduced_for), computed once
    reduced: dict[tuple, tuple[AnimalLevelData, np.ndarray, np.ndarray]] = field(
        default_factory=dict
    )
    # each animal's own estimates per level tested (see animal_effects_for): made once
    # and shared by every contrast of that level, since they are animals × voxels
    # arrays held until the maps are written
    animal_effects: dict[tuple, AnimalEffects | None] = field(default_factory=dict)

    def _reduced_key(self, c: np.ndarray) -> tuple:
        # the reduced data depend on the level tested; the reduced contrast on c itself
        kind, slope = contrast_kind(self.fl.design, self.fl.random, c)
        return (kind, slope, tuple(c))

    def reduced_for(self, c: np.ndarray) -> tuple[AnimalLevelData, np.ndarray, np.ndarray]:
        """:func:`_reduced_data` for contrast ``c``, shared by contrasts of one level."""
        key = self._reduced_key(c)
        if key not in self.reduced:
            design, random = self.fl.design, self.fl.random
            self.reduced[key] = _reduced_data(self.y, self.s2, self.fit, design, random, c)
        return self.reduced[key]

    def animal_effects_for(self, c: np.ndarray, memory_gb: float) -> AnimalEffects | None:
        """:func:`_animal_effects` of contrast ``c``, one object for every contrast whose
        animals' own estimates are the same numbers.

        They depend on the level ``c`` tests (and, for a combination of slopes, on its
        weights on the slopes), not on the contrast on that level: the three group
        means, their differences and the mean over groups of a group factor all
        rearrange each animal's own intercept.
        """
        design, random = self.fl.design, self.fl.random
        kind, slope = contrast_kind(design, random, c)
        weights = None
        if kind == CONTRAST_SLOPES:
            weights = tuple(float(c[j]) for j in random.slope_columns)
        key = (kind, slope, weights)
        if key not in self.animal_effects:
            self.animal_effects[key] = _animal_effects(self, c, memory_gb)
        return self.animal_effects[key]

    def keep_reduced(self, still_needed: list[np.ndarray]) -> None:
        """Forget the reduced data no contrast in ``still_needed`` uses (they are
        animals × voxels arrays; the questions need the memory)."""
        keep = {self._reduced_key(c) for c in still_needed}
        for key in [k for k in self.reduced if k not in keep]:
            del self.reduced[key]


def _fit_first_level(
    study: Study,
    fl: FirstLevel,
    log: Callable[[str], None],
    quiet: bool = True,
    backend: Backend | None = None,
    clock: StepClock | None = None,
    emit: Callable[[GroupMap | FTestMap], None] | None = None,
) -> tuple[list[GroupMap | FTestMap], list[str]]:
    """Fit one first-level contrast and test its group contrasts and F-tests.

    Each finished map goes to ``emit`` as soon as its questions are answered (and is not
    kept here: its arrays can go once ``emit`` has written them); without ``emit`` the
    maps are returned.
    """
    warnings: list[str] = []
    results: list[GroupMap | FTestMap] = []
    emit = emit or results.append
    label = fl.name or "the study"
    clock = clock or StepClock()
    start = time.perf_counter()
    with clock.step("read maps"):
        y, s2, mask = _fitted_voxels(study, fl, label, warnings)
    # what the permutations of the contrasts and of the F-tests may reduce the data for
    later = [c for _, c in fl.contrasts] + [np.abs(ft.weights).sum(axis=0) for ft in fl.ftests]
    with clock.step("fit"):
        fitted = _fit(study, fl, label, y, s2, mask, log, backend, warnings)
        group_note = _variance_group_note(fitted)
        # the note's animal-level data (animals × voxels arrays) are kept only when a
        # contrast reduces the data in the same way; else the first test needs the memory
        fitted.keep_reduced(later)
    if group_note:
        warnings.append(group_note)
    with clock.step("regions"):
        regions = _region_data(study, fitted)
    for i, (cname, c) in enumerate(fl.contrasts):
        with clock.step("test and correct"):
            gm = _test_and_correct(study, fitted, cname, c, quiet, backend, warnings)
            effects = fitted.animal_effects_for(c, study.settings.compute.memory_gb)
            gm = replace(gm, animal_effects=effects)
        with clock.step("regions"):
            if regions is not None:
                model = _region_model(study, fl, c)
                tables = region_tables(gm, regions, fl.design, c, study.settings, model=model)
                gm = replace(gm, tables=tables)
        fitted.keep_reduced(later[i + 1 :])
        with clock.step("questions"):
            gm = _with_answers(study, fitted, gm, c, regions, log, backend)
        emit(gm)
        del gm  # written (or kept by the caller): its arrays are not held here
    for ft in fl.ftests:
        with clock.step("test and correct"):
            fm = _test_ftest(study, fitted, ft, quiet, backend, warnings)
        emit(fm)
        del fm
    log(f"  done in {time.perf_counter() - start:.1f} s")
    return results, warnings


def _run_label(session: Any, run: Any) -> str:
    """A run as the runs table names it: ``"session 1, run 2"`` (``"run 2"`` without one)."""
    session = "" if session is None or pd.isna(session) else str(session).strip()
    return f"session {session}, run {run}" if session else f"run {run}"


def _run_labels(runs: pd.DataFrame, animal_ids) -> tuple[tuple[str, ...], ...]:
    """The labels of each animal's included runs, in the order of ``animal_ids``."""
    by_animal = runs["animal"].astype(str)
    return tuple(
        tuple(
            _run_label(row.get("session"), row.get("run"))
            for _, row in runs[by_animal == str(animal)].iterrows()
        )
        for animal in animal_ids
    )


def _animal_effects(fitted: _FittedLevel, c: np.ndarray, memory_gb: float) -> AnimalEffects | None:
    """Each animal's own estimate of what ``c`` tests at every voxel (the data the
    permutation test rearranges), or None for a contrast without one (a within-animal
    column without a random slope, or a mix of levels)."""
    design, random = fitted.fl.design, fitted.fl.random
    kind, slope = contrast_kind(design, random, c)
    if kind not in (CONTRAST_ANIMAL, CONTRAST_SLOPE, CONTRAST_SLOPES):
        return None
    try:
        data, _, taking_part = fitted.reduced_for(c)
    except ArgumentError:  # e.g. run-level columns: no per-animal reduction exists
        return None
    n_voxels = fitted.y.shape[1]
    # float32 and int16, as written: m × voxels of each is held until the write step;
    # filled a chunk of voxels at a time so that no float64 m × voxels copy is made
    effect = np.full((design.n_animals, n_voxels), np.nan, dtype=np.float32)
    se = np.full_like(effect, np.nan)
    chunk = chunk_voxels(design.n_animals, memory_gb)
    for sl in voxel_chunks(n_voxels, chunk):
        precision, mean = data.precision[sl].T, data.mean[sl].T
        with np.errstate(divide="ignore"):
            effect[taking_part, sl] = np.where(precision > 0, mean, np.nan)
            se[taking_part, sl] = np.where(precision > 0, 1.0 / np.sqrt(precision), np.nan)
    runs = np.zeros((design.n_animals, n_voxels), dtype=np.int16)
    for a in range(design.n_animals):  # a loop over animals: no float copy of presence
        runs[a] = fitted.present[design.animal == a].sum(axis=0)
    if kind == CONTRAST_ANIMAL and not random.extended and design.animal_level.all():
        what = "each animal's precision-weighted mean of its runs (σ² of the fit held fixed)"
    elif kind == CONTRAST_ANIMAL:
        what = "each animal's own intercept, estimated by GLS from its runs"
    elif kind == CONTRAST_SLOPE:
        what = f"each animal's own {design.columns[random.slope_columns[slope]]} slope (GLS)"
    else:
        what = "each animal's own combination of its slopes (GLS)"
    return AnimalEffects(
        animals=tuple(str(a) for a in design.animal_ids),
        effect=effect,
        se=se,
        runs=runs,
        run_labels=_run_labels(fitted.fl.runs, design.animal_ids),
        what=what,
        run_values=_run_values(fitted, design.animal_ids),
    )


def _run_values(fitted: _FittedLevel, animal_ids) -> np.ndarray | None:
    """The runs' values behind the per-animal estimates, grouped by animal (the order
    of :func:`_run_labels`), or None above :data:`RUN_VALUES_MAX` values."""
    if fitted.y.size > RUN_VALUES_MAX:
        return None
    by_animal = fitted.fl.runs["animal"].astype(str).to_numpy()
    order = np.concatenate([np.flatnonzero(by_animal == str(a)) for a in animal_ids])
    return np.where(fitted.present, fitted.y, np.nan)[order].astype(np.float32)


def _fitted_voxels(
    study: Study, fl: FirstLevel, label: str, warnings: list[str]
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """The runs' effects and variances at the voxels that can be fitted, and their mask.

    Without first-level variances a voxel whose runs all hold the same value is left out.
    """
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
    return y, s2, mask


def _presence(y: np.ndarray, s2: np.ndarray | None, chunk: int) -> np.ndarray:
    """Where each run has data (runs × voxels, bool): finite effect and variance.

    Maps without a missing value (the usual case) get a read-only all-true view that
    takes no memory (a runs × voxels bool array is 0.2 GB at 10^6 voxels × 200 runs);
    the check reads the maps one chunk of voxels at a time.
    """
    complete = all(
        np.isfinite(y[:, sl]).all() and (s2 is None or np.isfinite(s2[:, sl]).all())
        for sl in voxel_chunks(y.shape[1], chunk)
    )
    if complete:
        return np.broadcast_to(np.True_, y.shape)
    present = np.isfinite(y)
    if s2 is not None:
        present &= np.isfinite(s2)
    return present


def _fit(
    study: Study,
    fl: FirstLevel,
    label: str,
    y: np.ndarray,
    s2: np.ndarray | None,
    mask: np.ndarray,
    log: Callable[[str], None],
    backend: Backend | None,
    warnings: list[str],
) -> _FittedLevel:
    """Fit the mixed model at every voxel; warn of voxels not converged or not fitted."""
    settings = study.settings
    design, random = fl.design, fl.random
    described = describe_random_effects(design, random)
    log(
        f"fitting {label}: {y.shape[1]:,} voxels, {y.shape[0]} runs, {design.n_animals} "
        f"animals; {described}"
    )
    fit = fit_design(
        backend or Backend(kind="local"),
        y,
        s2,
        design,
        random,
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
    present = _presence(y, s2, chunk_voxels(y.shape[0], settings.compute.memory_gb))
    return _FittedLevel(
        fl=fl,
        label=label,
        y=y,
        s2=s2,
        mask=mask,
        fit=fit,
        not_converged=not_converged,
        described=described,
        present=present,
        components=_components(fit),
        var_animal=_pooled_var_animal(fit, random),
        smooth=_smoothness(
            y,
            s2,
            fit,
            design.matrix,
            design.animal,
            random_terms(design, random),
            mask,
            study.grid,
            chunk_voxels(y.shape[0], settings.compute.memory_gb),
        ),
    )


def _variance_group_note(fitted: _FittedLevel) -> str | None:
    """:func:`_group_variance_warning` on the animals' own intercepts, when the design
    has an animal-level column."""
    design = fitted.fl.design
    animal_columns = np.flatnonzero(~design.within)
    if not animal_columns.size:
        return None
    # the animals' own intercepts (the reduction of any animal-level contrast)
    on_animal = np.zeros(len(design.columns))
    on_animal[animal_columns[0]] = 1.0
    return _group_variance_warning(
        fitted.label, fitted.fl, lambda: fitted.reduced_for(on_animal)[::2]
    )


def _region_model(study: Study, fl: FirstLevel, c: np.ndarray) -> RegionModel | None:
    """The voxel model's random effects and df rule for the region averages, or None
    for the run-within-animal model (regions.tsv then uses its own default)."""
    design, random, settings = fl.design, fl.random, study.settings
    if not random.extended:
        return None

    def fit(values: np.ndarray, variances: np.ndarray | None):
        return fit_design(
            Backend(kind="local"),
            values,
            variances,
            design,
            random,
            estimate_run_variance=settings.model.run_variance == "estimate",
            max_iter=settings.model.max_iter,
            memory_gb=settings.compute.memory_gb,
        )

    def df(fitted, present: np.ndarray) -> np.ndarray:
        return _contrast_df(study, fl, fitted, present, c)

    names = ["session"] if random.sessions else []
    names += [f"slope[{design.columns[j]}]" for j in random.slope_columns]
    if random.animal_group is not None:
        names = [f"animal[{g}]" for g in random.group_names] + [
            f"{n}[{g}]" if n.startswith("slope[") else n
            for n in names
            for g in (random.group_names if n.startswith("slope[") else [None])
        ]
    files = component_files(dict.fromkeys(names))
    return RegionModel(fit=fit, df=df, columns={n: files[n][0] for n in names})


def _region_data(study: Study, fitted: _FittedLevel) -> RegionData | None:
    """Every run averaged over every atlas region, or None without an atlas."""
    if study.atlas is None:
        return None
    return region_data(
        study.atlas,
        study.atlas_mask,
        fitted.mask,
        fitted.y,
        fitted.s2,
        study.settings.model.run_variance == "estimate",
        chunk_rows=chunk_rows(
            fitted.y.shape[1], study.settings.compute.memory_gb, REGION_AVERAGE_ARRAYS
        ),
    )


def _test_and_correct(
    study: Study,
    fitted: _FittedLevel,
    cname: str,
    c: np.ndarray,
    quiet: bool,
    backend: Backend | None,
    warnings: list[str],
) -> GroupMap:
    """Test group contrast ``c`` at every fitted voxel and correct for the many voxels."""
    fl, fit = fitted.fl, fitted.fit
    design, random = fl.design, fl.random
    df = _contrast_df(study, fl, fit, fitted.present, c)
    res = test_contrast(fit, c, df)
    default = cname == DEFAULT_CONTRAST_NAME
    name = fl.output_name(cname, default)
    df_full = np.broadcast_to(np.asarray(res.df, dtype=float), res.t.shape).copy()
    kind, slope = contrast_kind(design, random, c)
    animal_data, c_reduced, groups = None, c, random.animal_group
    if study.settings.inference.permutations > 0:
        # check refuses every contrast that cannot be permuted correctly
        animal_data, c_reduced, taking_part = fitted.reduced_for(c)
        if groups is not None:
            groups = groups[taking_part]
    corrected = _correct(
        study,
        c_reduced,
        res.t,
        df_full,
        animal_data,
        fitted.smooth,
        fitted.mask,
        name,
        quiet,
        backend,
        groups,
    )
    warnings.extend(corrected.warnings)
    return GroupMap(
        name=name,
        first_level=fl.name,
        contrast=cname,
        weights=weights_dict(c, design.columns),
        grid=study.grid,
        mask=fitted.mask,
        effect=res.effect,
        se=res.se,
        t=res.t,
        df=df_full,
        z=res.z,
        p=res.p,
        var_animal=fitted.var_animal,
        var_run=fit.var_run,
        coverage_runs=fl.coverage_runs,
        coverage_animals=fl.coverage_animals,
        not_converged=fitted.not_converged,
        n_animals=design.n_animals,
        n_runs=len(fl.runs),
        inference=corrected,
        components=fitted.components,
        random_effects=fitted.described,
        tested_level=kind,
    )


def _ftest_df(study: Study, fitted: _FittedLevel, weights: np.ndarray) -> np.ndarray:
    """Denominator df of an F-test: the t contrasts' rule for the level its rows test
    (all its columns at once), and with Satterthwaite or variance groups the smallest
    df of its rows (docs/model.md, "F-tests")."""
    fl = fitted.fl
    union = np.abs(weights).sum(axis=0)
    df = _contrast_df(study, fl, fitted.fit, fitted.present, union)
    if study.settings.model.df == "satterthwaite" or fl.random.animal_group is not None:
        for row in weights:
            df = np.fmin(df, _contrast_df(study, fl, fitted.fit, fitted.present, row))
    return df


def _ftest_rows_reduced(design: Design, random: RandomEffects, weights: np.ndarray) -> np.ndarray:
    """The F-test's rows on the animal-level design that its permutations exchange (the
    column-wise form of what :func:`_reduced_data` does to one contrast)."""
    if not random.extended and design.animal_level.all():
        return weights
    kind, slope = contrast_kind(design, random, np.abs(weights).sum(axis=0))
    if kind == CONTRAST_SLOPE:
        _, columns = slope_design(design, random, slope)
        return weights[:, columns]
    columns = [j for j in range(len(design.columns)) if not design.within[j]]
    return weights[:, columns]


def _test_ftest(
    study: Study,
    fitted: _FittedLevel,
    ft: GroupFTest,
    quiet: bool,
    backend: Backend | None,
    warnings: list[str],
) -> FTestMap:
    """Test the rows of an F-test jointly at every fitted voxel and correct for the many
    voxels, as :func:`_test_and_correct` does for one contrast."""
    fl, fit = fitted.fl, fitted.fit
    design, random = fl.design, fl.random
    df = _ftest_df(study, fitted, ft.weights)
    res = test_f(fit, ft.weights, df)
    name = fl.output_name(ft.name, False)
    kind, _ = contrast_kind(design, random, np.abs(ft.weights).sum(axis=0))
    animal_data, rows, groups = None, ft.weights, random.animal_group
    inf = study.settings.inference
    # check refuses every declared F-test that cannot be permuted correctly, and warns
    # that such a default F-test stays parametric
    permute = inf.permutations > 0 and (
        ftest_permutation_refusal(
            design, random, ft, inf.permutations, study.settings.study.min_coverage >= 1.0
        )
        is None
    )
    if permute and kind == CONTRAST_SLOPES:
        animal_data, taking_part = _effect_vectors(
            fitted.y, fitted.s2, fit, design, random, ft.weights
        )
        if groups is not None:
            groups = groups[taking_part]
    elif permute:
        animal_data, _, taking_part = fitted.reduced_for(np.abs(ft.weights).sum(axis=0))
        rows = _ftest_rows_reduced(design, random, ft.weights)
        if groups is not None:
            groups = groups[taking_part]
    corrected = _correct(
        study,
        rows,
        res.f,
        np.where(np.isfinite(res.df), res.df, 0.0),
        animal_data,
        fitted.smooth,
        fitted.mask,
        name,
        quiet,
        backend,
        groups,
        f_p=np.where(np.isnan(res.p), 1.0, res.p),
        permute=permute,
    )
    warnings.extend(corrected.warnings)
    return FTestMap(
        name=name,
        first_level=fl.name,
        ftest=ft.name,
        rows=ft.rows,
        weights={
            row: weights_dict(w, design.columns) for row, w in zip(ft.rows, ft.weights, strict=True)
        },
        meaning=ft.meaning,
        grid=study.grid,
        mask=fitted.mask,
        f=res.f,
        df_num=res.df_num,
        df=res.df,
        z=res.z,
        p=res.p,
        var_animal=fitted.var_animal,
        var_run=fit.var_run,
        coverage_runs=fl.coverage_runs,
        coverage_animals=fl.coverage_animals,
        not_converged=fitted.not_converged,
        n_animals=design.n_animals,
        n_runs=len(fl.runs),
        inference=corrected,
        random_effects=fitted.described,
        tested_level=kind,
    )


def _with_answers(
    study: Study,
    fitted: _FittedLevel,
    gm: GroupMap,
    c: np.ndarray,
    regions: RegionData | None,
    log: Callable[[str], None],
    backend: Backend | None,
) -> GroupMap:
    """The group map with the answers to its questions (or why they were not asked)."""
    settings, fl = study.settings, fitted.fl
    plan = question_plan(fl.design, c)
    terms = random_terms(fl.design, fl.random)
    if plan.asked:
        log(f"  questions of {gm.name}: symmetry, specificity, consistency, run quality")
        answers = answer_questions(
            gm,
            fitted.y,
            fitted.s2,
            fitted.fit,
            fl.design,
            fl.runs,
            c,
            regions,
            settings.questions_for(fl.name),
            settings,
            backend=backend,
            terms=terms,
            model_df=lambda fit, present, cc: _contrast_df(study, fl, fit, present, cc),
        )
        if fl.conditions:
            answers = replace(answers, notes=(*answers.notes, comparison_note(fl.conditions)))
        return replace(gm, answers=answers)
    q = settings.questions_for(fl.name)
    log(f"  questions of {gm.name} (a difference): its own versions of the questions")
    answers = answers_not_asked(
        plan,
        fl.design,
        c,
        regions,
        q,
        settings,
        gm,
        fitted.y,
        s2=fitted.s2,
        fit=fitted.fit,
        runs=fl.runs,
        terms=terms,
        model_df=lambda fit, present, cc: _contrast_df(study, fl, fit, present, cc),
    )
    return replace(gm, answers=answers)


def fit_study(
    study: Study,
    log: Callable[[str], None] | None = None,
    *,
    quiet: bool = True,
    clock: StepClock | None = None,
    sink: Callable[[GroupMap | FTestMap], None] | None = None,
) -> tuple[list[GroupMap | FTestMap], list[str]]:
    """Fit the mixed model for every first-level contrast and test every group contrast
    and F-test.

    ``clock``, when given, receives the wall time of each step (read maps, fit, test
    and correct, regions, questions). ``sink``, when given, receives each map as soon as
    it is finished (:meth:`OutputWriter.add` writes it and lets its arrays go), in the
    order the maps would be returned; the maps handed to it are not returned.

    Returns
    -------
    maps, warnings
        One :class:`GroupMap` per (first-level contrast, group contrast), followed by one
        :class:`~grouplevel.results.maps.FTestMap` per (first-level contrast, F-test)
        (none of them with a ``sink``), and the warnings raised while fitting (the
        study's own warnings are in ``study.warnings``).
    """
    log = log or (lambda _msg: None)
    maps: list[GroupMap | FTestMap] = []
    unasked: list[str] = []  # results whose questions were all skipped
    warnings: list[str] = []

    def emit(m: GroupMap | FTestMap) -> None:
        answers = getattr(m, "answers", None)
        if answers and not answers.asked and answers.contrast_kind != DIFFERENCE:
            unasked.append(m.name)
        (sink or maps.append)(m)

    # one backend for the whole study: a dask cluster takes seconds to start
    with open_backend(study.settings.compute) as backend:
        if backend.distributed:
            log(f"computing on dask: {backend.workers} worker(s)")
        for fl in study.first_levels:
            _, w = _fit_first_level(study, fl, log, quiet, backend, clock, emit)
            warnings.extend(w)
    warnings.extend(skipped_warning(unasked))
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
        # how the label table was read when not as written (columns, sides in names)
        "table_reading": list(atlas.notes),
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
        # where each column varies: "animal", "session" or "run" (docs/model.md)
        "design_levels": dict(zip(fl.design.columns, fl.design.level, strict=True)),
        "sessions": fl.design.n_sessions,
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
        "random_effects": gm.random_effects,
        "tested_level": gm.tested_level,
        "variance_components": _components_summary(gm),
        "voxels_p_below_0.001_uncorrected": int((gm.p < 0.001).sum()),
        "inference": _inference_summary(gm, study.settings.inference.alpha),
        **_figure_maps_summary(study, gm),
    }
    if gm.animal_effects is not None:
        entry["animal_maps"] = animal_maps_summary(gm.animal_effects)
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


def _components_summary(gm: GroupMap) -> dict[str, dict]:
    """Every variance component: its map file and its median over fitted voxels."""
    files = component_files(gm.components)
    files.setdefault("animal", ("var_animal", ""))
    files.setdefault("run", ("var_run", ""))
    out = {}
    for name, values in gm.components.items():
        finite = values[np.isfinite(values)]
        out[name] = {
            "map": f"{files[name][0]}.nii.gz",
            "median": float(np.median(finite)) if finite.size else None,
        }
    return out


def _unfitted_as_null(key: str, values: np.ndarray) -> np.ndarray:
    """Unfittable voxels hold NaN: written as p = 1 in p-type maps (0 elsewhere)."""
    if key in ("p", "q") or key.startswith("p_"):
        return np.where(np.isnan(values), 1.0, values)
    return values


def _constant_df(df: np.ndarray) -> float | None:
    """The degrees of freedom when every fitted voxel has the same (for the intent)."""
    dfs = np.unique(df[np.isfinite(df)])
    return float(dfs[0]) if dfs.size == 1 else None


def _write_described_maps(
    folder: Path, result, descriptions: dict, label: str, stat_key: str, stat_df
) -> None:
    """The in-mask maps of a result named in ``descriptions``; ``stat_df`` goes into the
    intent of the statistic map ``stat_key`` (None: not constant)."""
    for key, what in descriptions.items():
        write_map(
            folder / f"{key}.nii.gz",
            _unfitted_as_null(key, getattr(result, key)),
            result.mask,
            result.grid,
            f"grouplevel {what} [{label}]",
            df=stat_df if key == stat_key else None,
        )


def _write_group_map(folder: Path, gm: GroupMap) -> None:
    """Every map and table of one group contrast into its own folder."""
    folder.mkdir()
    grid = gm.grid
    label = f"{gm.first_level or ''} {gm.contrast}".strip()
    _write_described_maps(folder, gm, MAP_DESCRIPTIONS, label, "t", _constant_df(gm.df))
    for cname, (stem, what) in component_files(gm.components).items():
        write_map(
            folder / f"{stem}.nii.gz",
            gm.components[cname],
            gm.mask,
            grid,
            f"grouplevel {what} [{label}]",
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
    if gm.animal_effects is not None:
        write_animal_maps(folder, gm.animal_effects, gm.mask, grid, label)
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


def _write_ftest_map(folder: Path, fm: FTestMap) -> None:
    """Every map of one F-test into its own folder (as :func:`_write_group_map`)."""
    folder.mkdir()
    grid = fm.grid
    label = f"{fm.first_level or ''} {fm.ftest}".strip()
    denominator = _constant_df(fm.df)
    stat_df = None if denominator is None else (float(fm.df_num), denominator)
    _write_described_maps(folder, fm, FTEST_MAP_DESCRIPTIONS, label, "f", stat_df)
    full = np.ones(grid.shape, dtype=bool)
    write_map(
        folder / "mask.nii.gz",
        fm.mask.astype(np.uint8),
        full,
        grid,
        f"grouplevel analysis mask [{label}]",
        dtype=np.uint8,
    )
    _write_inference(folder, fm, label)  # type: ignore[arg-type]


def _ftest_summary(study: Study, fm: FTestMap) -> dict:
    """The summary.json entry of one F-test."""
    finite = np.isfinite(fm.f)
    peak = int(np.nanargmax(np.where(finite, fm.f, -np.inf))) if finite.any() else None
    entry: dict = {
        "first_level_contrast": fm.first_level,
        "ftest": fm.ftest,
        "meaning": fm.meaning,
        "rows": [{"contrast": r, "weights": fm.weights[r]} for r in fm.rows],
        "animals": fm.n_animals,
        "runs": fm.n_runs,
        "voxels": int(fm.mask.sum()),
        "df_numerator": fm.df_num,
        "df_denominator_range": [float(np.nanmin(fm.df)), float(np.nanmax(fm.df))]
        if np.isfinite(fm.df).any()
        else None,
        "random_effects": fm.random_effects,
        "tested_level": fm.tested_level,
        "voxels_p_below_0.001_uncorrected": int((fm.p < 0.001).sum()),
        "inference": _inference_summary(fm, study.settings.inference.alpha),  # type: ignore[arg-type]
        "questions": {
            "asked": False,
            "why": (
                "the reviewer's questions (bilateral, specific, consistent across animals) "
                "are asked of a mean or a difference, which has a sign and a size per "
                "animal; an F-test says only that some of its rows differ from zero, not "
                "which or in which direction. Ask them of its rows, the group contrasts "
                + ", ".join(fm.rows)
            ),
        },
        "cautions": [
            "a significant F shows that at least one of its rows differs from zero at that "
            "voxel; it does not show which level differs, in which direction, or that the "
            "levels are ordered (as a dose-response would be)"
        ],
    }
    if fm.tested_level == CONTRAST_SLOPES and fm.inference.permutation is not None:
        entry["cautions"].append(
            "the permutation maps flip each animal's whole vector of its own effects: they "
            "assume that, with no effect, every animal's vector is as likely as its "
            "negative and independent of the other animals' (not that the effects are "
            "normal); their statistic estimates the between-animal covariance of the "
            "effects with no effect assumed, so it can rank voxels slightly differently "
            "from the f map (Wald F of the full fit)"
        )
    if peak is not None:
        ijk = np.argwhere(fm.mask)[peak]
        xyz = study.grid.affine[:3, :3] @ ijk + study.grid.affine[:3, 3]
        entry["peak"] = {
            "f": float(fm.f[peak]),
            "voxel": [int(v) for v in ijk],
            "mm": [round(float(v), 4) for v in xyz],
        }
    return entry


def _surviving_z(study: Study, gm: GroupMap) -> tuple[np.ndarray, str]:
    """z where the chosen correction's p ≤ alpha (0 elsewhere), and that method."""
    settings = study.settings
    method = settings.clusters.resolved_method(settings.inference)
    keep = surviving_voxels(gm, settings.inference.alpha)[method]
    return np.where(keep, gm.z, 0.0), method


def _targets_volume(study: Study, gm: GroupMap) -> tuple[np.ndarray, dict[str, str]] | None:
    """The targets of ``[questions]`` on the study grid: label k = the k-th target (a
    voxel in two targets takes the first), and their names; None without them."""
    questions = study.settings.questions_for(gm.first_level)
    atlas = study.atlas
    if atlas is None or not questions.targets:
        return None
    volume = np.zeros(study.grid.shape, dtype=np.int16)
    labels = {}
    indices = atlas.regions["index"].to_numpy()
    for k, name in enumerate(questions.targets, start=1):
        rows = asked_region(atlas, name, questions.stimulus_side, "[questions] targets").rows
        inside = np.isin(atlas.label_volume, indices[leaf_rows(atlas, rows)]) & (volume == 0)
        volume[inside] = k
        labels[str(k)] = str(name)
    return volume, labels


def _write_figure_maps(folder: Path, study: Study, gm: GroupMap) -> None:
    """Maps for figures made elsewhere: the thresholded z map and the targets as labels
    (each animal's estimate is written by :func:`write_animal_maps`)."""
    grid = gm.grid
    label = f"{gm.first_level or ''} {gm.contrast}".strip()
    z, method = _surviving_z(study, gm)
    write_map(
        folder / "z_surviving.nii.gz",
        z,
        gm.mask,
        grid,
        f"grouplevel z where {method} p<={study.settings.inference.alpha:g} [{label}]",
    )
    targets = _targets_volume(study, gm)
    if targets is not None:
        write_map(
            folder / "targets.nii.gz",
            targets[0],
            np.ones(grid.shape, dtype=bool),
            grid,
            f"grouplevel targets of the questions [{label}]",
            dtype=np.int16,
        )


def _figure_maps_summary(study: Study, gm: GroupMap) -> dict:
    """summary.json entries of the maps :func:`_write_figure_maps` writes."""
    z, method = _surviving_z(study, gm)
    out: dict = {
        "z_surviving": {
            "map": "z_surviving.nii.gz",
            "method": method,
            "alpha": study.settings.inference.alpha,
            "voxels": int((z != 0).sum()),
        }
    }
    targets = _targets_volume(study, gm)
    if targets is not None:
        out["targets_map"] = {"map": "targets.nii.gz", "labels": targets[1]}
    return out


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


class OutputWriter:
    """The output folder of one run, written as the results are finished.

    Use as a ``with`` block: entering it checks ``out_dir`` and makes a new hidden
    sibling folder; :meth:`add` writes one finished result's maps there at once and
    keeps only its summary.json entry (so a run holds one result's arrays at a time,
    not all of them); :meth:`finish` writes summary.json, the methods, tables and
    report, and moves the folder into place. A block left without :meth:`finish` (an
    error, an interrupt) removes the hidden folder, so no folder that looks complete
    is ever left, and an earlier output at ``out_dir`` stays as it was.

    ``clock``, when given, receives the wall time of writing the maps and of the report.

    Raises
    ------
    UserError
        When ``out_dir`` may not be written (see
        :func:`grouplevel.outputs.folder.check_output_folder`): it exists and ``force``
        is false, it holds an input of the study, it is not a folder grouplevel wrote,
        or it cannot be created.
    """

    def __init__(
        self,
        study: Study,
        out_dir: str | Path,
        *,
        force: bool = False,
        clock: StepClock | None = None,
    ) -> None:
        self.study = study
        self.out = check_output_folder(out_dir, force, inputs=study_inputs(study))
        self.clock = clock or StepClock()
        self.tmp: Path | None = None
        self.results: dict[str, dict] = {}
        self.ftests: dict[str, dict] = {}

    def __enter__(self) -> OutputWriter:
        self.out.parent.mkdir(parents=True, exist_ok=True)
        # a new, unique hidden folder (mkdir honours the umask, so the finished folder
        # gets the usual permissions; an existing folder of that name is never touched)
        tmp = self.out.parent / f".{self.out.name}.partial-{os.getpid()}-{secrets.token_hex(4)}"
        tmp.mkdir()
        self.tmp = tmp
        return self

    def __exit__(self, *exc) -> None:
        if self.tmp is not None:  # not finished: nothing half-written is left
            shutil.rmtree(self.tmp, ignore_errors=True)
            self.tmp = None

    def _folder(self) -> Path:
        if self.tmp is None:
            raise RuntimeError("OutputWriter: use it as a with block, and add before finish")
        return self.tmp

    def add(self, gm: GroupMap | FTestMap) -> None:
        """Write one finished result's maps and keep its summary.json entry."""
        tmp = self._folder()
        with self.clock.step("write maps"):
            # the maps compress side by side on threads; all are on disk after the block
            with parallel_saves():
                folder = child_path(tmp, gm.name)
                if isinstance(gm, FTestMap):
                    _write_ftest_map(folder, gm)
                else:
                    _write_group_map(folder, gm)
                    _write_figure_maps(folder, self.study, gm)
        if isinstance(gm, FTestMap):
            self.ftests[gm.name] = _ftest_summary(self.study, gm)
        else:
            self.results[gm.name] = _result_summary(self.study, gm)

    def finish(self, warnings: list[str] | None = None) -> Path:
        """Write summary.json and the human-readable outputs; move the folder into
        place (an earlier output there is replaced only now) and return its path."""
        tmp, out, study = self._folder(), self.out, self.study
        grid = study.grid
        summary = {
            "tool": {"name": TOOL_NAME, "version": __version__, "versions": _versions()},
            "created": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
            "title": study.settings.study.title,
            # where the folder was written: inputs are found again relative to it when
            # the study and its outputs move together (outputs.records.locate_input)
            "output_folder": str(out),
            "inputs": _inputs(study),
            "settings": study.settings.to_dict(),
            "grid": {
                "shape": list(grid.shape),
                "voxel_size_mm": [float(v) for v in grid.voxel_size],
                "orientation": grid.orientation,
                "affine": grid.affine.tolist(),
                # the headers' own affine (output maps carry it) and the matrix from
                # header to true mm ([space] header_units_per_mm, header_axes)
                "header_affine": grid.written_affine.tolist(),
                "header_to_true": grid.header_to_true.tolist(),
            },
            "atlas": _atlas_summary(study),
            "design": {
                fl.name or "runs": design_description(study, fl) for fl in study.first_levels
            },
            "results": self.results,
            "ftests": self.ftests,
            "warnings": list(study.warnings) + list(warnings or []),
        }
        write_summary(tmp, summary)
        with self.clock.step("report"):
            # imported here: the report stack (matplotlib, jinja2) loads only when drawn
            from grouplevel.report import render_report, write_manuscript_tables, write_methods

            # the human-readable outputs are made from the folder just written, exactly
            # as `grouplevel report DIR` makes them later
            write_methods(tmp)
            write_manuscript_tables(tmp)
            render_report(tmp)
        old = None
        if out.exists():
            # the earlier output moves into a hidden holder first, so a crash between
            # the two renames leaves it intact there
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.parent))
            out.rename(old / out.name)
        tmp.rename(out)
        self.tmp = None
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        return out


def write_outputs(
    study: Study,
    maps: list[GroupMap | FTestMap],
    out_dir: str | Path,
    *,
    warnings: list[str] | None = None,
    force: bool = False,
    clock: StepClock | None = None,
) -> Path:
    """Write every map, the masks and summary.json into ``out_dir`` atomically
    (:class:`OutputWriter` for maps already computed).

    ``clock``, when given, receives the wall time of writing the maps and of the report.

    Everything is written to a hidden sibling folder first and moved into place at the
    end, so an interrupted run never leaves a folder that looks complete. Raises
    :class:`~grouplevel.errors.UserError` as :class:`OutputWriter` does.
    """
    with OutputWriter(study, out_dir, force=force, clock=clock) as writer:
        for gm in maps:
            writer.add(gm)
        return writer.finish(warnings)


def run_study(
    path: str | Path,
    out_dir: str | Path,
    *,
    force: bool = False,
    log: Callable[[str], None] | None = None,
    permutations: int | None = None,
    seed: int | None = None,
    clock: StepClock | None = None,
) -> Path:
    """Validate, fit and write a study in one call (what ``grouplevel run`` does).

    ``permutations`` and ``seed`` override the study file's ``[inference]`` values. A
    progress bar is shown for the permutations when ``log`` is given, and the wall time
    per step at the end (``clock``, when given, keeps those times for the caller).
    """
    quiet = log is None
    log = log or (lambda _msg: None)
    clock = clock or StepClock()
    # the cheap checks first (before the maps are read), then with every input known
    check_output_folder(out_dir, force, inputs=[("study file", Path(path))], ownership=False)
    with headers_read_once():  # the check and the fit read the same maps
        with clock.step("check inputs"):
            study = load_study(path, permutations=permutations, seed=seed)
        out = check_output_folder(out_dir, force, inputs=study_inputs(study))
        for w in study.warnings:
            log(f"warning: {w}")
        # each result is written as soon as it is finished, into a hidden folder that
        # is moved into place at the end (and removed should the run stop before)
        with OutputWriter(study, out, force=force, clock=clock) as writer:
            _, warnings = fit_study(study, log, quiet=quiet, clock=clock, sink=writer.add)
            for w in warnings:
                log(f"warning: {w}")
            written = writer.finish(warnings)
    log(clock.line())
    return written


__all__ = [
    "GroupMap",
    "OutputWriter",
    "Settings",
    "check_output_folder",
    "fit_study",
    "load_study",
    "run_study",
    "write_outputs",
]
