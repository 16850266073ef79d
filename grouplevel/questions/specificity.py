"""Is the activation where it should be, in every animal, and not at the brain's edge?

Three reviewer's questions about one group map are answered here.

*Specificity.* :func:`specificity` compares the surviving activation with a list of
target regions of the atlas: the share of the surviving voxels that falls in the targets
against the targets' share of the brain (an enrichment ratio), the mean effect in the
targets minus the mean effect in the rest of the brain (one value per run, fitted with the
same run-within-animal REML model as the voxels), the off-target regions ranked by their
mean group effect and by their surviving extent, and two artefact checks: activation
piled up in a thin shell at the brain's edge (with a score for the sign-alternating rim
that stimulus-locked head motion leaves: positive on one side, negative on the other)
and activation in artefact labels (ventricles). A verdict with its reasons closes it.

*Consistency across animals.* :func:`consistency` gives each animal's own target effect
with its confidence interval, counts the animals that show it, splits the variance into
between-animal and between-run parts (the intraclass correlation) and refits the group
effect leaving out one animal at a time. :func:`loo_group_maps` does the same leave-one-
animal-out refit for the whole voxelwise t map.

Every rule and number of the verdicts is listed in ``docs/verdicts-specificity.md``.

Every function is pure: arrays, DataFrames and an :class:`~grouplevel.atlas.Atlas` in,
frozen dataclasses out; nothing is read, written or printed.

References
----------
Patterson HD, Thompson R (1971). Recovery of inter-block information when block sizes are
unequal. Biometrika 58:545-554 (REML).

Shrout PE, Fleiss JL (1979). Intraclass correlations: uses in assessing rater
reliability. Psychol Bull 86:420-428.

Hajnal JV, Myers R, Oatridge A, Schwieso JE, Young IR, Bydder GM (1994). Artifacts due to
stimulus correlated motion in functional imaging of the brain. Magn Reson Med 31:283-291.

Borenstein M, Hedges LV, Higgins JPT, Rothstein HR (2009). Introduction to Meta-Analysis.
Wiley (inverse-variance weighting).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy import ndimage

from grouplevel.compiled import lazy_njit
from grouplevel.distributions import norm_ppf, t_ppf
from grouplevel.errors import ArgumentError
from grouplevel.model import between_animal_df, test_contrast
from grouplevel.model.animals import animal_means
from grouplevel.model.leave_one_out import leave_one_animal_out, leave_one_animal_out_model
from grouplevel.model.marginal import ModelDf, RandomTerms, fit_terms
from grouplevel.model.memory import voxel_chunks
from grouplevel.questions.verdicts import (  # noqa: F401  (the rules' names, re-exported here)
    ARTEFACT_ENRICHMENT_MIN,
    ARTEFACT_FLAG_TEXT,
    ARTEFACT_SHARE_MIN,
    EDGE_COVERAGE_MIN,
    EDGE_ODDS_RATIO_MIN,
    EDGE_SHARE_MIN,
    EDGE_TO_INNER_MIN,
    MOSTLY_OFF_TARGET_SHARE,
    RIM_MIN_VOXELS,
    RIM_SCORE_MIN,
    SPECIFIC_ENRICHMENT_MIN,
    SPECIFIC_SHARE_MIN,
    VERDICT_EDGE,
    VERDICT_NONE,
    VERDICT_OFF_TARGET,
    VERDICT_PLUS_OFF_TARGET,
    VERDICT_SPECIFIC,
    specificity_rules,
)

if TYPE_CHECKING:  # types only: the atlas is read and built by the shell
    from grouplevel.anatomy.atlas import Atlas

# --------------------------------------------------------------------------------------
# Named constants (every rule is documented in docs/verdicts-specificity.md)
# --------------------------------------------------------------------------------------

#: Thickness of the edge shell in voxels. Two voxels is the reach of a sub-voxel head
#: movement after interpolation plus one voxel of smoothing (common practice).
DEFAULT_SHELL_VOXELS = 2

#: Neighbourhood of the shell: 26 (a voxel touching the outside by a face, edge or corner
#: is on the boundary; chessboard distance) or 6 (faces only; city-block distance).
DEFAULT_SHELL_CONNECTIVITY = 26

#: Parts of a chunk per thread in the threaded leave-one-out downdate: more, smaller
#: parts balance the threads (our own choice; the numbers do not depend on it).
PARTS_PER_WORKER = 4

#: Level of the confidence intervals (common practice).
CONFIDENCE_LEVEL = 0.95

#: |z| above which a shell voxel counts towards the sign-alternation score even when it
#: does not survive correction: z = 3.29 is two-sided p = 0.001 (common practice).
RIM_Z_THRESHOLD = 3.29

#: Words that mark a region as an artefact label (case-insensitive substring match):
#: cerebrospinal fluid spaces and anything outside the brain (our own choice).
ARTEFACT_WORDS = ("ventric", "csf", "cerebrospinal", "outside", "background", "vessel", "sinus")


# --------------------------------------------------------------------------------------
# Edge shell and region helpers
# --------------------------------------------------------------------------------------


def _structure(connectivity: int) -> np.ndarray:
    if connectivity == 26:
        return np.ones((3, 3, 3), dtype=bool)
    if connectivity == 6:
        return ndimage.generate_binary_structure(3, 1)
    raise ArgumentError(
        f"edge shell connectivity must be 6 or 26, got {connectivity!r}; set it to one of those."
    )


def edge_shell(
    mask: np.ndarray,
    distance_voxels: int = DEFAULT_SHELL_VOXELS,
    connectivity: int = DEFAULT_SHELL_CONNECTIVITY,
) -> np.ndarray:
    """In-mask voxels within ``distance_voxels`` of the mask's boundary.

    The mask is eroded ``distance_voxels`` times with the 3 × 3 × 3 cube (26-connectivity:
    a voxel is removed when any of its 26 neighbours is outside the mask, i.e. chessboard
    distance) or the 6-neighbour cross (city-block distance); the shell is what the
    erosion removed. Voxels on the border of the array count as touching the outside.

    Parameters
    ----------
    mask
        3-D bool brain mask.
    distance_voxels
        Shell thickness in voxels (≥ 1).
    connectivity
        26 (default) or 6.

    Returns
    -------
    numpy.ndarray
        ``(V,)`` bool over the in-mask voxels (C order, as ``volume[mask]``).
    """
    mask = np.asarray(mask, dtype=bool)
    if mask.ndim != 3:
        raise ArgumentError(f"edge_shell: the mask must be 3-D, got shape {mask.shape}.")
    if int(distance_voxels) < 1:
        raise ArgumentError(
            f"edge shell thickness must be at least 1 voxel, got {distance_voxels!r}; "
            "give a positive whole number of voxels."
        )
    inner = ndimage.binary_erosion(
        mask, structure=_structure(connectivity), iterations=int(distance_voxels)
    )
    return (mask & ~inner)[mask]


def _inner_layer(mask: np.ndarray, distance_voxels: int, connectivity: int) -> np.ndarray:
    """The layer of the same thickness just inside the edge shell (in-mask vector)."""
    structure = _structure(connectivity)
    once = ndimage.binary_erosion(mask, structure=structure, iterations=distance_voxels)
    twice = ndimage.binary_erosion(mask, structure=structure, iterations=2 * distance_voxels)
    return (once & ~twice)[mask]


def artefact_rows(atlas: Atlas, words: Sequence[str] = ARTEFACT_WORDS) -> list[int]:
    """Rows of ``atlas.regions`` whose name contains one of ``words`` (any case)."""
    names = atlas.regions["name"].astype(str).str.casefold()
    hit = np.zeros(len(names), dtype=bool)
    for word in words:
        hit |= names.str.contains(str(word).casefold(), regex=False).to_numpy()
    return [int(r) for r in np.flatnonzero(hit)]


def leaf_rows(atlas: Atlas, rows: Sequence[int]) -> np.ndarray:
    """The leaves at or below the given region rows (each leaf once, atlas order)."""
    regions = atlas.regions
    n = len(regions)
    rows = np.asarray(list(rows), dtype=np.int64)
    if rows.size and (rows.min() < 0 or rows.max() >= n):
        raise ArgumentError(
            f"region rows must be between 0 and {n - 1}, got {rows.tolist()}; take them "
            "from Atlas.region_rows(name)."
        )
    position = {int(i): r for r, i in enumerate(regions["index"].to_numpy())}
    parent = regions["parent"].to_numpy()
    chosen = np.zeros(n, dtype=bool)
    chosen[rows] = True
    inside = chosen.copy()
    for r in range(n):  # loop over regions (a few hundred), not voxels
        p = int(parent[r])
        seen = 0
        while not inside[r] and p in position and seen < n:
            if chosen[position[p]]:
                inside[r] = True
            p = int(parent[position[p]])
            seen += 1
    leaf = regions["is_leaf"].to_numpy(dtype=bool)
    return np.flatnonzero(inside & leaf)


def _weights(atlas: Atlas, rows: np.ndarray) -> np.ndarray:
    """Per-voxel share covered by the given (leaf) rows, clipped to [0, 1]."""
    shares = sp.csc_matrix(atlas.shares)
    if rows.size == 0:
        return np.zeros(shares.shape[0])
    w = np.asarray(shares[:, rows].sum(axis=1)).ravel()
    return np.clip(w, 0.0, 1.0)


def _weighted_run_means(y: np.ndarray, w: np.ndarray, chunk_rows: int | None = None) -> np.ndarray:
    """``Σ_v w_v y_kv / Σ_v w_v`` over the voxels where run ``k`` has data.

    ``chunk_rows`` runs at a time (default all), each block as float64: a run's mean
    is its own, so the block size changes nothing but the memory used.
    """
    n = len(y)
    out = np.empty(n)
    for block in voxel_chunks(n, max(1, n if chunk_rows is None else chunk_rows)):
        yb = np.asarray(y[block], dtype=float)
        present = np.isfinite(yb)
        num = np.where(present, yb, 0.0) @ w
        den = present.astype(float) @ w
        with np.errstate(invalid="ignore", divide="ignore"):
            out[block] = np.where(den > 0, num / den, np.nan)
    return out


def _ci(effect: float, se: float, df: float) -> tuple[float, float]:
    if not (np.isfinite(se) and np.isfinite(df) and df > 0):
        return float("nan"), float("nan")
    crit = float(t_ppf(0.5 + CONFIDENCE_LEVEL / 2.0, df))
    return float(effect - crit * se), float(effect + crit * se)


def _odds(p: float) -> float:
    """``p / (1 − p)`` (inf at 1, NaN for NaN)."""
    if not np.isfinite(p):
        return float("nan")
    return float("inf") if p >= 1.0 else float(p / (1.0 - p))


def _float(x) -> float | None:
    x = float(x)
    return x if np.isfinite(x) else None


# --------------------------------------------------------------------------------------
# Specificity
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Specificity:
    """Where the surviving activation lies relative to the targets, the edge and artefacts.

    Attributes
    ----------
    targets
        Names of the target regions (as given, e.g. "auditory cortex (left)").
    n_surviving
        Surviving in-mask voxels.
    target_share
        Share-weighted fraction of the surviving voxels inside the targets.
    target_brain_share
        The targets' share of the in-mask brain volume.
    enrichment
        ``target_share / target_brain_share`` (1 = as much as chance; NaN without
        activation).
    difference, se, ci_low, ci_high, t, df, p
        Group effect of (mean effect in targets − mean effect in the rest of the brain)
        per run, from the REML run-within-animal model, with its t-based confidence
        interval and two-sided p.
    var_animal, var_run
        REML variance components of that per-run difference.
    off_target
        One row per leaf outside the targets, with ranks (see :meth:`table`).
    edge_share, edge_brain_share, edge_enrichment, edge_odds_ratio, edge_to_inner,
    edge_coverage
        Share of the surviving activation in the edge shell, the shell's share of the
        brain, their ratio, the ratio of their odds ``p / (1 − p)``, the density of
        surviving voxels in the shell divided by that in the equally thick layer just
        inside it (inf when that layer has none), and the share of the shell's voxels
        that survive.
    rim_score, rim_positive_dorsal, rim_negative_ventral, rim_negative_dorsal,
    rim_positive_ventral
        Sign-alternation score of the shell (0 to 1) and its four counts.
    artefact_share, artefact_brain_share, artefact_enrichment
        The same for the artefact labels (ventricles).
    edge_rule, rim_rule, artefact_rule
        Which artefact rules fired.
    flag
        :data:`ARTEFACT_FLAG_TEXT` when any artefact rule fired, else "".
    verdict
        One of the ``VERDICT_*`` texts.
    reasons
        Sentences with the numbers behind the verdict.
    """

    targets: tuple[str, ...]
    n_surviving: int
    target_share: float
    target_brain_share: float
    enrichment: float
    difference: float
    se: float
    ci_low: float
    ci_high: float
    t: float
    df: float
    p: float
    var_animal: float
    var_run: float
    off_target: pd.DataFrame
    edge_share: float
    edge_brain_share: float
    edge_enrichment: float
    edge_odds_ratio: float
    edge_to_inner: float
    edge_coverage: float
    rim_score: float
    rim_positive_dorsal: int
    rim_negative_ventral: int
    rim_negative_dorsal: int
    rim_positive_ventral: int
    artefact_share: float
    artefact_brain_share: float
    artefact_enrichment: float
    edge_rule: bool
    rim_rule: bool
    artefact_rule: bool
    flag: str
    verdict: str
    reasons: tuple[str, ...]
    target_rows: pd.DataFrame

    def table(self) -> pd.DataFrame:
        """specificity.tsv: the targets (each, then all together), then the off-targets.

        Columns ``kind`` ("target", "targets", "off-target"), ``index, name,
        hemisphere, volume_mm3, mean_effect, mean_z, surviving_voxels,
        surviving_share`` (of the region's volume), ``activation_share`` (of all
        surviving voxels), ``rank_effect`` (1 = largest |mean effect| among the
        off-targets), ``rank_extent`` (1 = most surviving voxels), ``artefact_label``.
        """
        return pd.concat([self.target_rows, self.off_target], ignore_index=True)

    def summary(self) -> dict:
        """Plain JSON types for summary.json."""
        top = self.off_target.sort_values("rank_effect").head(5)
        return {
            "targets": list(self.targets),
            "verdict": self.verdict,
            "reasons": list(self.reasons),
            "flag": self.flag,
            "surviving_voxels": int(self.n_surviving),
            "target_share": _float(self.target_share),
            "target_brain_share": _float(self.target_brain_share),
            "enrichment": _float(self.enrichment),
            "difference": _float(self.difference),
            "difference_se": _float(self.se),
            "difference_ci": [_float(self.ci_low), _float(self.ci_high)],
            "difference_t": _float(self.t),
            "difference_df": _float(self.df),
            "difference_p": _float(self.p),
            "edge_share": _float(self.edge_share),
            "edge_brain_share": _float(self.edge_brain_share),
            "edge_enrichment": _float(self.edge_enrichment),
            "edge_odds_ratio": _float(self.edge_odds_ratio),
            "edge_to_inner": _float(self.edge_to_inner),
            "edge_coverage": _float(self.edge_coverage),
            "rim_score": _float(self.rim_score),
            "artefact_share": _float(self.artefact_share),
            "artefact_enrichment": _float(self.artefact_enrichment),
            "rules_fired": [
                name
                for name, fired in (
                    ("edge", self.edge_rule),
                    ("rim", self.rim_rule),
                    ("artefact_labels", self.artefact_rule),
                )
                if fired
            ],
            "top_off_target": [
                {
                    "name": str(r["name"]),
                    "hemisphere": str(r["hemisphere"]),
                    "mean_effect": _float(r["mean_effect"]),
                    "surviving_voxels": _float(r["surviving_voxels"]),
                }
                for _, r in top.iterrows()
            ],
        }


def rim_score(
    active: np.ndarray, sign: np.ndarray, shell: np.ndarray, height: np.ndarray
) -> tuple[float, int, int, int, int]:
    """Sign-alternation score of the active voxels in the edge shell.

    The shell is split at the median height of the brain (``height`` over all in-mask
    voxels) into a dorsal and a ventral part. Among the active shell voxels let ``P`` and
    ``N`` be the counts of positive and negative ones, ``d⁺`` the fraction of the positive
    ones in the dorsal part and ``v⁻`` the fraction of the negative ones in the ventral
    part. The score is

        balance × |d⁺ + v⁻ − 1|,   balance = 2 min(P, N) / (P + N),

    1 for a perfect rim (all positive voxels dorsal and all negative ones ventral, or the
    mirror image), 0 when only one sign is present or the signs are not sorted by height.

    Returns
    -------
    score, positive_dorsal, negative_ventral, negative_dorsal, positive_ventral
    """
    dorsal = height > np.median(height)
    pos = active & shell & (sign > 0)
    neg = active & shell & (sign < 0)
    pd_, pv = int((pos & dorsal).sum()), int((pos & ~dorsal).sum())
    nd, nv = int((neg & dorsal).sum()), int((neg & ~dorsal).sum())
    n_pos, n_neg = pd_ + pv, nd + nv
    if n_pos == 0 or n_neg == 0:
        return 0.0, pd_, nv, nd, pv
    balance = 2.0 * min(n_pos, n_neg) / (n_pos + n_neg)
    orientation = pd_ / n_pos + nv / n_neg - 1.0
    return float(balance * abs(orientation)), pd_, nv, nd, pv


def _region_frame(
    atlas: Atlas, rows: np.ndarray, effect, z, surviving_f, n_surv, artefact_leaves
) -> pd.DataFrame:
    shares = sp.csc_matrix(atlas.shares)[:, rows]
    total = np.asarray(shares.sum(axis=0)).ravel()
    fin_e = np.isfinite(effect)
    fin_z = np.isfinite(z)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_effect = (shares.T @ np.where(fin_e, effect, 0.0)) / (shares.T @ fin_e.astype(float))
        mean_z = (shares.T @ np.where(fin_z, z, 0.0)) / (shares.T @ fin_z.astype(float))
        surv = shares.T @ surviving_f
        surv_share = np.where(total > 0, surv / total, np.nan)
        act_share = surv / n_surv if n_surv > 0 else np.full(rows.size, np.nan)
    regions = atlas.regions.iloc[rows]
    return pd.DataFrame(
        {
            "index": regions["index"].to_numpy(dtype=np.int64),
            "name": regions["name"].astype(str).to_numpy(),
            "hemisphere": regions["hemisphere"].astype(str).to_numpy(),
            "volume_mm3": regions["mask_volume_mm3"].to_numpy(dtype=float),
            "mean_effect": np.asarray(mean_effect, dtype=float),
            "mean_z": np.asarray(mean_z, dtype=float),
            "surviving_voxels": np.asarray(surv, dtype=float),
            "surviving_share": np.asarray(surv_share, dtype=float),
            "activation_share": np.asarray(act_share, dtype=float),
            "artefact_label": np.isin(rows, artefact_leaves),
        }
    )


def _vector(x, n: int, what: str, dtype=float) -> np.ndarray:
    x = np.asarray(x, dtype=dtype).reshape(-1)
    if x.shape != (n,):
        raise ArgumentError(f"specificity: {what} has {x.size} values for {n} in-mask voxels.")
    return x


def specificity(
    surviving: np.ndarray,
    z: np.ndarray,
    effect: np.ndarray,
    atlas: Atlas,
    targets: Sequence[int],
    shell: np.ndarray,
    inner: np.ndarray,
    height: np.ndarray,
    artefact: Sequence[int],
    y: np.ndarray,
    X: np.ndarray,
    animal: np.ndarray,
    c: np.ndarray,
    *,
    rim_z_threshold: float = RIM_Z_THRESHOLD,
    terms: RandomTerms | None = None,
    model_df: ModelDf | None = None,
    chunk_rows: int | None = None,
) -> Specificity:
    """Specificity of one group map for a set of target regions.

    Parameters
    ----------
    surviving
        ``(V,)`` bool: in-mask voxels that survive the chosen correction.
    z, effect
        ``(V,)`` group z and effect maps.
    atlas
        Atlas whose ``shares`` rows are the same ``V`` in-mask voxels.
    targets
        Region rows of the targets (e.g. ``atlas.region_rows("auditory cortex")``); any
        level; their leaves are used.
    shell
        ``(V,)`` bool edge shell (:func:`edge_shell`).
    inner
        ``(V,)`` bool: the layer of the same thickness just inside the shell
        (:func:`inner_layer`).
    height
        ``(V,)`` world dorsal–ventral coordinate (mm, larger = dorsal) of each voxel.
    artefact
        Region rows of artefact labels (:func:`artefact_rows`); may be empty.
    y
        ``(n_runs, V)`` run effect maps (NaN where a run has no data).
    X, animal, c
        Group design ``(n_runs, p)``, animal codes ``0..m-1`` and contrast ``(p,)``.
    rim_z_threshold
        |z| above which a shell voxel counts for the rim score besides the surviving
        ones.
    chunk_rows
        Runs averaged together (default all; the numbers do not depend on it:
        :func:`grouplevel.model.memory.chunk_rows` sizes it for a budget).

    Returns
    -------
    Specificity

    Notes
    -----
    The per-run difference (mean in targets − mean in the rest of the brain, each
    share-weighted over the voxels where the run has data) is fitted with
    :func:`grouplevel.model.fit_reml` without first-level variances (σ² estimated) and
    tested on the between-animal degrees of freedom.

    References
    ----------
    Patterson HD, Thompson R (1971). Biometrika 58:545-554.

    Hajnal JV et al. (1994). Magn Reson Med 31:283-291.
    """
    n_vox = atlas.shares.shape[0]
    surviving, z, effect, shell, inner, height, y = _check_specificity_inputs(
        n_vox, surviving, z, effect, shell, inner, height, y, targets
    )
    target_leaves = leaf_rows(atlas, targets)
    artefact_leaves = leaf_rows(atlas, artefact)
    w_target = _weights(atlas, target_leaves)
    names = atlas.regions["name"].astype(str).to_numpy()
    hemis = atlas.regions["hemisphere"].astype(str).to_numpy()
    target_names = tuple(f"{names[r]} ({hemis[r]})" for r in targets)

    shares = _activation_shares(surviving, shell, inner, w_target, _weights(atlas, artefact_leaves))
    active = surviving | (np.nan_to_num(np.abs(z)) > rim_z_threshold)
    rim = rim_score(active, np.sign(np.nan_to_num(z)), shell, height)
    fit, res = _target_minus_rest(y, w_target, X, animal, c, terms, model_df, chunk_rows)
    surv_f = surviving.astype(float)
    off = _off_target_table(atlas, target_leaves, effect, z, surv_f, artefact_leaves)
    tgt = _target_table(
        atlas, targets, target_leaves, target_names, w_target, effect, z, surv_f, shares
    )
    artefact_names = sorted(set(names[artefact_leaves]))
    diff, se, dfv = float(res.effect[0]), float(res.se[0]), float(res.df[0])
    lo, hi = _ci(diff, se, dfv)
    difference_reason = (
        f"Mean effect in the targets minus the rest of the brain: {diff:.3g} "
        f"(95% CI {lo:.3g} to {hi:.3g}, t = {res.t[0]:.2f}, df = {dfv:g}, p = {res.p[0]:.3g})."
    )
    rules = specificity_rules(shares, rim, off, artefact_names, difference_reason, rim_z_threshold)
    score, p_d, n_v, n_d, p_v = rim
    return Specificity(
        targets=target_names,
        n_surviving=shares.n_surviving,
        target_share=float(shares.target_share),
        target_brain_share=shares.target_brain,
        enrichment=float(shares.enrichment),
        difference=diff,
        se=se,
        ci_low=lo,
        ci_high=hi,
        t=float(res.t[0]),
        df=dfv,
        p=float(res.p[0]),
        var_animal=float(fit.var_animal[0]),
        var_run=float(fit.var_run[0]),
        off_target=off,
        edge_share=float(shares.edge_share),
        edge_brain_share=shares.edge_brain,
        edge_enrichment=float(shares.edge_enrichment),
        edge_odds_ratio=float(shares.edge_odds_ratio),
        edge_to_inner=float(shares.edge_to_inner),
        edge_coverage=float(shares.edge_coverage),
        rim_score=score,
        rim_positive_dorsal=p_d,
        rim_negative_ventral=n_v,
        rim_negative_dorsal=n_d,
        rim_positive_ventral=p_v,
        artefact_share=float(shares.artefact_share),
        artefact_brain_share=shares.artefact_brain,
        artefact_enrichment=float(shares.artefact_enrichment),
        edge_rule=rules.edge_rule,
        rim_rule=rules.rim_rule,
        artefact_rule=rules.artefact_rule,
        flag=rules.flag,
        verdict=rules.verdict,
        reasons=rules.reasons,
        target_rows=tgt,
    )


# --------------------------------------------------------------------------------------
# The steps of specificity
# --------------------------------------------------------------------------------------


def _check_specificity_inputs(n_vox, surviving, z, effect, shell, inner, height, y, targets):
    """Per-voxel vectors of the mask's length, a runs × voxels ``y``, some targets."""
    out = (
        _vector(surviving, n_vox, "surviving", bool),
        _vector(z, n_vox, "z"),
        _vector(effect, n_vox, "effect"),
        _vector(shell, n_vox, "shell", bool),
        _vector(inner, n_vox, "inner", bool),
        _vector(height, n_vox, "height"),
    )
    y = np.asarray(y)  # float32 stays so: each block of runs is converted on its own
    if y.ndim != 2 or y.shape[1] != n_vox:
        raise ArgumentError(f"specificity: y must be (runs, {n_vox} voxels), got {y.shape}.")
    if len(list(targets)) == 0:
        raise ArgumentError(
            "specificity: no target regions given; pass the atlas rows of at least one "
            "target region."
        )
    return (*out, y)


