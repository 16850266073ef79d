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
from scipy import stats

from grouplevel import __version__
from grouplevel.anatomy.tables import RegionData, region_data, region_tables, surviving_voxels
from grouplevel.errors import ArgumentError, UserError
from grouplevel.inference import Smoothness, estimate_smoothness, fdr
from grouplevel.inference.permutation import (
    AnimalLevelData,
    animal_effect_data,
    animal_level_data,
    permutation_test,
)
from grouplevel.inference.significance import sided_p
from grouplevel.intake.description import design_description
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
from grouplevel.intake.images import Grid, write_map, write_volumes
from grouplevel.intake.settings import DEFAULT_CONTRAST_NAME, InferenceSettings, Settings
from grouplevel.intake.study import FirstLevel, Study, load_runs, load_study
from grouplevel.model import (
    between_animal_df,
    satterthwaite_df,
    test_contrast,
)
from grouplevel.model.animals import animal_means
from grouplevel.model.contrasts import slope_df
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
from grouplevel.questions.sides import asked_region
from grouplevel.questions.specificity import leaf_rows
from grouplevel.report import render_report, write_manuscript_tables, write_methods
from grouplevel.results.compute import Backend, fit_design, open_backend
from grouplevel.results.correction import permutation_arguments
from grouplevel.results.maps import MAP_DESCRIPTIONS, AnimalMaps, Corrected, GroupMap

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
    variance_groups: np.ndarray | None = None,
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
            variance_groups=variance_groups,
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
        df = between_animal_df(design.matrix, design.animal, present, c)
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
                score = float(np.median(ratio) / stats.f.median(da, db))
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

    def reduced_for(self, c: np.ndarray) -> tuple[AnimalLevelData, np.ndarray, np.ndarray]:
        """:func:`_reduced_data` for contrast ``c``, shared by contrasts of one level."""
        design, random = self.fl.design, self.fl.random
        kind, slope = contrast_kind(design, random, c)
        # the reduced data depend on the level tested; the reduced contrast on c itself
        key = (kind, slope, tuple(c))
        if key not in self.reduced:
            self.reduced[key] = _reduced_data(self.y, self.s2, self.fit, design, random, c)
        return self.reduced[key]


def _fit_first_level(
    study: Study,
    fl: FirstLevel,
    log: Callable[[str], None],
    quiet: bool = True,
    backend: Backend | None = None,
) -> tuple[list[GroupMap], list[str]]:
    warnings: list[str] = []
    label = fl.name or "the study"
    start = time.perf_counter()
    y, s2, mask = _fitted_voxels(study, fl, label, warnings)
    fitted = _fit(study, fl, label, y, s2, mask, log, backend, warnings)
    group_note = _variance_group_note(fitted)
    if group_note:
        warnings.append(group_note)
    regions = _region_data(study, fitted)
    results = []
    for cname, c in fl.contrasts:
        gm = _test_and_correct(study, fitted, cname, c, quiet, backend, warnings)
        gm = replace(gm, animal_maps=_animal_maps(fitted, c))
        if regions is not None:
            gm = replace(gm, tables=region_tables(gm, regions, fl.design, c, study.settings))
        results.append(_with_answers(study, fitted, gm, c, regions, log, backend))
    log(f"  done in {time.perf_counter() - start:.1f} s")
    return results, warnings


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
    present = np.isfinite(y)
    if s2 is not None:
        present &= np.isfinite(s2)
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
        smooth=_smoothness(y, s2, fit, design.matrix, mask, study.grid),
    )


#: What each animal's map holds, by the level the contrast tests.
_ANIMAL_ESTIMATE = {
    "mean": "the precision-weighted mean of the animal's runs, weights 1/(sigma^2 + s_k^2) "
    "with the fitted between-run variance sigma^2",
    "reduced": "the animal's own GLS estimate of what the contrast tests (its intercept or "
    "slope under the fitted variances), as the permutations use it",
}


def _animal_maps(fitted: _FittedLevel, c: np.ndarray) -> AnimalMaps | None:
    """Each animal's own estimate of what contrast ``c`` tests, with its standard error.

    A design without run-level columns or extra random effects reduces every animal to
    the precision-weighted mean of its runs (:func:`grouplevel.model.animals.animal_means`,
    σ̂² treated as known); any other design to the animal's own estimate of the tested
    intercept or slope (the reduction the permutations use). None when the design has
    no such reduction (e.g. a run-level covariate tested parametrically).
    """
    design, random = fitted.fl.design, fitted.fl.random
    ids = tuple(str(a) for a in design.animal_ids)
    if not random.extended and design.animal_level.all():
        means = animal_means(
            fitted.y,
            design.animal,
            n_animals=design.n_animals,
            variance=fitted.s2,
            var_run=fitted.fit.var_run,
            present=fitted.present,
        )
        return AnimalMaps(ids, means.mean, means.se, _ANIMAL_ESTIMATE["mean"])
    try:
        data, _c, taking_part = fitted.reduced_for(c)
    except ArgumentError:
        return None
    known = data.precision > 0  # (voxels, animals)
    with np.errstate(divide="ignore"):
        se = np.where(known, 1.0 / np.sqrt(np.where(known, data.precision, 1.0)), np.nan)
    effect = np.where(known, data.mean, np.nan)
    kept = tuple(a for a, keep in zip(ids, taking_part, strict=True) if keep)
    return AnimalMaps(kept, effect.T, se.T, _ANIMAL_ESTIMATE["reduced"])


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
        )
        return replace(gm, answers=answers)
    q = settings.questions_for(fl.name)
    answers = answers_not_asked(plan, fl.design, c, regions, q, settings, gm, fitted.y)
    return replace(gm, answers=answers)


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
    """Maps for figures made elsewhere: the thresholded z map, each animal's estimate
    with its standard error (4-D, one volume per animal, in animal_maps.tsv's order),
    and the targets as labels."""
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
    animals = gm.animal_maps
    if animals is not None:
        for stem, values, what in (
            ("animal_effect", animals.effect, "each animal's effect"),
            ("animal_se", animals.se, "SE of each animal's effect"),
        ):
            write_volumes(
                folder / f"{stem}.nii.gz", values, gm.mask, grid, f"grouplevel {what} [{label}]"
            )
        pd.DataFrame(
            {
                "volume": np.arange(1, len(animals.animals) + 1),
                "animal": list(animals.animals),
                "voxels_with_data": np.isfinite(animals.effect).sum(axis=1),
            }
        ).to_csv(folder / "animal_maps.tsv", sep="\t", index=False)
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
    if gm.animal_maps is not None:
        out["animal_maps"] = {
            "effect": "animal_effect.nii.gz",
            "se": "animal_se.nii.gz",
            "table": "animal_maps.tsv",
            "animals": list(gm.animal_maps.animals),
            "estimate": gm.animal_maps.estimate,
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
            folder = child_path(tmp, gm.name)
            _write_group_map(folder, gm)
            _write_figure_maps(folder, study, gm)
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
