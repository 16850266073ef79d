"""The consistency and run-quality questions of a difference (the ask step's part).

A group contrast that is a difference (:mod:`grouplevel.questions.means`) has two sides:
the runs or animals it adds and those it subtracts. Where the sides lie decides the
questions:

* a **within-animal** difference (every tested column varies within animals: a
  condition or drug session compared within the same animals) is consistent when the
  animals' own differences agree
  (:func:`grouplevel.questions.differences.within_animal_consistency`);
* a **between-group** difference (every tested column is animal-level and the animals
  fall into two groups) is described by how each group's animals spread and how much the
  groups overlap (:func:`grouplevel.questions.differences.group_overlap`).

A slope over an animal-level covariate, or a contrast that mixes both levels (a group
difference of a within-animal effect), has no such sides; its consistency carries the
reason why it is not assessed.

Run quality of a difference scores the runs of each side among themselves, against the
leave-one-animal-out map of that side's own mean response, exactly as the runs of a mean
are scored; the table says which side each run was compared within.

Every refit and downdate here uses the model the contrast was fitted with (random
slopes, sessions, variance groups: :class:`grouplevel.model.marginal.RandomTerms`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp

from grouplevel.anatomy.regions import region_values
from grouplevel.machine import available_cores
from grouplevel.model import between_animal_df, test_contrast
from grouplevel.model.animals import animal_means
from grouplevel.model.leave_one_out import leave_one_animal_out_model
from grouplevel.model.marginal import ModelDf, RandomTerms, fit_terms
from grouplevel.questions.differences import (
    DifferenceConsistency,
    GroupOverlap,
    group_overlap,
    within_animal_consistency,
)
from grouplevel.questions.means import DIFFERENCE, contrast_kind
from grouplevel.questions.quality import RunQuality, run_quality
from grouplevel.questions.sides import asked_rows
from grouplevel.questions.specificity import leaf_rows, loo_group_maps

WITHIN = "within-animal"
BETWEEN = "between-group"

# runs-table columns that identify a run or hold its files, never a side's name
_NOT_NAMES = frozenset({"animal", "session", "run", "effect", "variance", "se", "line", "exclude"})
# relative tolerance for equal weights of a side (our own choice; far above rounding)
_TOL = 1e-8


@dataclass(frozen=True)
class DifferenceSides:
    """Where a difference lies and which runs and animals are on each side.

    Attributes
    ----------
    level
        :data:`WITHIN`, :data:`BETWEEN` or "" (neither: see ``reason``).
    run_side
        ``(n_runs,)`` +1 for runs the difference adds, −1 for runs it subtracts, 0 for
        runs it does not weight.
    animal_side
        ``(m,)`` the same per animal for a between-group difference (zeros otherwise).
    names
        Names of the + and − sides (a runs-table value shared by each side's runs, e.g.
        ``ko`` and ``wt``), or ``("added side", "subtracted side")``.
    two_groups
        For a between-group difference: every animal of a side carries the same weight
        (a comparison of two groups, not a slope over a covariate).
    reason
        Why consistency cannot be assessed ("" when it can).
    """

    level: str
    run_side: np.ndarray
    animal_side: np.ndarray
    names: tuple[str, str]
    two_groups: bool
    reason: str


def _side_names(runs: pd.DataFrame, run_side: np.ndarray) -> tuple[str, str]:
    """A runs-table value that names each side (constant on it, different between)."""
    for col in runs.columns:
        if col in _NOT_NAMES or col.endswith("_path"):
            continue
        values = runs[col].astype(str).to_numpy()
        plus, minus = np.unique(values[run_side > 0]), np.unique(values[run_side < 0])
        if plus.size == 1 and minus.size == 1 and plus[0] != minus[0]:
            return f"{col} {plus[0]}", f"{col} {minus[0]}"
    return "added side", "subtracted side"


def _signs(weights: np.ndarray) -> np.ndarray:
    scale = max(float(np.nanmax(np.abs(weights))), 1e-300)
    return np.where(weights > _TOL * scale, 1, np.where(weights < -_TOL * scale, -1, 0))


def difference_sides(design, runs: pd.DataFrame, c: np.ndarray) -> DifferenceSides:
    """The sides of difference ``c`` (see :class:`DifferenceSides`)."""
    c = np.asarray(c, dtype=float)
    within = np.asarray(design.within, dtype=bool)
    tested = c != 0
    m = design.n_animals
    none = np.zeros(m, dtype=int)
    if tested.any() and not within[tested].any():
        first = np.array([np.flatnonzero(design.animal == a)[0] for a in range(m)])
        kind = contrast_kind(design.matrix[first][:, ~within], c[~within])
        if kind.kind != DIFFERENCE:
            reason = f"the contrast's animal-level part is not a difference: {kind.why}"
            return DifferenceSides(
                "", np.zeros(len(design.animal), dtype=int), none, ("", ""), False, reason
            )
        animal_side = _signs(kind.weights)
        run_side = animal_side[design.animal]
        # two groups: the tested columns take one value on each side (a group indicator;
        # a covariate slope takes many), whatever other columns adjust for
        tested_value = design.matrix[first] @ c
        scale = max(float(np.abs(tested_value).max()), 1.0)
        two = bool(
            (animal_side > 0).any()
            and (animal_side < 0).any()
            and np.ptp(tested_value[animal_side > 0]) <= _TOL * scale
            and np.ptp(tested_value[animal_side < 0]) <= _TOL * scale
        )
        reason = (
            ""
            if two
            else "the difference is a slope over an animal-level covariate, not a comparison "
            "of two groups of animals, so there are no two groups whose overlap could be "
            "described; the animals' own target effects are in the region table"
        )
        names = _side_names(runs, run_side)
        return DifferenceSides(BETWEEN, run_side, animal_side, names, two, reason)
    if tested.any() and within[tested].all():
        kind = contrast_kind(design.matrix, c)
        run_side = _signs(np.nan_to_num(kind.weights))
        names = _side_names(runs, run_side)
        return DifferenceSides(WITHIN, run_side, none, names, False, "")
    reason = (
        "the contrast mixes animal-level and within-animal columns (e.g. a group "
        "difference of a within-animal effect); no animal carries it on its own and the "
        "animals do not fall into two groups, so its consistency across animals is not "
        "assessed"
    )
    return DifferenceSides(
        "", np.zeros(len(design.animal), dtype=int), none, ("", ""), False, reason
    )


# ----------------------------------------------------------------------------------------
# the target values under the fitted model
# ----------------------------------------------------------------------------------------


def _fit_values(values, X, animal, terms: RandomTerms):
    """The contrast's model fitted to one target value per run (σ² estimated)."""
    return fit_terms(values[:, None], None, X, animal, terms, estimate_run_variance=True)