@dataclass(frozen=True)
class Shares:
    """Where the surviving voxels lie: in the targets, the edge shell, artefact labels
    (what the specificity rules of :mod:`grouplevel.questions.verdicts` read)."""

    n_surviving: int
    target_brain: float  # share of the brain in the targets
    edge_brain: float
    artefact_brain: float
    target_share: float  # share of the surviving voxels in the targets
    edge_share: float
    artefact_share: float
    enrichment: float  # target_share / target_brain
    edge_enrichment: float
    edge_odds_ratio: float
    artefact_enrichment: float
    edge_coverage: float  # share of the shell that survives
    edge_to_inner: float  # surviving density, shell / the layer just inside


def _activation_shares(
    surviving: np.ndarray,
    shell: np.ndarray,
    inner: np.ndarray,
    w_target: np.ndarray,
    w_artefact: np.ndarray,
) -> Shares:
    surv_f = surviving.astype(float)
    n_surv = int(surviving.sum())
    brain = float(surviving.size)
    target_brain = float(w_target.sum()) / brain
    edge_brain = float(shell.sum()) / brain
    artefact_brain = float(w_artefact.sum()) / brain
    with np.errstate(invalid="ignore", divide="ignore"):
        target_share = float(w_target @ surv_f) / n_surv if n_surv else np.nan
        edge_share = float(surv_f[shell].sum()) / n_surv if n_surv else np.nan
        artefact_share = float(w_artefact @ surv_f) / n_surv if n_surv else np.nan
        shell_density = surv_f[shell].mean() if shell.any() else np.nan
        inner_density = surv_f[inner].mean() if inner.any() else np.nan
        return Shares(
            n_surviving=n_surv,
            target_brain=target_brain,
            edge_brain=edge_brain,
            artefact_brain=artefact_brain,
            target_share=target_share,
            edge_share=edge_share,
            artefact_share=artefact_share,
            enrichment=target_share / target_brain if target_brain > 0 else np.nan,
            edge_enrichment=edge_share / edge_brain if edge_brain > 0 else np.nan,
            edge_odds_ratio=(
                _odds(edge_share) / _odds(edge_brain) if 0 < edge_brain < 1 else float("nan")
            ),
            artefact_enrichment=(artefact_share / artefact_brain if artefact_brain > 0 else np.nan),
            edge_coverage=float(shell_density) if shell.any() else 0.0,
            edge_to_inner=(
                np.nan
                if not n_surv
                else (np.inf if inner_density == 0 else float(shell_density / inner_density))
            ),
        )


