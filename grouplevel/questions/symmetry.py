"""Left/right symmetry of a group effect: mirroring, laterality, hemispheric tests, verdict.

A reviewer who sees an effect on one side asks whether the other side responds as well,
and whether the two sides differ. This module answers with four kinds of numbers and one
written rule that turns them into plain words:

* **Mirroring** (:func:`mirror_index`): every in-mask voxel is paired with the voxel at its
  mirror position about the mid-sagittal plane ``x = midline_mm`` in world coordinates.
  :func:`asymmetry_data` turns each run's map into a left-minus-right map on the left half,
  which goes through the same REML model and permutation inference as the main maps.
* **Laterality indices** (:func:`laterality`): ``LI = (L − R) / (L + R)`` on the
  suprathreshold extent and on the summed positive effect of a region pair, with
  bootstrap confidence intervals over animals (:func:`bootstrap_li`) and a threshold-free
  LI curve (:func:`threshold_free_li`).
* **Hemispheric test** (:func:`hemisphere_test`): the per-run region means ``L − R`` in
  the run-within-animal REML model, with a two one-sided tests (TOST) equivalence test
  against a margin derived from a bound on ``|LI|``.
* **Verdict** (:func:`symmetry_verdict`): "no activation", "unilateral", "left-/right-
  dominant", "bilateral (equivalence shown)" or "bilateral, asymmetry not excluded",
  each with the sentences and numbers that decided it. The verdict is sign-aware: a
  significant negative response is a response ("negative response, bilateral ..."), and
  ``[inference] sided`` says which signs count. The LIs of a negative response are
  computed on the sign-flipped maps. The rule is written out in
  ``docs/verdicts-symmetry.md``.

:func:`analyse_symmetry` runs all of it for a list of region names;
:func:`symmetry_table` and :func:`li_curves` lay the results out as tables.

Every function is pure: arrays in, arrays / frozen dataclasses / DataFrames out.

References
----------
Seghier ML (2008). Laterality index in functional MRI: methodological issues. Magn Reson
Imaging 26:594-601.

Matsuo K, Chen SHA, Tseng WYI (2012). AveLI: a robust lateralization index in functional
magnetic resonance imaging using unbiased threshold-free computation. J Neurosci Methods
205:119-129.

Schuirmann DJ (1987). A comparison of the two one-sided tests procedure and the power
approach for assessing the equivalence of average bioavailability. J Pharmacokinet
Biopharm 15:657-680.

Efron B, Tibshirani RJ (1993). An Introduction to the Bootstrap. Chapman & Hall
(percentile intervals, ch. 13; chapter from memory).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, NamedTuple

import numpy as np
import pandas as pd
import scipy.sparse as sp

from grouplevel.anatomy.coordinates import MIDLINE_TOLERANCE_MM
from grouplevel.distributions import norm_isf, norm_sf, t_cdf, t_isf, t_ppf, t_sf
from grouplevel.errors import ArgumentError, UserError
from grouplevel.inference.significance import DEFAULT_ALPHA
from grouplevel.model import between_animal_df, test_contrast
from grouplevel.model.animals import animal_means
from grouplevel.model.marginal import ModelDf, RandomTerms, fit_terms
from grouplevel.model.memory import BOOTSTRAP_ARRAYS, chunk_rows, chunk_voxels, voxel_chunks
from grouplevel.questions.verdicts import (  # noqa: F401  (the rule's names, re-exported here)
    BILATERAL_EQUIVALENT,
    BILATERAL_UNRESOLVED,
    DOMINANT,
    LATERALISATION_DIFFERS,
    LATERALISATION_NOT_SHOWN,
    NEGATIVE_PREFIX,
    NO_ACTIVATION,
    ONE_SIDE_ONLY,
    OPPOSITE_SIGNS,
    SIDES,
    SIGNS,
    SIGNS_COUNTED,
    UNCLEAR,
    UNILATERAL,
    Verdict,
    _float,
    _fmt_p,
    _sign_of,
    counted_signs,
    symmetry_verdict,
)

if TYPE_CHECKING:  # types only: the atlas is read and built by the shell
    from grouplevel.anatomy.atlas import Atlas
from grouplevel.questions.sides import split_side

# --------------------------------------------------------------------------------------
# Defaults (the study file's [questions] section may override every one of them)
# --------------------------------------------------------------------------------------

#: Equivalence margin on |LI|: ±0.2, a common convention for |LI| (value from memory).
DEFAULT_EQUIVALENCE_MARGIN = 0.2

#: z above which a voxel counts towards the extent LI: one-sided p < 0.001 uncorrected,
#: the usual voxel threshold of laterality work (common practice).
DEFAULT_EXTENT_Z = float(norm_isf(0.001))

#: Bootstrap replicates (common practice for percentile intervals; Efron & Tibshirani
#: 1993 suggest at least 1000 for interval end points, value from memory).
DEFAULT_BOOTSTRAP = 1000

#: Level of the confidence intervals (common practice).
CONFIDENCE_LEVEL = 0.95

#: Number of thresholds of the threshold-free LI curve (our own choice; enough for a
#: smooth curve, cheap to compute).
DEFAULT_LI_THRESHOLDS = 50

#: Replicates computed together in the bootstrap (working arrays hold this many rows of
#: the pair's voxels; our own choice).
_BOOT_CHUNK = 256

#: Weightings of the threshold-free LI.
TF_WEIGHTINGS = ("mean", "threshold")


# --------------------------------------------------------------------------------------
# Mirroring
# --------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class MirrorMap:
    """Mirror partner of every in-mask voxel about the plane ``x = midline_mm``.

    Attributes
    ----------
    index
        ``(V,)`` int: in-mask index (C order) of the voxel at the mirror position, -1 where
        the mirror position falls outside the mask or the grid.
    left, right
        ``(V,)`` bool: the voxel centre lies left (x < midline) / right (x > midline) of the
        plane by more than :data:`grouplevel.atlas.MIDLINE_TOLERANCE_MM`; voxels on the
        plane are in neither half.
    mask
        The 3-D analysis mask the indices refer to.
    midline_mm
        World x of the plane.
    """

    index: np.ndarray
    left: np.ndarray
    right: np.ndarray
    mask: np.ndarray
    midline_mm: float

    def half_mask(self, half: np.ndarray) -> np.ndarray:
        """3-D mask of the in-mask voxels selected by the ``(V,)`` bool ``half``.

        Its voxels, in C order, are the columns of :func:`asymmetry_data`'s output, so it
        is the mask to hand to the inference of an asymmetry map.
        """
        half = np.asarray(half, dtype=bool)
        if half.shape != self.index.shape:
            raise ValueError(f"half has {half.size} values for {self.index.size} voxels")
        out = np.zeros(self.mask.shape, dtype=bool)
        out[self.mask] = half
        return out

    def summary(self) -> dict:
        paired = self.index >= 0
        return {
            "midline_mm": float(self.midline_mm),
            "voxels_left": int(self.left.sum()),
            "voxels_right": int(self.right.sum()),
            "voxels_on_midline": int((~self.left & ~self.right).sum()),
            "left_voxels_with_mirror": int((self.left & paired).sum()),
            "right_voxels_with_mirror": int((self.right & paired).sum()),
        }


def mirror_index(mask: np.ndarray, affine: np.ndarray, midline_mm: float) -> MirrorMap:
    """Pair every in-mask voxel with its mirror voxel about ``x = midline_mm``.

    Each voxel centre is reflected in world space (``x → 2·midline − x``), brought back to
    voxel coordinates with the inverse affine and rounded to the nearest voxel. A pairing
    is kept only when it is mutual (the mirror's mirror is the voxel itself) and joins a
    left-half voxel to a right-half voxel, so that mirroring twice is the identity
    wherever a mirror is defined and no voxel is paired with itself or with a voxel of its
    own side (possible within half a voxel of the plane on tilted grids). On grids whose
    axes are aligned with the world axes every pairing is mutual.

    Parameters
    ----------
    mask
        3-D boolean analysis mask.
    affine
        Its 4 × 4 voxel → world (mm) affine.
    midline_mm
        World x of the mid-sagittal plane (:attr:`grouplevel.atlas.Atlas.midline_mm`).

    Returns
    -------
    MirrorMap
    """
    mask = np.asarray(mask, dtype=bool)
    affine = np.asarray(affine, dtype=float)
    if mask.ndim != 3:
        raise ValueError(f"mask must be 3-D, got shape {mask.shape}")
    if affine.shape != (4, 4) or not np.all(np.isfinite(affine)):
        raise ValueError("affine must be a finite 4 x 4 matrix")
    midline_mm = float(midline_mm)
    ijk = np.argwhere(mask)
    n = len(ijk)
    world_x = ijk @ affine[0, :3] + affine[0, 3]
    reflect = np.eye(4)
    reflect[0, 0] = -1.0
    reflect[0, 3] = 2.0 * midline_mm
    to_voxel = np.linalg.inv(affine) @ reflect @ affine
    target = ijk @ to_voxel[:3, :3].T + to_voxel[:3, 3]
    nearest = np.floor(target + 0.5).astype(np.int64)
    inside = np.all((nearest >= 0) & (nearest < np.array(mask.shape)), axis=1)
    position = np.full(mask.shape, -1, dtype=np.int64)
    position[mask] = np.arange(n)
    index = np.full(n, -1, dtype=np.int64)
    index[inside] = position[tuple(nearest[inside].T)]
    paired = index >= 0
    mutual = np.zeros(n, dtype=bool)
    mutual[paired] = index[index[paired]] == np.flatnonzero(paired)
    offset = world_x - midline_mm
    left = offset < -MIDLINE_TOLERANCE_MM
    right = offset > MIDLINE_TOLERANCE_MM
    partner = np.where(mutual, index, 0)
    across = (left & right[partner]) | (right & left[partner])
    index[~(mutual & across)] = -1
    return MirrorMap(
        index=index,
        left=left,
        right=right,
        mask=mask,
        midline_mm=midline_mm,
    )


class AsymmetryData(NamedTuple):
    """Left-minus-right run maps on the left half (unpacks as ``y, variance, half``)."""

    y: np.ndarray  # (n_runs, n_kept): left value minus its mirror's value
    variance: np.ndarray | None  # (n_runs, n_kept): sum of the two first-level variances
    half: np.ndarray  # (V,) bool: in-mask voxels kept (left half with a mirror)


def asymmetry_data(
    y: np.ndarray,
    variance: np.ndarray | None,
    mirror: MirrorMap,
    columns: slice | None = None,
) -> AsymmetryData:
    """Per run, each left-half voxel's value minus its mirror voxel's value.

    Parameters
    ----------
    y
        ``(n_runs, V)`` first-level effects at the in-mask voxels (NaN: no data); float32
        is kept as it is, only the kept columns are converted to float64.
    variance
        ``(n_runs, V)`` their first-level variances, or None.
    mirror
        From :func:`mirror_index` on the same mask.
    columns
        A slice of the kept voxels (default all): only those columns are computed, so a
        caller can go through the kept voxels one chunk at a time and get the same
        numbers as all at once.

    Returns
    -------
    AsymmetryData
        ``y``: ``(n_runs, n_kept)`` left minus right (``n_kept`` within ``columns``), NaN
        where either side (or, when variances are given, either variance) is missing;
        ``variance``: the sum of the two first-level variances (None when none are
        given); ``half``: the ``(V,)`` bool in-mask selection of all kept voxels (left
        half, mirror defined), in C order.

    Notes
    -----
    The variance of a difference is the sum of the variances only when the first-level
    noise of the two voxels is independent. Noise that is correlated across the midline
    (shared physiological fluctuations, smoothing kernels reaching across it) makes the sum
    an over-estimate for positive correlation; the run-level variance σ² estimated by the
    model absorbs part of any mis-statement.
    """
    y = np.asarray(y)
    n_vox = mirror.index.shape[0]
    if y.ndim != 2 or y.shape[1] != n_vox:
        raise ValueError(f"y must be (runs, {n_vox} in-mask voxels), got {y.shape}")
    half = mirror.left & (mirror.index >= 0)
    kept = np.flatnonzero(half)
    if columns is not None:
        kept = kept[columns]
    partner = mirror.index[kept]
    y_diff = np.asarray(y[:, kept], dtype=float) - np.asarray(y[:, partner], dtype=float)
    var_sum = None
    if variance is not None:
        variance = np.asarray(variance)
        if variance.shape != y.shape:
            raise ValueError(f"variance {variance.shape} and y {y.shape} differ in shape")
        var_sum = np.asarray(variance[:, kept], dtype=float) + np.asarray(
            variance[:, partner], dtype=float
        )
        y_diff = np.where(np.isfinite(var_sum), y_diff, np.nan)
        var_sum = np.where(np.isfinite(y_diff), var_sum, np.nan)
    return AsymmetryData(y=y_diff, variance=var_sum, half=half)


# --------------------------------------------------------------------------------------
# Laterality indices
# --------------------------------------------------------------------------------------


def laterality(left_values, right_values) -> np.ndarray | float:
    """Laterality index ``LI = (L − R) / (L + R)``.

    Parameters
    ----------
    left_values, right_values
        Non-negative amounts for the left and right region (suprathreshold volume, summed
        positive effect ...); arrays broadcast against each other.

    Returns
    -------
    float or ndarray
        +1 for left only, −1 for right only, 0 for balance; NaN where ``L + R = 0``.

    References
    ----------
    Seghier ML (2008). Magn Reson Imaging 26:594-601.
    """
    left = np.asarray(left_values, dtype=float)
    right = np.asarray(right_values, dtype=float)
    if np.any(left < 0) or np.any(right < 0):
        raise ValueError("laterality needs non-negative left and right amounts")
    total = left + right
    with np.errstate(invalid="ignore", divide="ignore"):
        li = np.where(total > 0, (left - right) / np.where(total > 0, total, 1.0), np.nan)
    return float(li) if li.ndim == 0 else li


def _weights(cols: np.ndarray, weights: np.ndarray | None, what: str) -> np.ndarray:
    if weights is None:
        return np.ones(len(cols))
    weights = np.asarray(weights, dtype=float).ravel()
    if weights.shape != cols.shape or np.any(weights < 0):
        raise ValueError(f"{what} must be {len(cols)} non-negative weights")
    return weights


def extent_amount(z: np.ndarray, weights: np.ndarray, threshold: float) -> np.ndarray:
    """Share-weighted count of voxels with ``z > threshold`` (last axis = voxels).

    Multiply by the voxel volume for mm³; the LI does not need it.
    """
    return np.where(np.nan_to_num(z, nan=-np.inf) > threshold, 1.0, 0.0) @ weights


def effect_amount(effect: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Share-weighted sum of ``max(effect, 0)`` (last axis = voxels)."""
    return np.maximum(np.nan_to_num(effect, nan=0.0), 0.0) @ weights


@dataclass(frozen=True)
class BootstrapLI:
    """Bootstrap distribution of the two laterality indices of a region pair.

    Attributes
    ----------
    extent, effect
        LI of suprathreshold extent and of summed positive effect computed with the
        bootstrap's shortcut group map on the original animals.
    extent_ci, effect_ci
        Percentile intervals ``(low, high)`` at ``confidence``; NaN when more than a share
        ``1 − confidence`` of the replicates have no LI (``L + R = 0``).
    extent_replicates, effect_replicates
        ``(n_boot,)`` replicate values (NaN where ``L + R = 0`` in a replicate).
    n_boot, confidence, threshold
        Settings used.
    """

    extent: float
    effect: float
    extent_ci: tuple[float, float]
    effect_ci: tuple[float, float]
    extent_replicates: np.ndarray = field(repr=False)
    effect_replicates: np.ndarray = field(repr=False)
    n_boot: int
    confidence: float
    threshold: float

    def summary(self) -> dict:
        return {
            "li_extent_shortcut": _float(self.extent),
            "li_effect_shortcut": _float(self.effect),
            "li_extent_ci": [_float(v) for v in self.extent_ci],
            "li_effect_ci": [_float(v) for v in self.effect_ci],
            "li_extent_undefined_replicates": int(np.isnan(self.extent_replicates).sum()),
            "li_effect_undefined_replicates": int(np.isnan(self.effect_replicates).sum()),
            "n_boot": int(self.n_boot),
            "confidence": float(self.confidence),
            "extent_threshold_z": float(self.threshold),
        }


def _animal_means(y, present, animal, variance, var_run):
    """(m, V) precision-weighted animal means (0 without data) and (m, V) 'has data'."""
    means = animal_means(y, animal, variance=variance, var_run=var_run, present=present)
    return np.where(means.has_data, means.mean, 0.0), means.has_data


def _pair_animal_means(y, present, animal, variance, var_run, rows, cols, sign):
    """(m, k) animal means and 'has data' of ``sign`` × the runs ``rows`` at the voxels
    ``cols`` (only those are copied, then made float64)."""
    sub = np.ix_(rows, cols)
    sub_var = None if variance is None else np.asarray(np.asarray(variance)[sub], dtype=float)
    sub_run = None if var_run is None else np.asarray(var_run, dtype=float)[cols]
    sub_y = sign * np.asarray(y[sub], dtype=float)
    return _animal_means(sub_y, present[sub], animal, sub_var, sub_run)


def _shortcut_maps(
    counts: np.ndarray, means: np.ndarray, has: np.ndarray, threshold: float
) -> tuple[np.ndarray, np.ndarray]:
    """Group mean and ``z > threshold`` on resampled animals (one row of ``counts`` each).

    ``z`` is the equal-p normal value of the one-sample ``t`` on ``n − 1`` df, so
    ``z > threshold`` is ``t > t_crit(n − 1)`` with ``t_crit`` the t quantile at the
    normal tail probability of ``threshold``: one quantile per possible df instead of a
    z conversion per voxel and replicate.
    """
    n_eff = counts @ has.astype(float)
    s1 = counts @ means
    s2 = counts @ (means**2)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = s1 / n_eff
        var = np.maximum(s2 - n_eff * mean**2, 0.0) / (n_eff - 1.0)
        t = mean / np.sqrt(var / n_eff)
    n_int = np.rint(n_eff).astype(np.int64)
    df = np.arange(counts.shape[1] + 1) - 1.0
    crit = np.full(df.shape, np.inf)  # fewer than two animals: no t, never above
    crit[2:] = t_isf(norm_sf(threshold), df[2:])
    # a zero spread with a positive mean gives t = +inf, above every threshold
    above = np.nan_to_num(t, nan=-np.inf) > crit[n_int]
    return np.where(n_eff > 0, mean, np.nan), above


def bootstrap_li(
    y: np.ndarray,
    present: np.ndarray,
    animal: np.ndarray,
    left_cols: np.ndarray,
    right_cols: np.ndarray,
    *,
    left_weights: np.ndarray | None = None,
    right_weights: np.ndarray | None = None,
    variance: np.ndarray | None = None,
    var_run: np.ndarray | None = None,
    threshold: float = DEFAULT_EXTENT_Z,
    n_boot: int = DEFAULT_BOOTSTRAP,
    confidence: float = CONFIDENCE_LEVEL,
    rng: np.random.Generator,
    rows: np.ndarray | None = None,
    sign: float = 1.0,
    memory_gb: float | None = None,
) -> BootstrapLI:
    """Percentile bootstrap intervals of the extent and effect LIs, resampling animals.

    Animals are drawn with replacement (all runs of an animal go with it). Refitting the
    REML model for every replicate would be slow, so each replicate uses a shortcut group
    map: each animal's precision-weighted mean over its runs (weights ``1/(σ̂² + s_k²)``
    when first-level variances are given, equal weights otherwise) is computed once; a
    replicate's map is the plain mean of the drawn animals' means with the one-sample
    standard error ``sd/√n`` (a duplicate counts twice), ``t = mean/se`` on ``n − 1`` df
    turned into z at equal p. This is the summary-statistics group model, which gives
    the same t as the mixed model when every animal has the same number of runs and
    first-level variance.

    Parameters
    ----------
    y, present
        ``(n_runs, V)`` first-level effects and their presence.
    animal
        ``(n_runs,)`` animal codes ``0..m-1`` (of ``rows`` when given).
    left_cols, right_cols
        In-mask voxel indices (columns of ``y``) of the left and right region.
    left_weights, right_weights
        Each voxel's share in its region (default 1).
    variance, var_run
        Optional ``(n_runs, V)`` first-level variances and ``(V,)`` between-run variance
        σ̂² for the animal means' weights.
    threshold
        z above which a voxel counts towards the extent.
    n_boot, confidence
        Replicates and interval level.
    rng
        Source of the resampling.
    rows
        The runs resampled (rows of ``y``, ``present`` and ``variance``; default all):
        only their values at the pair's voxels are copied.
    sign
        The maps are multiplied by it (−1: the LIs of a negative response).
    memory_gb
        Budget in GiB (``[compute] memory_gb``): the pair's runs are read a chunk of
        voxels at a time (:func:`grouplevel.model.memory.chunk_voxels`), and fewer
        replicates are mapped together when the pair is large (default: all voxels,
        :data:`_BOOT_CHUNK` replicates). The numbers do not depend on it.

    Returns
    -------
    BootstrapLI

    Notes
    -----
    Coverage measured on simulated data (tests/test_symmetry.py): 2 runs per animal,
    left/right regions of 12 voxels with true effects 1.0 and 0.5 (true effect LI 1/3),
    animal SD 0.5, run SD 0.5, 400 data sets × 500 replicates: the 95 % percentile
    interval of the effect LI covered the true value in 94.5 % of data sets with 20
    animals and 92.75 % with 10 animals (the usual under-coverage of percentile
    intervals with few resampling units).

    References
    ----------
    Efron B, Tibshirani RJ (1993). An Introduction to the Bootstrap. Chapman & Hall
    (percentile interval, ch. 13; chapter from memory).

    Seghier ML (2008). Magn Reson Imaging 26:594-601 (bootstrapped LIs).
    """
    y = np.asarray(y)
    present = np.asarray(present, dtype=bool)
    animal = np.asarray(animal, dtype=np.int64)
    rows = np.arange(len(y)) if rows is None else np.asarray(rows, dtype=np.intp).ravel()
    if y.ndim != 2 or present.shape != y.shape or animal.shape != rows.shape:
        raise ValueError("y, present must be (runs, V) and animal (runs,)")
    if int(n_boot) < 1:
        raise ArgumentError(f"n_boot = {n_boot}: a bootstrap needs at least 1 replicate.")
    if not 0.0 < confidence < 1.0:
        raise ValueError("confidence must lie between 0 and 1")
    left_cols = np.asarray(left_cols, dtype=np.int64).ravel()
    right_cols = np.asarray(right_cols, dtype=np.int64).ravel()
    lw = _weights(left_cols, left_weights, "left_weights")
    rw = _weights(right_cols, right_weights, "right_weights")
    cols = np.concatenate([left_cols, right_cols])
    nl = len(left_cols)
    if memory_gb is not None:  # the pair's runs × voxels are read a chunk at a time
        chunk = chunk_voxels(len(rows), memory_gb)
        parts = [
            _pair_animal_means(y, present, animal, variance, var_run, rows, cols[sl], sign)
            for sl in voxel_chunks(len(cols), chunk)
        ]
        means = np.concatenate([p[0] for p in parts], axis=1)
        has = np.concatenate([p[1] for p in parts], axis=1)
    else:
        means, has = _pair_animal_means(y, present, animal, variance, var_run, rows, cols, sign)
    m = means.shape[0]

    def lis(counts):
        mean, above = _shortcut_maps(counts, means, has, threshold)
        ext = laterality(above[:, :nl] @ lw, above[:, nl:] @ rw)
        eff = laterality(effect_amount(mean[:, :nl], lw), effect_amount(mean[:, nl:], rw))
        return np.atleast_1d(ext), np.atleast_1d(eff)

    ext0, eff0 = lis(np.ones((1, m)))
    ext_reps = np.empty(int(n_boot))
    eff_reps = np.empty(int(n_boot))
    # replicates drawn _BOOT_CHUNK at a time (the stream of draws does not depend on
    # the budget), their maps made ``block`` at a time: each replicate is its own
    block = _BOOT_CHUNK
    if memory_gb is not None:
        block = min(block, chunk_rows(len(cols), memory_gb, BOOTSTRAP_ARRAYS))
    for start in range(0, int(n_boot), _BOOT_CHUNK):
        stop = min(int(n_boot), start + _BOOT_CHUNK)
        counts = rng.multinomial(m, np.full(m, 1.0 / m), size=stop - start).astype(float)
        for lo in range(0, stop - start, block):
            hi = min(stop - start, lo + block)
            ext_reps[start + lo : start + hi], eff_reps[start + lo : start + hi] = lis(
                counts[lo:hi]
            )
    tail = (1.0 - confidence) / 2.0

    def interval(reps):
        # Replicates without any voxel on either side have no LI. When more of them than
        # the two tails hold are undefined, the percentile interval of the rest would be
        # conditional on activation being found; it is not reported.
        if np.isnan(reps).mean() > 1.0 - confidence:
            return (float("nan"), float("nan"))
        low, high = np.nanquantile(reps, [tail, 1.0 - tail])
        return (float(low), float(high))

    return BootstrapLI(
        extent=float(ext0[0]),
        effect=float(eff0[0]),
        extent_ci=interval(ext_reps),
        effect_ci=interval(eff_reps),
        extent_replicates=ext_reps,
        effect_replicates=eff_reps,
        n_boot=int(n_boot),
        confidence=float(confidence),
        threshold=float(threshold),
    )


@dataclass(frozen=True)
class ThresholdFreeLI:
    """LI curve across z thresholds and its average.

    Attributes
    ----------
    thresholds
        ``(n,)`` z thresholds, ``z_max · k / n`` for ``k = 0..n-1`` with ``z_max`` the
        largest positive z of the pair (empty when no voxel has a positive z).
    li
        ``(n,)`` extent LI of voxels with ``z > threshold`` at each threshold.
    value
        The average of the curve (see :func:`threshold_free_li`).
    weighting
        ``"mean"`` or ``"threshold"``.
    """

    thresholds: np.ndarray
    li: np.ndarray
    value: float
    weighting: str

    def summary(self) -> dict:
        return {
            "li_threshold_free": _float(self.value),
            "weighting": self.weighting,
            "thresholds": [float(t) for t in self.thresholds],
            "li_curve": [_float(v) for v in self.li],
        }


def threshold_free_li(
    z: np.ndarray,
    left_cols: np.ndarray,
    right_cols: np.ndarray,
    *,
    left_weights: np.ndarray | None = None,
    right_weights: np.ndarray | None = None,
    n_thresholds: int = DEFAULT_LI_THRESHOLDS,
    weighting: str = "mean",
) -> ThresholdFreeLI:
    """Extent LI at many thresholds and its average over the thresholds.

    Thresholds run from 0 to just below the largest positive z of the two regions,
    ``z_max · k / n`` for ``k = 0..n-1``; at each one the LI of the share-weighted counts
    of voxels with ``z > threshold`` is computed. As every threshold lies below ``z_max``
    at least one voxel counts, so ``L + R > 0`` on the whole curve.

    ``weighting="mean"`` (default) averages the curve with equal weights over the
    thresholds (all of which have ``L + R > 0``). ``weighting="threshold"`` weights each
    LI by its threshold, giving stricter thresholds more say, as in the threshold-weighted
    average of Matsuo et al. (2012) (weighting from memory of that paper).

    Parameters
    ----------
    z
        ``(V,)`` group z map (in-mask voxels).
    left_cols, right_cols, left_weights, right_weights
        Region voxels and shares, as in :func:`bootstrap_li`.
    n_thresholds
        Points on the curve.
    weighting
        ``"mean"`` or ``"threshold"``.

    Returns
    -------
    ThresholdFreeLI
        NaN value and empty curve when neither region has a positive z.

    References
    ----------
    Matsuo K, Chen SHA, Tseng WYI (2012). J Neurosci Methods 205:119-129.
    """
    if weighting not in TF_WEIGHTINGS:
        raise ArgumentError(
            f"weighting = {weighting!r} is not a known laterality-index weighting; use one of "
            f"{', '.join(repr(w) for w in TF_WEIGHTINGS)}."
        )
    if int(n_thresholds) < 2:
        raise ArgumentError(f"n_thresholds = {n_thresholds}: give at least 2 thresholds.")
    z = np.asarray(z, dtype=float).ravel()
    left_cols = np.asarray(left_cols, dtype=np.int64).ravel()
    right_cols = np.asarray(right_cols, dtype=np.int64).ravel()
    lw = _weights(left_cols, left_weights, "left_weights")
    rw = _weights(right_cols, right_weights, "right_weights")
    zl = np.nan_to_num(z[left_cols], nan=-np.inf)
    zr = np.nan_to_num(z[right_cols], nan=-np.inf)
    candidates = np.concatenate([zl[lw > 0], zr[rw > 0], [0.0]])
    z_max = float(np.max(candidates))
    if z_max <= 0:
        return ThresholdFreeLI(np.zeros(0), np.zeros(0), float("nan"), weighting)
    thresholds = z_max * np.arange(int(n_thresholds)) / int(n_thresholds)
    above_l = (zl[None, :] > thresholds[:, None]).astype(float) @ lw
    above_r = (zr[None, :] > thresholds[:, None]).astype(float) @ rw
    curve = np.atleast_1d(laterality(above_l, above_r))
    ok = np.isfinite(curve)
    if weighting == "mean":
        value = float(np.mean(curve[ok]))
    else:
        weight = thresholds[ok]
        value = float(np.sum(weight * curve[ok]) / np.sum(weight))
    return ThresholdFreeLI(thresholds=thresholds, li=curve, value=value, weighting=weighting)


# --------------------------------------------------------------------------------------
# Hemispheric difference and equivalence
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class HemisphereTest:
    """Region-mean effects of the two sides, their difference and its equivalence test.

    Every estimate comes from the run-within-animal REML model with the group design
    (intercept only by default; σ² estimated, no first-level variances), tested on the
    between-animal df.

    Attributes
    ----------
    left_effect, left_se, left_p, right_effect, right_se, right_p
        Group mean of each side's region mean, its SE and two-sided p.
    difference, se, t, df, p, ci_low, ci_high
        Group mean of the per-run ``L − R``, its SE, t, df, two-sided p and confidence
        interval at ``confidence``.
    total
        Group mean of the per-run ``L + R`` (the fitted mean of the sum).
    margin_li
        The bound ``m`` on ``|LI|`` that defines equivalence.
    margin
        ``Δ = m · |L̂ + R̂|``, the equivalence bound on the difference.
    tost_p_lower, tost_p_upper, tost_p
        One-sided p of ``H0: difference ≤ −Δ`` and of ``H0: difference ≥ Δ``, and their
        maximum (the TOST p).
    n_runs, n_animals, confidence
    """

    left_effect: float
    left_se: float
    left_p: float
    right_effect: float
    right_se: float
    right_p: float
    difference: float
    se: float
    t: float
    df: float
    p: float
    ci_low: float
    ci_high: float
    total: float
    margin_li: float
    margin: float
    tost_p_lower: float
    tost_p_upper: float
    tost_p: float
    n_runs: int
    n_animals: int
    confidence: float

    def summary(self) -> dict:
        out = {}
        for key, value in self.__dict__.items():
            out[key] = int(value) if key in ("n_runs", "n_animals") else _float(value)
        return out


def tost(difference: float, se: float, df: float, margin: float) -> tuple[float, float, float]:
    """Two one-sided t tests of ``|difference| < margin``.

    Returns
    -------
    (p_lower, p_upper, p)
        ``p_lower = P(T ≥ (d + Δ)/se)`` tests ``H0: d ≤ −Δ``; ``p_upper = P(T ≤ (d − Δ)/se)``
        tests ``H0: d ≥ Δ``; equivalence is shown at level α when ``p = max < α``. NaN
        when se or df is not positive and finite.

    References
    ----------
    Schuirmann DJ (1987). J Pharmacokinet Biopharm 15:657-680.
    """
    if not (np.isfinite(se) and se > 0 and np.isfinite(df) and df > 0):
        return float("nan"), float("nan"), float("nan")
    p_lower = float(t_sf((difference + margin) / se, df))
    p_upper = float(t_cdf((difference - margin) / se, df))
    return p_lower, p_upper, max(p_lower, p_upper)


def _check_margin(margin: float) -> float:
    margin = float(margin)
    if not 0.0 < margin < 1.0:
        raise ArgumentError(
            f"equivalence_margin = {margin}: it bounds |LI|, which lies between "
            "0 and 1; give a value strictly between 0 and 1 (e.g. 0.2)."
        )
    return margin


def hemisphere_test(
    left_values: np.ndarray,
    right_values: np.ndarray,
    animal: np.ndarray,
    *,
    equivalence_margin: float = DEFAULT_EQUIVALENCE_MARGIN,
    confidence: float = CONFIDENCE_LEVEL,
    X: np.ndarray | None = None,
    c: np.ndarray | None = None,
    terms: RandomTerms | None = None,
    model_df: ModelDf | None = None,
) -> HemisphereTest:
    """Test the hemispheric difference of a region pair, and its equivalence to zero.

    The per-run region means ``L``, ``R``, ``L − R`` and ``L + R`` are fitted together with
    :func:`grouplevel.model.fit_reml` (σ² estimated, no first-level variances: the
    run-to-run spread contains the first-level noise of a region mean) with the group
    design ``X`` (default: intercept only), and the group mean ``c`` (default: the
    intercept) is tested with :func:`grouplevel.model.test_contrast` on the
    between-animal df. A run enters ``L − R`` and ``L + R`` only when it has both sides.

    Equivalence: the LI of the region means is ``(L − R)/(L + R)``; ``|LI| ≤ m`` with
    ``L + R > 0`` is ``|L − R| ≤ m (L + R)``, so the margin on the difference is
    ``Δ = m · |L̂ + R̂|`` with the fitted mean of ``L + R``; taking the magnitude makes
    the same margin serve a negative response (both sides below 0), whose LI is that of
    the magnitudes. The TOST p is the larger of
    the two one-sided t-test p-values on the model df. Δ is itself an estimate; treating
    it as fixed ignores its uncertainty, which is small when ``L + R`` is well above 0.

    Parameters
    ----------
    left_values, right_values
        ``(n_runs,)`` region means of each run (NaN: no data).
    animal
        ``(n_runs,)`` animal codes ``0..m-1``.
    equivalence_margin
        The bound ``m`` on ``|LI|``.
    confidence
        Level of the interval of the difference.
    X, c
        ``(n_runs, p)`` group design and ``(p,)`` contrast giving the group mean tested
        (a group mean of a larger design, see :mod:`grouplevel.questions.means`); default the
        intercept-only design and its intercept.
    terms
        The random terms of the model the contrast was fitted with (random slopes,
        sessions, variance groups; default a random intercept per animal): the region
        means are fitted with the same model
        (:func:`grouplevel.model.marginal.fit_terms`).
    model_df
        ``model_df(fit, present, c) -> df``: the degrees-of-freedom rule of the group map
        the contrast comes from (default: between-animal df,
        :func:`grouplevel.model.between_animal_df`).

    Returns
    -------
    HemisphereTest

    References
    ----------
    Schuirmann DJ (1987). J Pharmacokinet Biopharm 15:657-680.

    Patterson HD, Thompson R (1971). Biometrika 58:545-554 (REML).
    """
    margin_li = _check_margin(equivalence_margin)
    left = np.asarray(left_values, dtype=float).ravel()
    right = np.asarray(right_values, dtype=float).ravel()
    animal = np.asarray(animal, dtype=np.int64).ravel()
    if left.shape != right.shape or left.shape != animal.shape:
        raise ValueError("left_values, right_values and animal must have one value per run")
    both = np.isfinite(left) & np.isfinite(right)
    diff = np.where(both, left - right, np.nan)
    total = np.where(both, left + right, np.nan)
    y = np.column_stack([left, right, diff, total])
    X = np.ones((len(left), 1)) if X is None else np.asarray(X, dtype=float)
    c = np.ones(1) if c is None else np.asarray(c, dtype=float).ravel()
    if X.ndim != 2 or X.shape[0] != len(left) or X.shape[1] != c.size:
        raise ValueError(f"X must be ({len(left)} runs, {c.size}) for a contrast of {c.size}")
    fit = fit_terms(y, None, X, animal, terms, estimate_run_variance=True)
    if model_df is None:
        df = between_animal_df(X, animal, np.isfinite(y), c)
    else:
        df = model_df(fit, np.isfinite(y), c)
    res = test_contrast(fit, c, df)
    d, se, dfd = float(res.effect[2]), float(res.se[2]), float(res.df[2])
    crit = float(t_ppf(0.5 + confidence / 2.0, dfd)) if dfd > 0 else float("nan")
    margin = margin_li * abs(float(res.effect[3]))
    p_lower, p_upper, p_tost = tost(d, se, dfd, margin)
    return HemisphereTest(
        left_effect=float(res.effect[0]),
        left_se=float(res.se[0]),
        left_p=float(res.p[0]),
        right_effect=float(res.effect[1]),
        right_se=float(res.se[1]),
        right_p=float(res.p[1]),
        difference=d,
        se=se,
        t=float(res.t[2]),
        df=dfd,
        p=float(res.p[2]),
        ci_low=d - crit * se,
        ci_high=d + crit * se,
        total=float(res.effect[3]),
        margin_li=margin_li,
        margin=margin,
        tost_p_lower=p_lower,
        tost_p_upper=p_upper,
        tost_p=p_tost,
        n_runs=int(both.sum()),
        n_animals=int(np.unique(animal[both]).size),
        confidence=float(confidence),
    )


# --------------------------------------------------------------------------------------
# Region pairs and tables
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RegionSymmetry:
    """Everything the symmetry questions give for one region pair."""

    region: str
    left_row: int
    right_row: int
    li_extent: float
    li_effect: float
    bootstrap: BootstrapLI
    threshold_free: ThresholdFreeLI
    test: HemisphereTest
    verdict: Verdict

    def summary(self) -> dict:
        return {
            "region": self.region,
            "li_extent": _float(self.li_extent),
            "li_effect": _float(self.li_effect),
            "bootstrap": self.bootstrap.summary(),
            "threshold_free": self.threshold_free.summary(),
            "test": self.test.summary(),
            "verdict": self.verdict.summary(),
        }


def region_pair(atlas: Atlas, name: str) -> tuple[int, int]:
    """Rows (left, right) of ``atlas.regions`` for a region name or abbreviation.

    A side suffix ("forelimb area (right)", see :mod:`grouplevel.questions.sides`) is allowed and
    names the same pair: symmetry always compares the two sides of the structure.

    Raises
    ------
    ArgumentError
        When the name is unknown, or does not give exactly one left and one right row.
    """
    try:
        rows = atlas.region_rows(name)
    except UserError:
        base, word = split_side(name)
        if not word:
            raise
        rows = atlas.region_rows(base)
    hemi = atlas.regions["hemisphere"].to_numpy()
    left = [r for r in rows if hemi[r] == "left"]
    right = [r for r in rows if hemi[r] == "right"]
    if len(left) != 1 or len(right) != 1:
        raise ArgumentError(
            f"region {name!r}: the atlas gives {len(left)} left and "
            f"{len(right)} right row(s) for it; symmetry needs a structure with exactly one "
            "row per hemisphere. Name a lateralised structure (or its abbreviation)."
        )
    return left[0], right[0]


def _column(shares: sp.csc_matrix, row: int) -> tuple[np.ndarray, np.ndarray]:
    start, stop = shares.indptr[row], shares.indptr[row + 1]
    cols = shares.indices[start:stop].astype(np.int64)
    weights = shares.data[start:stop].astype(float)
    keep = weights > 0
    return cols[keep], weights[keep]


def analyse_symmetry(
    names: Sequence[str],
    atlas: Atlas,
    *,
    y: np.ndarray,
    present: np.ndarray,
    animal: np.ndarray,
    z: np.ndarray,
    effect: np.ndarray,
    region_values: np.ndarray,
    rng: np.random.Generator,
    variance: np.ndarray | None = None,
    var_run: np.ndarray | None = None,
    threshold: float = DEFAULT_EXTENT_Z,
    equivalence_margin: float = DEFAULT_EQUIVALENCE_MARGIN,
    alpha: float = DEFAULT_ALPHA,
    stimulus_side: str | None = None,
    n_boot: int = DEFAULT_BOOTSTRAP,
    n_thresholds: int = DEFAULT_LI_THRESHOLDS,
    weighting: str = "mean",
    sided: str = "two",
    signs: Sequence[str] | None = None,
    X: np.ndarray | None = None,
    c: np.ndarray | None = None,
    bootstrap_animals: np.ndarray | None = None,
    terms: RandomTerms | None = None,
    model_df: ModelDf | None = None,
    memory_gb: float | None = None,
) -> tuple[RegionSymmetry, ...]:
    """Laterality, hemispheric test and verdict for each named region pair.

    Parameters
    ----------
    names
        Region names or abbreviations (any level of the hierarchy); each must give one
        left and one right row.
    atlas
        The atlas with one share row per in-mask voxel of the map
        (:func:`grouplevel.tables.restrict_atlas`).
    y, present, animal, variance, var_run
        The runs' in-mask data, as for :func:`bootstrap_li`.
    z, effect
        ``(V,)`` group z and effect maps; the point LIs are computed on them.
    region_values
        ``(n_runs, n_regions)`` per-run region means
        (:func:`grouplevel.regions.region_values` with ``atlas.shares``).
    rng
        Source of the bootstrap resampling (used in the order of ``names``).
    threshold, equivalence_margin, alpha, stimulus_side, n_boot, n_thresholds, weighting
        See :func:`bootstrap_li`, :func:`hemisphere_test`, :func:`symmetry_verdict` and
        :func:`threshold_free_li`.
    sided, signs
        Which response signs count (:func:`symmetry_verdict`).
    X, c
        Group design and the contrast of the group mean asked about (default intercept
        only, see :func:`hemisphere_test`).
    bootstrap_animals
        ``(m,)`` bool: the animals the bootstrap resamples (those whose mean ``c`` is);
        default all.
    memory_gb
        Budget of the bootstrap's replicate maps (:func:`bootstrap_li`).

    Returns
    -------
    tuple of RegionSymmetry

    Notes
    -----
    The hemispheric test and verdict come first; when the verdict's response is
    negative, the LIs are computed on the sign-flipped maps (``−z``, ``−effect``,
    ``−y``), so that they describe the magnitude of the negative response.
    """
    _check_margin(equivalence_margin)
    shares = sp.csc_matrix(atlas.shares)
    z, effect, region_values = _check_symmetry_maps(shares, z, effect, region_values, animal)
    animal = np.asarray(animal, dtype=np.int64)
    runs = _bootstrap_runs(y, present, animal, variance, bootstrap_animals)
    out = []
    seen: set[tuple[int, int]] = set()
    for name in names:
        left_row, right_row = _new_region_pair(atlas, name, seen)
        test = hemisphere_test(
            region_values[:, left_row],
            region_values[:, right_row],
            animal,
            equivalence_margin=equivalence_margin,
            X=X,
            c=c,
            terms=terms,
            model_df=model_df,
        )
        verdict = symmetry_verdict(
            test, alpha=alpha, stimulus_side=stimulus_side, sided=sided, signs=signs
        )
        flip = -1.0 if verdict.sign == "negative" else 1.0
        li_extent, li_effect, boot, tf = _pair_laterality(
            flip,
            z,
            effect,
            runs,
            _column(shares, left_row),
            _column(shares, right_row),
            var_run=var_run,
            threshold=threshold,
            n_boot=n_boot,
            n_thresholds=n_thresholds,
            weighting=weighting,
            rng=rng,
            memory_gb=memory_gb,
        )
        out.append(
            RegionSymmetry(
                region=str(name),
                left_row=int(left_row),
                right_row=int(right_row),
                li_extent=float(li_extent),
                li_effect=float(li_effect),
                bootstrap=boot,
                threshold_free=tf,
                test=test,
                verdict=verdict,
            )
        )
    return tuple(out)


def _check_symmetry_maps(
    shares: sp.csc_matrix,
    z: np.ndarray,
    effect: np.ndarray,
    region_values: np.ndarray,
    animal: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The group maps and region means as float arrays, checked against the atlas.

    Returns
    -------
    z, effect
        ``(V,)`` flattened.
    region_values
        ``(n_runs, n_regions)``.
    """
    z = np.asarray(z, dtype=float).ravel()
    effect = np.asarray(effect, dtype=float).ravel()
    n_vox = shares.shape[0]
    if z.shape != (n_vox,) or effect.shape != (n_vox,):
        raise ValueError(f"z and effect must have the atlas's {n_vox} in-mask voxels")
    region_values = np.asarray(region_values, dtype=float)
    if region_values.shape != (len(animal), shares.shape[1]):
        raise ValueError(
            f"region_values must be (runs, {shares.shape[1]} regions), got {region_values.shape}"
        )
    return z, effect, region_values


def _new_region_pair(atlas: Atlas, name: str, seen: set[tuple[int, int]]) -> tuple[int, int]:
    """The left and right rows of ``name``; refuses a pair already in ``seen`` (then adds it)."""
    left_row, right_row = region_pair(atlas, name)
    if (left_row, right_row) in seen:
        raise ArgumentError(
            f"region {name!r} names a region pair already listed; give each region once."
        )
    seen.add((left_row, right_row))
    return left_row, right_row


def _pair_laterality(
    flip: float,
    z: np.ndarray,
    effect: np.ndarray,
    runs: tuple,
    left: tuple[np.ndarray, np.ndarray],
    right: tuple[np.ndarray, np.ndarray],
    *,
    var_run: np.ndarray | None,
    threshold: float,
    n_boot: int,
    n_thresholds: int,
    weighting: str,
    rng: np.random.Generator,
    memory_gb: float | None = None,
) -> tuple[float, float, BootstrapLI, ThresholdFreeLI]:
    """The LIs of one region pair on maps multiplied by ``flip`` (−1 for a negative response).

    Parameters
    ----------
    runs
        ``(y, present, animal, variance)`` of the runs the bootstrap resamples
        (:func:`_bootstrap_runs`).
    left, right
        In-mask voxel columns and atlas shares of each side (:func:`_column`).

    Returns
    -------
    li_extent, li_effect, bootstrap, threshold_free
        The point LIs of the group maps, the bootstrap intervals and the threshold-free LI.
    """
    (lc, lw), (rc, rw) = left, right
    yb, present_b, animal_b, variance_b, rows = runs
    zs, es = flip * z, flip * effect
    li_extent = laterality(
        extent_amount(zs[lc], lw, threshold), extent_amount(zs[rc], rw, threshold)
    )
    li_effect = laterality(effect_amount(es[lc], lw), effect_amount(es[rc], rw))
    boot = bootstrap_li(
        yb,
        present_b,
        animal_b,
        lc,
        rc,
        rows=rows,
        sign=flip,
        left_weights=lw,
        right_weights=rw,
        variance=variance_b,
        var_run=var_run,
        threshold=threshold,
        n_boot=n_boot,
        rng=rng,
        memory_gb=memory_gb,
    )
    tf = threshold_free_li(
        zs,
        lc,
        rc,
        left_weights=lw,
        right_weights=rw,
        n_thresholds=n_thresholds,
        weighting=weighting,
    )
    return li_extent, li_effect, boot, tf


def _bootstrap_runs(y, present, animal, variance, bootstrap_animals):
    """The runs of the animals the bootstrap resamples: the arrays as given (no copy;
    each region pair takes its own voxels of these rows), their animal codes 0..k-1
    and the rows."""
    y = np.asarray(y)
    present = np.asarray(present, dtype=bool)
    variance = None if variance is None else np.asarray(variance)
    if bootstrap_animals is None:
        return y, present, animal, variance, np.arange(len(animal))
    keep = np.asarray(bootstrap_animals, dtype=bool)[animal]
    codes = np.unique(animal[keep], return_inverse=True)[1].astype(np.int64)
    return y, present, codes, variance, np.flatnonzero(keep)


#: Columns of :func:`symmetry_table`, in order.
TABLE_COLUMNS = (
    "region",
    "li_extent",
    "li_extent_low",
    "li_extent_high",
    "li_effect",
    "li_effect_low",
    "li_effect_high",
    "li_threshold_free",
    "li_extent_shortcut",
    "li_effect_shortcut",
    "left_effect",
    "right_effect",
    "difference",
    "se",
    "ci_low",
    "ci_high",
    "df",
    "p",
    "margin",
    "tost_p",
    "left_active",
    "right_active",
    "verdict",
    "side",
    "sign",
    "reasons",
)


def symmetry_table(results: Sequence[RegionSymmetry]) -> pd.DataFrame:
    """One row per region pair with the LIs, the hemispheric test and the verdict.

    Columns are :data:`TABLE_COLUMNS`; ``li_*_low``/``high`` are the bootstrap percentile
    interval of the estimator whose value on the original animals is ``li_*_shortcut``
    (``li_extent`` and ``li_effect`` are the LIs of the fitted group maps), ``margin`` is
    Δ on the difference, ``reasons`` the verdict's sentences joined with "; ".
    """
    rows = []
    for r in results:
        t = r.test
        rows.append(
            {
                "region": r.region,
                "li_extent": r.li_extent,
                "li_extent_low": r.bootstrap.extent_ci[0],
                "li_extent_high": r.bootstrap.extent_ci[1],
                "li_effect": r.li_effect,
                "li_effect_low": r.bootstrap.effect_ci[0],
                "li_effect_high": r.bootstrap.effect_ci[1],
                "li_threshold_free": r.threshold_free.value,
                # the bootstrap's own estimator on the original animals: the point that
                # li_*_low/high are an interval of (li_extent/li_effect are of the fitted
                # mixed-model maps and can differ from it)
                "li_extent_shortcut": r.bootstrap.extent,
                "li_effect_shortcut": r.bootstrap.effect,
                "left_effect": t.left_effect,
                "right_effect": t.right_effect,
                "difference": t.difference,
                "se": t.se,
                "ci_low": t.ci_low,
                "ci_high": t.ci_high,
                "df": t.df,
                "p": t.p,
                "margin": t.margin,
                "tost_p": t.tost_p,
                "left_active": bool(r.verdict.numbers["left_active"]),
                "right_active": bool(r.verdict.numbers["right_active"]),
                "verdict": r.verdict.label,
                "side": r.verdict.side,
                "sign": r.verdict.sign,
                "reasons": "; ".join(r.verdict.reasons),
            }
        )
    return pd.DataFrame(rows, columns=list(TABLE_COLUMNS))


def li_curves(results: Sequence[RegionSymmetry]) -> pd.DataFrame:
    """Threshold-free LI curves in long form: columns ``region, threshold, li``."""
    frames = [
        pd.DataFrame(
            {
                "region": r.region,
                "threshold": r.threshold_free.thresholds,
                "li": r.threshold_free.li,
            }
        )
        for r in results
    ]
    if not frames:
        return pd.DataFrame(columns=["region", "threshold", "li"])
    return pd.concat(frames, ignore_index=True)


# --------------------------------------------------------------------------------------
# The lateralisation of a difference
# --------------------------------------------------------------------------------------


def lateralisation_difference_verdict(
    test: HemisphereTest, *, alpha: float = DEFAULT_ALPHA, stimulus_side: str | None = None
) -> Verdict:
    """Does a difference contrast (group b − a, drug − vehicle) differ between the sides?

    ``test`` is :func:`hemisphere_test` with the difference contrast: its ``left_effect``
    and ``right_effect`` are the contrast on each side's region mean, and its
    ``difference`` is the contrast of ``L − R``, the difference of the two hemispheric
    differences (an interaction of side and contrast).

    The rule: p of ``c(L − R)`` < α → "lateralisation differs (the contrast is larger on
    the <side>)", the side where the contrast is larger (the left when ``c(L − R) > 0``);
    otherwise "no evidence that the lateralisation differs". No equivalence test is made:
    the LI margin of :func:`hemisphere_test` is defined for a response, not for a
    difference, so "the same lateralisation" is never concluded.

    With ``stimulus_side`` the side is also called contralateral or ipsilateral.
    """
    if not 0.0 < alpha < 1.0:
        raise ArgumentError(f"alpha = {alpha}: give a level between 0 and 1")
    if stimulus_side is not None and stimulus_side not in SIDES:
        raise ArgumentError(
            f'stimulus_side = {stimulus_side!r}: use "left", "right" or None when the '
            "stimulus was not lateralised"
        )
    reasons = [
        f"{side} side: contrast {effect:.3g}, {_fmt_p(p)}"
        for side, effect, p in (
            ("left", test.left_effect, test.left_p),
            ("right", test.right_effect, test.right_p),
        )
    ]
    significant = bool(np.isfinite(test.p) and test.p < alpha)
    larger = "left" if test.difference > 0 else "right"
    reasons.append(
        f"Contrast of left minus right {test.difference:.3g} (95% CI {test.ci_low:.3g} to "
        f"{test.ci_high:.3g}), {_fmt_p(test.p)}"
    )
    side = ""
    if significant:
        label = LATERALISATION_DIFFERS.format(side=larger)
        if stimulus_side is not None:
            side = "ipsilateral" if larger == stimulus_side else "contralateral"
            reasons.append(f"The {larger} side is {side} to the stimulated {stimulus_side} side")
    else:
        label = LATERALISATION_NOT_SHOWN
        reasons.append(
            "Not significant: this does not show that the lateralisation is the same (no "
            "equivalence test is made for a difference)"
        )
    numbers = {
        "alpha": float(alpha),
        "left_effect": _float(test.left_effect),
        "left_p": _float(test.left_p),
        "right_effect": _float(test.right_effect),
        "right_p": _float(test.right_p),
        "difference": _float(test.difference),
        "difference_p": _float(test.p),
        "stimulus_side": stimulus_side or "",
        "larger_side": larger if significant else "",
    }
    return Verdict(label=label, reasons=tuple(reasons), numbers=numbers, side=side)


#: Columns of :func:`lateralisation_differences`, in order.
DIFFERENCE_TABLE_COLUMNS = (
    "region",
    "left_effect",
    "left_p",
    "right_effect",
    "right_p",
    "difference",
    "se",
    "ci_low",
    "ci_high",
    "df",
    "p",
    "verdict",
    "side",
    "reasons",
)


def lateralisation_differences(
    names: Sequence[str],
    atlas: Atlas,
    *,
    region_values: np.ndarray,
    animal: np.ndarray,
    X: np.ndarray,
    c: np.ndarray,
    alpha: float = DEFAULT_ALPHA,
    stimulus_side: str | None = None,
    terms: RandomTerms | None = None,
    model_df: ModelDf | None = None,
) -> tuple[pd.DataFrame, dict]:
    """The lateralisation of a difference contrast for each named region pair.

    Parameters
    ----------
    names, atlas, region_values, animal
        As :func:`analyse_symmetry`.
    X, c
        Group design and the difference contrast.
    alpha, stimulus_side
        See :func:`lateralisation_difference_verdict`.
    terms, model_df
        The random terms of the fitted model and its df rule (see
        :func:`hemisphere_test`).

    Returns
    -------
    table, summary
        One row per region (:data:`DIFFERENCE_TABLE_COLUMNS`), and per region the
        verdict, side, reasons and numbers for summary.json.
    """
    region_values = np.asarray(region_values, dtype=float)
    rows, summary = [], {}
    for name in names:
        left_row, right_row = region_pair(atlas, name)
        test = hemisphere_test(
            region_values[:, left_row],
            region_values[:, right_row],
            animal,
            X=X,
            c=c,
            terms=terms,
            model_df=model_df,
        )
        verdict = lateralisation_difference_verdict(test, alpha=alpha, stimulus_side=stimulus_side)
        rows.append(
            {
                "region": str(name),
                **{k: getattr(test, k) for k in DIFFERENCE_TABLE_COLUMNS[1:11]},
                "verdict": verdict.label,
                "side": verdict.side,
                "reasons": "; ".join(verdict.reasons),
            }
        )
        summary[str(name)] = {
            "verdict": verdict.label,
            "side": verdict.side,
            "question": "does the lateralisation differ",
            "reasons": list(verdict.reasons),
            "test": test.summary(),
            "numbers": verdict.numbers,
        }
    return pd.DataFrame(rows, columns=list(DIFFERENCE_TABLE_COLUMNS)), summary