def fit_components(fit) -> dict[str, np.ndarray]:
    """A fit's variance components by name (``animal`` and ``run`` for a random-intercept
    fit)."""
    comps = getattr(fit, "components", None)
    return dict(comps) if comps is not None else {"animal": fit.var_animal, "run": fit.var_run}


def target_values(y, design, atlas, questions, chunk_rows: int | None = None) -> np.ndarray:
    """``(n_runs,)`` each run's mean over the (possibly one-sided) target regions
    (``chunk_rows`` runs at a time; default all)."""
    rows = asked_rows(atlas, questions.targets, questions.stimulus_side, "[questions] targets")
    leaves = leaf_rows(atlas, rows)
    weights = sp.csr_matrix(np.asarray(atlas.shares[:, leaves].sum(axis=1)))
    values, _ = region_values(y, np.isfinite(y), weights, chunk_rows=chunk_rows)
    return values[:, 0]


def _group_test(values, design, c, terms, model_df: ModelDf | None):
    """The fit of the target values and ``(effect, se, t, df, p)`` of ``c``."""
    fit = _fit_values(values, design.matrix, design.animal, terms)
    present = np.isfinite(values)[:, None]
    if model_df is not None:
        df = model_df(fit, present, c)
    else:
        df = between_animal_df(design.matrix, design.animal, present, c)
    res = test_contrast(fit, c, df)
    group = tuple(
        float(np.asarray(v).ravel()[0]) for v in (res.effect, res.se, res.t, res.df, res.p)
    )
    return fit, group