def _target_minus_rest(y, w_target, X, animal, c, terms=None, model_df=None, chunk_rows=None):
    """Per run: mean in the targets − mean in the rest; REML run-within-animal model."""
    values = _weighted_run_means(y, w_target, chunk_rows) - _weighted_run_means(
        y, 1.0 - w_target, chunk_rows
    )
    present = np.isfinite(values)[:, None]
    fit = fit_terms(values[:, None], None, X, animal, terms, estimate_run_variance=True)
    if model_df is None:
        df = between_animal_df(X, animal, present, c)
    else:
        df = model_df(fit, present, c)
    return fit, test_contrast(fit, c, df)


def _off_target_table(atlas, target_leaves, effect, z, surv_f, artefact_leaves) -> pd.DataFrame:
    """Every leaf outside the targets, ranked by |mean effect| and by surviving voxels."""
    n_surv = int(surv_f.sum())
    leaf = atlas.regions["is_leaf"].to_numpy(dtype=bool)
    off_rows = np.flatnonzero(leaf & ~np.isin(np.arange(len(leaf)), target_leaves))
    off = _region_frame(atlas, off_rows, effect, z, surv_f, n_surv, artefact_leaves)
    off.insert(0, "kind", "off-target")
    order_e = (-np.abs(off["mean_effect"].to_numpy())).argsort(kind="stable")
    order_x = (-off["surviving_voxels"].to_numpy()).argsort(kind="stable")
    rank_e = np.empty(len(off), dtype=np.int64)
    rank_x = np.empty(len(off), dtype=np.int64)
    rank_e[order_e] = np.arange(1, len(off) + 1)
    rank_x[order_x] = np.arange(1, len(off) + 1)
    off["rank_effect"] = rank_e
    off["rank_extent"] = rank_x
    off = off.sort_values("rank_effect", kind="stable").reset_index(drop=True)
    off["rank_effect"] = off["rank_effect"].astype("Int64")
    off["rank_extent"] = off["rank_extent"].astype("Int64")
    return off


def _target_table(
    atlas, targets, target_leaves, target_names, w_target, effect, z, surv_f, shares: Shares
) -> pd.DataFrame:
    """One row per target region and one for all targets together."""
    n_surv = shares.n_surviving
    tgt = _region_frame(
        atlas, np.asarray(list(targets), dtype=np.int64), effect, z, surv_f, n_surv, []
    )
    tgt.insert(0, "kind", "target")
    fin_e = np.isfinite(effect)
    tiny = np.finfo(float).tiny
    combined = {
        "kind": "targets",
        "index": -1,
        "name": " + ".join(target_names),
        "hemisphere": "",
        "volume_mm3": float(sum(atlas.regions["mask_volume_mm3"].iloc[r] for r in target_leaves)),
        "mean_effect": float((w_target * fin_e) @ np.where(fin_e, effect, 0.0))
        / max(float(w_target @ fin_e), tiny),
        "mean_z": float(np.nansum(w_target * z) / max(w_target.sum(), tiny)),
        "surviving_voxels": float(w_target @ surv_f),
        "surviving_share": float(w_target @ surv_f) / max(w_target.sum(), tiny),
        "activation_share": shares.target_share,
        "artefact_label": False,
    }
    tgt = pd.concat([tgt, pd.DataFrame([combined])], ignore_index=True)
    tgt["rank_effect"] = pd.array([pd.NA] * len(tgt), dtype="Int64")
    tgt["rank_extent"] = pd.array([pd.NA] * len(tgt), dtype="Int64")
    return tgt