#: Why the consistency of a difference has no answer when the data cannot give one.
NO_OWN_DIFFERENCE = (
    "no animal's runs can estimate the difference on their own (it is a group difference "
    "of a within-animal effect, such as a drug-by-group interaction, or each animal has "
    "runs of one side only, or no target data), so there are no animals' own differences "
    "to count"
)
NO_GROUP_DATA = "one group of the difference has no animal with target data"


def difference_consistency(
    values: np.ndarray,
    design,
    c: np.ndarray,
    sides: DifferenceSides,
    terms: RandomTerms,
    model_df: ModelDf | None = None,
) -> tuple[DifferenceConsistency | GroupOverlap | None, str]:
    """Consistency of a difference's target value across animals (see module docstring),
    or None and the reason when the data cannot give it."""
    fit, group = _group_test(values, design, c, terms, model_df)
    comps = fit_components(fit)
    if sides.level == WITHIN:
        loo = leave_one_animal_out_model(
            values[:, None], None, design.matrix, design.animal, c, comps, terms
        )
        cons = within_animal_consistency(
            values,
            None,
            design.matrix,
            design.animal,
            design.animal_ids,
            c,
            group=group,
            loo_effect=loo.effect[:, 0],
            loo_t=loo.t[:, 0],
            var_run=float(comps["run"][0]),
            var_session=float(comps["session"][0]) if "session" in comps else 0.0,
            session=terms.session,
        )
        if not np.isfinite(cons.animals["effect"].to_numpy(dtype=float)).any():
            return None, NO_OWN_DIFFERENCE
        return cons, ""
    means = animal_means(
        values[:, None], design.animal, n_animals=design.n_animals, var_run=comps["run"]
    )
    has = (means.runs[:, 0] > 0) & np.isfinite(means.mean[:, 0])
    if not (has & (sides.animal_side > 0)).any() or not (has & (sides.animal_side < 0)).any():
        return None, NO_GROUP_DATA
    overlap = group_overlap(
        means.mean[:, 0],
        means.se[:, 0],
        means.runs[:, 0],
        sides.animal_side,
        design.animal_ids,
        sides.names,
        group=group,
    )
    return overlap, ""


# ----------------------------------------------------------------------------------------
# run quality of each side
# ----------------------------------------------------------------------------------------


def difference_run_quality(
    y: np.ndarray,
    s2: np.ndarray | None,
    fit,
    design,
    runs: pd.DataFrame,
    sides: DifferenceSides,
    shell: np.ndarray,
    threshold: float,
    terms: RandomTerms,
    estimate_run_variance: bool,
    *,
    loo_chunk: int | None = None,
    chunk_rows: int | None = None,
) -> RunQuality | None:
    """Run quality of each side's runs among themselves (``side`` column added).

    Each side's reference map is its own mean response (the mean of its runs' design
    rows) with one animal left out at a time, downdated at the fitted components of the
    contrast's model. ``loo_chunk`` voxels are downdated together and ``chunk_rows``
    runs scored together (default all at once; the numbers do not depend on either).
    """
    comps = fit_components(fit)
    frames = []
    for sign, name in zip((1, -1), sides.names, strict=True):
        keep = sides.run_side == sign
        if keep.sum() < 2:
            continue
        c_side = design.matrix[keep].mean(axis=0)
        if terms.extended:
            loo = loo_group_maps(
                y,
                s2,
                design.matrix,
                design.animal,
                c_side,
                components=comps,
                terms=terms,
                chunk=loo_chunk,
                workers=available_cores(),
            )
        else:
            loo = loo_group_maps(
                y,
                s2,
                design.matrix,
                design.animal,
                c_side,
                estimate_run_variance=estimate_run_variance,
                var_animal=fit.var_animal,
                var_run=fit.var_run,
                chunk=loo_chunk,
                workers=available_cores(),
            )
        animals = np.unique(design.animal[keep])
        codes = np.searchsorted(animals, design.animal[keep])
        quality = run_quality(
            y,
            s2,
            codes,
            runs[keep].reset_index(drop=True),
            loo.effect[animals],
            shell,
            threshold=threshold,
            rows=np.flatnonzero(keep),
            chunk_rows=chunk_rows,
        )
        table = quality.table()
        table.insert(0, "side", name)
        frames.append(table)
    if not frames:
        return None
    return RunQuality(runs=pd.concat(frames, ignore_index=True), threshold=float(threshold))