def inner_layer(
    mask: np.ndarray,
    distance_voxels: int = DEFAULT_SHELL_VOXELS,
    connectivity: int = DEFAULT_SHELL_CONNECTIVITY,
) -> np.ndarray:
    """In-mask voxels of the layer just inside the edge shell, of the same thickness.

    Parameters and erosion as :func:`edge_shell`; returns ``(V,)`` bool.
    """
    mask = np.asarray(mask, dtype=bool)
    edge_shell(mask, distance_voxels, connectivity)  # validates the arguments
    return _inner_layer(mask, int(distance_voxels), connectivity)


# --------------------------------------------------------------------------------------
# Consistency across animals
# --------------------------------------------------------------------------------------

#: Two-sided normal quantile of the per-animal confidence intervals (σ̂² is treated as
#: known within an animal, so the interval is normal-based; common practice).
_Z_CRIT = float(norm_ppf(0.5 + CONFIDENCE_LEVEL / 2.0))


@dataclass(frozen=True)
class Consistency:
    """The target effect animal by animal, its between-animal share and a LOO refit.

    Attributes
    ----------
    animals
        One row per animal: ``animal, runs, effect, se, ci_low, ci_high`` (normal 95%
        CI), ``positive`` (effect > 0), ``ci_above_zero``, and the leave-this-animal-out
        refit ``loo_effect, loo_t, loo_change`` (LOO effect − full effect).
    effect, se, t, df, p
        The full-data group effect of the target values.
    var_animal, var_run, icc
        REML τ², σ² and ``τ² / (τ² + σ²)``.
    n_positive, n_ci_above_zero, n_animals
        Counts over animals with data.
    most_influential
        The animal whose removal moves the effect most (largest |loo_change|).
    """

    animals: pd.DataFrame
    effect: float
    se: float
    t: float
    df: float
    p: float
    var_animal: float
    var_run: float
    icc: float
    n_positive: int
    n_ci_above_zero: int
    n_animals: int
    most_influential: str

    def table(self) -> pd.DataFrame:
        """One row per animal (see ``animals``)."""
        return self.animals.copy()

    def summary(self) -> dict:
        """Plain JSON types for summary.json."""
        row = self.animals[self.animals["animal"] == self.most_influential]
        return {
            "effect": _float(self.effect),
            "se": _float(self.se),
            "t": _float(self.t),
            "df": _float(self.df),
            "p": _float(self.p),
            "var_animal": _float(self.var_animal),
            "var_run": _float(self.var_run),
            "icc": _float(self.icc),
            "animals": int(self.n_animals),
            "animals_positive": int(self.n_positive),
            "animals_ci_above_zero": int(self.n_ci_above_zero),
            "most_influential_animal": self.most_influential,
            "most_influential_change": _float(row["loo_change"].iloc[0]) if len(row) else None,
            "loo_effect_range": [
                _float(np.nanmin(self.animals["loo_effect"])),
                _float(np.nanmax(self.animals["loo_effect"])),
            ],
        }


def _design_inputs(X, animal, n_runs: int, where: str):
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    animal = np.asarray(animal, dtype=np.int64).reshape(-1)
    if X.shape[0] != n_runs or animal.shape != (n_runs,):
        raise ArgumentError(
            f"{where}: {n_runs} runs of data but the design has {X.shape[0]} rows and "
            f"{animal.size} animal codes; give one design row and code per run."
        )
    return X, animal


def _test(values, variances, X, animal, c, estimate_run_variance, terms=None, model_df=None):
    fit = fit_terms(
        values, variances, X, animal, terms, estimate_run_variance=estimate_run_variance
    )
    present = np.isfinite(values)
    if variances is not None:
        present &= np.isfinite(variances)
    if model_df is None:
        df = between_animal_df(X, animal, present, c)
    else:
        df = model_df(fit, present, c)
    res = test_contrast(fit, c, df)
    return fit, res


def consistency(
    values: np.ndarray,
    variances: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    animal_ids: Sequence[str],
    c: np.ndarray,
    *,
    estimate_run_variance: bool = True,
    terms: RandomTerms | None = None,
    model_df: ModelDf | None = None,
) -> Consistency:
    """Consistency of the target effect across animals.

    Parameters
    ----------
    values
        ``(n_runs,)`` the target-region effect of each run (NaN: no data).
    variances
        ``(n_runs,)`` first-level variances of those values, or None.
    X, animal
        Group design ``(n_runs, p)`` and animal codes ``0..m-1``.
    animal_ids
        Names of the animals, position = code.
    c
        ``(p,)`` contrast.
    estimate_run_variance
        Estimate σ² (else fixed at 0).
    terms
        The random terms of the model the contrast was fitted with (default a random
        intercept per animal); the group test and the leave-one-out refits use them.
    model_df
        ``model_df(fit, present, c) -> df``: the group map's df rule for the full-data
        test (default between-animal df; the leave-one-out refits always use it).

    Returns
    -------
    Consistency

    Notes
    -----
    Each animal's effect is the precision-weighted mean of its runs, weights
    ``w_k = 1 / (σ̂² + s_k²)``, standard error ``sqrt(1 / Σ w_k)``, and a normal-based 95%
    confidence interval (σ̂² treated as known). Where σ̂² = 0 and no first-level variance is
    given the weights are undefined: the effect is the plain mean and the SE is NaN.
    The leave-one-animal-out refit drops all runs of one animal and refits the same REML
    model (t on the between-animal degrees of freedom of the remaining animals).

    References
    ----------
    Shrout PE, Fleiss JL (1979). Psychol Bull 86:420-428.

    Borenstein M, Hedges LV, Higgins JPT, Rothstein HR (2009). Introduction to
    Meta-Analysis. Wiley.
    """
    values, s2, X, animal, animal_ids = _consistency_inputs(
        values, variances, X, animal, animal_ids
    )
    fit, res = _test(
        values[:, None],
        None if s2 is None else s2[:, None],
        X,
        animal,
        c,
        estimate_run_variance,
        terms,
        model_df,
    )
    tau2, sig2 = float(fit.var_animal[0]), float(fit.var_run[0])
    icc = tau2 / (tau2 + sig2) if (tau2 + sig2) > 0 else float("nan")
    full = float(res.effect[0])
    table, has = _animal_effects(
        values,
        s2,
        X,
        animal,
        c,
        animal_ids,
        var_run=sig2,
        full=full,
        estimate_run_variance=estimate_run_variance,
        terms=terms,
    )
    return Consistency(
        animals=table,
        effect=full,
        se=float(res.se[0]),
        t=float(res.t[0]),
        df=float(res.df[0]),
        p=float(res.p[0]),
        var_animal=tau2,
        var_run=sig2,
        icc=float(icc),
        n_positive=int(table["positive"].sum()),
        n_ci_above_zero=int(table["ci_above_zero"].sum()),
        n_animals=int(has.sum()),
        most_influential=_most_influential(table["loo_change"].to_numpy(), animal_ids),
    )


def _consistency_inputs(values, variances, X, animal, animal_ids):
    """The inputs of :func:`consistency` as arrays, checked against each other.

    Returns
    -------
    values, s2, X, animal, animal_ids
        ``(n_runs,)`` values, ``(n_runs,)`` variances or None, the design ``(n_runs, p)``,
        the animal codes and the animal names as strings.
    """
    values = np.asarray(values, dtype=float).reshape(-1)
    n = values.size
    X, animal = _design_inputs(X, animal, n, "consistency")
    animal_ids = [str(a) for a in animal_ids]
    m = len(animal_ids)
    if n and (animal.min() < 0 or animal.max() >= m):
        raise ArgumentError(f"consistency: animal codes must lie in 0..{m - 1} ({m} animal names).")
    s2 = None
    if variances is not None:
        s2 = np.asarray(variances, dtype=float).reshape(-1)
        if s2.shape != (n,):
            raise ArgumentError(f"consistency: {s2.size} variances for {n} runs.")
    return values, s2, X, animal, animal_ids


def _animal_effects(
    values: np.ndarray,
    s2: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    c: np.ndarray,
    animal_ids: list[str],
    *,
    var_run: float,
    full: float,
    estimate_run_variance: bool,
    terms: RandomTerms | None = None,
) -> tuple[pd.DataFrame, np.ndarray]:
    """Each animal's effect with its 95% CI, and the leave-this-animal-out refit.

    Returns
    -------
    table
        The ``animals`` table of :class:`Consistency`.
    has
        ``(m,)`` bool: the animal has runs with data.
    """
    m = len(animal_ids)
    present = np.isfinite(values) & (np.isfinite(s2) if s2 is not None else True)
    means = animal_means(
        values[:, None],
        animal,
        n_animals=m,
        variance=None if s2 is None else s2[:, None],
        var_run=var_run,
    )
    eff, se, runs = means.mean[:, 0], means.se[:, 0], means.runs[:, 0]
    loo_e, loo_t = _leave_each_animal_out(
        values, s2, X, animal, c, present, m, estimate_run_variance, terms
    )
    change = loo_e - full
    has = runs > 0
    lo, hi = eff - _Z_CRIT * se, eff + _Z_CRIT * se
    table = pd.DataFrame(
        {
            "animal": animal_ids,
            "runs": runs.astype(np.int64),
            "effect": eff,
            "se": se,
            "ci_low": lo,
            "ci_high": hi,
            "positive": has & (np.nan_to_num(eff) > 0),
            "ci_above_zero": has & (np.nan_to_num(lo, nan=-np.inf) > 0),
            "loo_effect": loo_e,
            "loo_t": loo_t,
            "loo_change": change,
        }
    )
    return table, has


def _most_influential(change: np.ndarray, animal_ids: list[str]) -> str:
    """The animal with the largest |LOO change| of the effect ("" when none is finite)."""
    abs_change = np.where(np.isfinite(change), np.abs(change), -np.inf)
    return animal_ids[int(np.argmax(abs_change))] if np.isfinite(abs_change).any() else ""


def _leave_each_animal_out(values, s2, X, animal, c, present, m, estimate_run_variance, terms=None):
    """Effect and t of the same REML model refitted without each animal in turn (NaN for
    an animal without runs or when fewer than two runs would remain)."""
    loo_e = np.full(m, np.nan)
    loo_t = np.full(m, np.nan)
    for a in range(m):  # one small refit per animal
        keep = (animal != a) & present
        if not present[animal == a].any() or keep.sum() < 2:
            continue
        kept, codes = np.unique(animal[keep], return_inverse=True)
        sub = None if terms is None else terms.subset(keep, np.isin(np.arange(m), kept))
        _, r = _test(
            values[keep][:, None],
            None if s2 is None else s2[keep][:, None],
            X[keep],
            codes,
            c,
            estimate_run_variance,
            sub,
        )
        loo_e[a], loo_t[a] = float(r.effect[0]), float(r.t[0])
    return loo_e, loo_t


@dataclass(frozen=True)
class LooMaps:
    """Voxelwise group maps refitted without each animal.

    Attributes
    ----------
    animal_ids
        Names of the animals, position = code.
    t_full, effect_full
        ``(V,)`` full-data t and effect maps.
    effect
        ``(m, V)`` the group effect map without each animal (NaN row when that refit
        was not possible); None in the answers of a group map, which keep only the
        numbers below once the run quality has read the maps.
    correlation
        ``(m,)`` Pearson correlation of each LOO t map with the full t map (over voxels
        finite in both).
    max_abs_dt
        ``(m,)`` largest |LOO t − full t|.
    """

    animal_ids: tuple[str, ...]
    t_full: np.ndarray
    effect_full: np.ndarray
    effect: np.ndarray | None
    correlation: np.ndarray
    max_abs_dt: np.ndarray

    def table(self) -> pd.DataFrame:
        """One row per animal: ``animal, t_correlation, max_abs_delta_t``."""
        return pd.DataFrame(
            {
                "animal": list(self.animal_ids),
                "t_correlation": self.correlation,
                "max_abs_delta_t": self.max_abs_dt,
            }
        )

    def summary(self) -> dict:
        """Plain JSON types for summary.json."""
        finite = np.isfinite(self.correlation)
        worst = int(np.argmin(np.where(finite, self.correlation, np.inf))) if finite.any() else -1
        return {
            "t_correlation": {
                a: _float(r) for a, r in zip(self.animal_ids, self.correlation, strict=True)
            },
            "max_abs_delta_t": {
                a: _float(d) for a, d in zip(self.animal_ids, self.max_abs_dt, strict=True)
            },
            "least_similar_animal": self.animal_ids[worst] if worst >= 0 else "",
        }


def row_correlations(
    a: np.ndarray,
    b: np.ndarray,
    a_rows: np.ndarray | None = None,
    b_rows: np.ndarray | None = None,
    where: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Pearson correlation of rows of ``a`` with rows of ``b`` over the voxels finite in
    both (and in ``where``), NaN with fewer than three such voxels.

    Parameters
    ----------
    a, b
        ``(ka, V)`` and ``(kb, V)`` maps (float32 or float64; read as they are, no copy).
    a_rows, b_rows
        ``(k,)`` the rows paired: row ``a_rows[i]`` of ``a`` with row ``b_rows[i]`` of
        ``b`` (default: every row of ``a``, each with the same row of ``b``, or with the
        only row of ``b``).
    where
        ``(V,)`` bool: the voxels the correlation is taken over (default all).

    Returns
    -------
    r, n
        ``(k,)`` the correlations and the voxels each was taken over.
    """
    a, b = np.atleast_2d(np.asarray(a)), np.atleast_2d(np.asarray(b))
    if a_rows is None:
        a_rows = np.arange(len(a))
    if b_rows is None:
        b_rows = np.zeros(len(a_rows), np.int64) if len(b) == 1 else np.asarray(a_rows)
    if where is None:
        where = np.ones(a.shape[1], dtype=bool)
    r, n = np.empty(len(a_rows)), np.zeros(len(a_rows), dtype=np.int64)
    _nb_row_correlations(
        a,
        b,
        np.asarray(a_rows, dtype=np.int64),
        np.asarray(b_rows, dtype=np.int64),
        np.asarray(where, dtype=bool),
        r,
        n,
    )
    return r, n


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_row_correlations(a, b, a_rows, b_rows, where, r, n):
    """The loops of :func:`row_correlations`: means, then centred cross-products."""
    for i in range(len(a_rows)):
        x, y = a[a_rows[i]], b[b_rows[i]]
        count, sx, sy = 0, 0.0, 0.0
        for j in range(x.shape[0]):
            if where[j] and np.isfinite(x[j]) and np.isfinite(y[j]):
                count += 1
                sx += x[j]
                sy += y[j]
        mx, my = sx / count, sy / count
        sxy, sxx, syy = 0.0, 0.0, 0.0
        for j in range(x.shape[0]):
            if where[j] and np.isfinite(x[j]) and np.isfinite(y[j]):
                dx, dy = x[j] - mx, y[j] - my
                sxy += dx * dy
                sxx += dx * dx
                syy += dy * dy
        n[i] = count
        r[i] = sxy / np.sqrt(sxx * syy) if count > 2 else np.nan


def loo_group_maps(
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    c: np.ndarray,
    df_fn: Callable[..., np.ndarray] = between_animal_df,
    *,
    animal_ids: Sequence[str] | None = None,
    estimate_run_variance: bool = True,
    var_animal: np.ndarray | None = None,
    var_run: np.ndarray | None = None,
    components: dict[str, np.ndarray] | None = None,
    terms: RandomTerms | None = None,
    chunk: int | None = None,
    workers: int = 1,
) -> LooMaps:
    """The voxelwise group map leaving out each animal in turn.

    With the full fit's variance components (``var_animal``, ``var_run``) the maps are
    exact downdates of the GLS solution at those components
    (:func:`grouplevel.model.leave_one_out.leave_one_animal_out`: one pass over the
    data, whatever the number of animals). Without them, every animal's map is a full
    REML refit (variance components re-estimated; one whole-map fit per animal). With
    ``components`` (the fit's components by name) and ``terms`` (its random slopes,
    sessions, variance groups) the downdate uses the covariance of that model
    (:func:`grouplevel.model.leave_one_out.leave_one_animal_out_model`); ``var_animal``
    and ``var_run`` are then not needed.

    Parameters
    ----------
    y, variance
        ``(n_runs, V)`` run effect maps and first-level variances (or None); float32
        is kept as it is (each chunk is converted to float64 on its own).
    X, animal, c
        Design, animal codes ``0..m-1``, contrast.
    df_fn
        ``df_fn(X, animal, present, c) -> (V,)`` degrees of freedom (default
        :func:`grouplevel.model.between_animal_df`).
    animal_ids
        Names of the animals (default "0", "1", ...).
    estimate_run_variance
        Estimate σ² (else fixed at 0); used by the refits only.
    var_animal, var_run
        ``(V,)`` the full fit's τ̂² and σ̂²: downdate at these instead of refitting.
    chunk
        Voxels downdated together (default: all at once); the numbers of a voxel do not
        depend on it (:func:`grouplevel.model.memory.chunk_voxels` sizes it for a
        budget). The refits without variance components are not chunked.
    workers
        Threads that downdate chunks side by side (default 1). Each then takes parts
        of ``chunk // (workers · PARTS_PER_WORKER)`` voxels, so the memory held at once
        stays within that of one ``chunk``; no number depends on it (each voxel is
        downdated on its own).

    Returns
    -------
    LooMaps

    References
    ----------
    Patterson HD, Thompson R (1971). Biometrika 58:545-554.
    """
    y = np.asarray(y)
    if y.ndim != 2:
        raise ArgumentError(f"loo_group_maps: y must be (runs, voxels), got shape {y.shape}.")
    X, animal = _design_inputs(X, animal, y.shape[0], "loo_group_maps")
    m = int(animal.max()) + 1
    ids = tuple(str(a) for a in (animal_ids if animal_ids is not None else range(m)))
    s2 = None if variance is None else np.asarray(variance)
    if components is not None or (var_animal is not None and var_run is not None):
        maps = _downdated_maps(
            y, s2, X, animal, c, len(ids), estimate_run_variance, var_animal, var_run,
            components, terms, max(1, y.shape[1] if chunk is None else chunk), workers,
        )  # fmt: skip
    else:
        maps = _refitted_maps(y, s2, X, animal, c, df_fn, len(ids), estimate_run_variance, terms)
    effect_full, t_full, effect, t_loo, max_dt = maps
    return LooMaps(
        animal_ids=ids,
        t_full=t_full,
        effect_full=effect_full,
        effect=effect,
        correlation=row_correlations(t_loo, t_full)[0],
        max_abs_dt=max_dt,
    )


def _downdated_maps(
    y, s2, X, animal, c, n_ids, estimate_run_variance, var_animal, var_run, components, terms,
    chunk, workers=1,
):  # fmt: skip
    """The leave-one-out maps by downdating, ``chunk`` voxels at a time (``workers``
    parts of ``chunk // (workers · PARTS_PER_WORKER)`` side by side): full effect and
    t, (n_ids, V) effect and t without each animal, and the (n_ids,) largest |Δt|."""
    n_vox = y.shape[1]
    m = int(animal.max()) + 1
    # a group map needs two animals: without such an animal there is none
    too_few = np.array([np.unique(animal[animal != a]).size < 2 for a in range(m)])
    effect_full, t_full = np.full(n_vox, np.nan), np.full(n_vox, np.nan)
    effect, t_loo = np.full((n_ids, n_vox), np.nan), np.full((n_ids, n_vox), np.nan)
    workers = max(1, min(int(workers), -(-n_vox // chunk)))
    # several parts per thread, so that the threads finish together
    part_chunk = max(1, chunk // (workers * (PARTS_PER_WORKER if workers > 1 else 1)))

    def one_chunk(sl: slice) -> np.ndarray:
        """Downdate the voxels ``sl`` into the output arrays; their |Δt| (n_ids, k)."""
        ss = None if s2 is None else s2[:, sl]
        if components is not None:
            part = {k: np.asarray(v)[sl] for k, v in components.items()}
            down = leave_one_animal_out_model(y[:, sl], ss, X, animal, c, part, terms)
        else:
            down = leave_one_animal_out(
                y[:, sl], ss, X, animal, c, var_animal[sl], var_run[sl],
                estimate_run_variance=estimate_run_variance, chunk=part_chunk,
            )  # fmt: skip
        down.effect[too_few] = down.t[too_few] = np.nan
        effect_full[sl], t_full[sl] = down.effect_full, down.t_full
        effect[:m, sl], t_loo[:m, sl] = down.effect, down.t
        with np.errstate(invalid="ignore"):
            return _largest_finite(np.abs(t_loo[:, sl] - t_full[None, sl]))

    slices = voxel_chunks(n_vox, part_chunk)
    if workers == 1:
        per_chunk = [one_chunk(sl) for sl in slices]
    else:  # numpy's linear algebra and einsum release the GIL: threads share the cores
        with ThreadPoolExecutor(max_workers=workers) as pool:
            per_chunk = list(pool.map(one_chunk, slices))
    if not per_chunk:
        return effect_full, t_full, effect, t_loo, np.full(n_ids, np.nan)
    largest = np.stack(per_chunk).max(axis=0)  # -inf where no chunk had a finite |Δt|
    return effect_full, t_full, effect, t_loo, np.where(np.isfinite(largest), largest, np.nan)


def _largest_finite(dt: np.ndarray) -> np.ndarray:
    """The largest finite value of each row of ``dt`` (-inf where none is finite)."""
    if not dt.shape[1]:
        return np.full(dt.shape[0], -np.inf)
    return np.where(np.isfinite(dt), dt, -np.inf).max(axis=1)


def _refitted_maps(y, s2, X, animal, c, df_fn, n_ids, estimate_run_variance, terms):
    """The leave-one-out maps by a whole-map REML refit per animal (no components)."""
    m = int(animal.max()) + 1

    def fit_t(rows: np.ndarray):
        codes = np.unique(animal[rows], return_inverse=True)[1]
        yy = np.asarray(y[rows], dtype=float)
        ss = None if s2 is None else np.asarray(s2[rows], dtype=float)
        kept = np.isin(np.arange(m), np.unique(animal[rows]))
        sub = None if terms is None else terms.subset(rows, kept)
        fit = fit_terms(yy, ss, X[rows], codes, sub, estimate_run_variance=estimate_run_variance)
        present = np.isfinite(yy) if ss is None else np.isfinite(yy) & np.isfinite(ss)
        res = test_contrast(fit, c, df_fn(X[rows], codes, present, c))
        return res.effect, res.t

    n_vox = y.shape[1]
    effect_full, t_full = fit_t(np.ones(y.shape[0], dtype=bool))
    effect = np.full((n_ids, n_vox), np.nan)
    t_loo = np.full((n_ids, n_vox), np.nan)
    for a in range(n_ids):  # one vectorised whole-map fit per animal
        rows = animal != a
        if rows.all() or np.unique(animal[rows]).size < 2:
            continue
        effect[a], t_loo[a] = fit_t(rows)
    with np.errstate(invalid="ignore"):
        dt = np.abs(t_loo - t_full[None])
    max_dt = np.where(
        np.isfinite(dt).any(axis=1),
        np.nanmax(np.where(np.isfinite(dt), dt, -np.inf), axis=1),
        np.nan,
    )
    return effect_full, t_full, effect, t_loo, max_dt
