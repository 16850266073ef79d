"""An invented example study with its ground truth written beside it.

The scenario: head-fixed awake mice imaged at a 9.4 T-like field, two stimuli presented in
blocks within the same runs. Ten mice ("m01".."m10") give 2 to 5 runs each; every run yields
two first-level contrasts, ``sound`` (binaural noise bursts: both auditory cortices equally,
plus the inferior colliculi) and ``paw`` (left forepaw stimulation: strongly the right
somatosensory forelimb area, weakly the left one).

Each run's map at voxel ``v`` is built as the group model of grouplevel assumes::

    y(v) = effect(v) + u_animal(v) + d_run(v) + e_run(v)

with ``u_animal ~ N(0, tau2)`` shared by all runs of an animal, ``d_run ~ N(0, sigma2)``
and ``e_run ~ N(0, s2_run(v))`` whose variance map ``s2_run`` is written beside the run's
effect map. Every noise field is white noise smoothed with a Gaussian kernel and divided by
the kernel's root-sum-of-squares, so its voxelwise variance is exactly the stated value and
a fitted ``tau2`` or ``sigma2`` can be compared with the truth.

Planted problems, all recorded in ``truth.json``: one animal with stimulus-locked motion (a
thin rim of signed signal at the brain edge), a few noisy runs, signal dropout near the left
ear canal in a few runs (NaN in the maps) and two runs excluded in the table.

The anatomy (template, mask, atlas) does not depend on the seed; the seed drives the design
draws (runs per animal, which runs are noisy, dropped out or excluded) and all noise fields.

Public functions
----------------
write_example
    Write the whole study into a folder and return the path of its ``study.toml``.
example_config_text
    The ``study.toml`` text.
example_table
    The runs table as written to ``runs.tsv``.

The pure core (:func:`make_anatomy`, :func:`draw_design`, :func:`simulate`,
:func:`smooth_unit_fields`) returns arrays and frozen dataclasses; only
:func:`write_example` touches files.
"""

from __future__ import annotations

import json
import math
import pathlib
from dataclasses import dataclass

import nibabel as nib
import numpy as np
import pandas as pd
from scipy import ndimage

from grouplevel.errors import UserError

__all__ = [
    "EXAMPLE_SEED",
    "Anatomy",
    "Design",
    "RunInfo",
    "Simulation",
    "draw_design",
    "example_config_text",
    "example_table",
    "gaussian_kernel_rss",
    "grid_affine",
    "make_anatomy",
    "simulate",
    "smooth_unit_fields",
    "true_effects",
    "write_example",
]

# --------------------------------------------------------------------------------------
# Constants of the invented scenario
# --------------------------------------------------------------------------------------

#: Default seed of the example (an arbitrary fixed number).
EXAMPLE_SEED = 2024

#: Isotropic voxel size in mm; 0.2 mm is a usual functional resolution for mouse fMRI
#: at 9.4 T (common practice).
VOXEL_MM = 0.2
#: Grid size in voxels along x (left→right), y (posterior→anterior), z (ventral→dorsal):
#: the brain (40 × 50 × 29 voxels) plus a margin of at least 4 voxels on every side.
GRID_SHAPE = (48, 60, 40)

#: Brain semi-axes in mm: half of about 8 mm (left–right) × 10 mm (anterior–posterior) and
#: 3 mm dorsal / 2.8 mm ventral of the centre (a mouse brain without olfactory bulbs and
#: cerebellum is roughly this size; invented round numbers).
BRAIN_HALF_WIDTH_MM = 4.0
BRAIN_HALF_LENGTH_MM = 5.0
BRAIN_DORSAL_MM = 3.0
BRAIN_VENTRAL_MM = 2.8
#: The brain narrows anteriorly: half-width shrinks by this fraction at the anterior pole.
ANTERIOR_TAPER = 0.25
#: Interhemispheric fissure: the two midline voxel columns are cut out of the mask above
#: this height (mm) and within this anterior–posterior range (mm).
FISSURE_Z_MM = 2.2
FISSURE_Y_MM = (-3.3, 4.2)

#: Stereotaxic origin (bregma) in template mm: on the dorsal midline about 4 mm behind the
#: anterior pole, at the skull surface just above the brain (invented, plausible).
ORIGIN_MM = (0.0, 1.0, 3.0)
ORIGIN_NAME = "bregma"

#: Cortex: mask voxels closer than this to the brain surface (mm), above ``CORTEX_MIN_Z_MM``
#: and within ``CORTEX_Y_MM`` (anterior–posterior).
CORTEX_DEPTH_MM = 0.9
CORTEX_MIN_Z_MM = -1.2
CORTEX_Y_MM = (-3.3, 4.2)

#: Number of animals and their names.
N_ANIMALS = 10
ANIMALS = tuple(f"m{i:02d}" for i in range(1, N_ANIMALS + 1))
#: Runs per animal, shuffled over animals by the seed: 2 to 5 runs, 35 in total.
RUNS_PER_ANIMAL = (2, 2, 3, 3, 3, 4, 4, 4, 5, 5)
SESSION = 1
CONTRASTS = ("sound", "paw")

#: Between-animal variance τ² and between-run variance σ² (units² of the effect maps,
#: invented "% signal change").
TAU2 = 0.08
SIGMA2 = 0.04
#: First-level variance level per contrast at the dorsal surface; it doubles towards the
#: ventral edge (a dorsal surface coil loses sensitivity with depth, common practice).
S2_BASE = {"sound": 0.10, "paw": 0.08}
S2_VENTRAL_GAIN = 1.0
#: Run-to-run factor of the first-level variance (uniform range) and the standard deviation
#: of a smooth log-normal spatial modulation per run.
S2_RUN_FACTOR = (0.75, 1.3)
S2_LOG_SD = 0.2
#: Noisy runs: how many, and the factor on their variance map.
N_NOISY_RUNS = 3
NOISY_FACTOR = 4.0
#: Smoothness of every noise field: FWHM in voxels.
NOISE_FWHM_VOX = 2.0
#: Gaussian kernels are cut at this many standard deviations (scipy.ndimage default).
KERNEL_TRUNCATE = 4.0
#: FWHM = sigma * sqrt(8 ln 2) for a Gaussian.
FWHM_PER_SIGMA = math.sqrt(8.0 * math.log(2.0))

#: Effect blobs: width (standard deviation, mm) and amplitudes per contrast and region,
#: given as (abbreviation, hemisphere) -> amplitude.
BLOB_SD_MM = 0.45
AMPLITUDES = {
    "sound": {("A1", "left"): 1.2, ("A1", "right"): 1.2, ("IC", "left"): 0.6, ("IC", "right"): 0.6},
    "paw": {("S1FL", "right"): 1.2, ("S1FL", "left"): 0.4},
}

#: The animal with stimulus-locked motion, the rim thickness (voxels) and the amplitude of
#: the rim signal per contrast (at the dorsal pole; it falls linearly to minus that value
#: at the ventral pole). Each run scales it by a factor drawn uniformly from the range.
MOTION_ANIMAL = "m07"
MOTION_RIM_VOX = 2
MOTION_AMPLITUDE = {"sound": 1.5, "paw": 1.2}
MOTION_RUN_FACTOR = (0.8, 1.2)

#: Signal dropout near the left ear canal: a ball (centre and radius in mm) cut with the
#: mask, NaN in the affected runs' maps. Common practice: rodent EPI loses signal near air–
#: tissue borders such as the ear canals.
DROPOUT_CENTRE_MM = (-3.1, -2.4, -1.9)
DROPOUT_RADIUS_MM = 1.0
N_DROPOUT_RUNS = 3
#: Minimum fraction of runs with data for a voxel to be analysed (written to study.toml).
MIN_COVERAGE = 0.8

#: Excluded runs: how many, the reason written to the table, and the artefact they carry
#: (a linear ramp along posterior→anterior reaching ± this amplitude at the poles).
N_EXCLUDED_RUNS = 2
EXCLUDE_REASON = "head moved during run (video check)"
EXCLUDED_RAMP_AMPLITUDE = 1.0

#: Seed of the fixed template texture (the anatomy does not depend on the study seed).
TEMPLATE_TEXTURE_SEED = 12345
TEMPLATE_TEXTURE_SD = 0.03

MAP_DIR = "maps"
TABLE_COLUMNS = ("animal", "session", "run", "condition", "effect", "variance", "exclude", "reason")

# --------------------------------------------------------------------------------------
# Atlas definition
# --------------------------------------------------------------------------------------

# One entry per structure: abbreviation, name, parent abbreviation (None = top level),
# lateralised?, colour. Leaves get a shape below; parents only appear in the table.
_STRUCTURES: tuple[tuple[str, str, str | None, bool, str], ...] = (
    ("Ctx", "cortex", None, True, "#7fa7c9"),
    ("Aud", "auditory cortex", "Ctx", True, "#3b8bc2"),
    ("A1", "primary auditory area", "Aud", True, "#1f5f99"),
    ("A2", "secondary auditory area", "Aud", True, "#6aaed6"),
    ("SS", "somatosensory cortex", "Ctx", True, "#4daf7c"),
    ("S1FL", "forelimb area", "SS", True, "#1b7a4a"),
    ("S1HL", "hindlimb area", "SS", True, "#8fd1a8"),
    ("Vis", "visual cortex", "Ctx", True, "#b07cc6"),
    ("Mot", "motor cortex", "Ctx", True, "#d9a441"),
    ("Hip", "hippocampus", None, True, "#c96f5a"),
    ("Str", "striatum", None, True, "#8c8c3a"),
    ("Th", "thalamus", None, True, "#5a7d8c"),
    ("IC", "inferior colliculus", None, True, "#a64d79"),
    ("V", "ventricles", None, False, "#d0d0d0"),
    # Structures that fill the rest of the brain mask, so that the atlas labels (almost)
    # every analysed voxel. They come after the structures above, so the indices of those
    # stay as they were, and they only take voxels that no structure above holds.
    ("CtxO", "other isocortex", "Ctx", True, "#9fb8cf"),
    ("Pir", "piriform area", "Ctx", True, "#6f8fb0"),
    ("OB", "olfactory bulb", None, True, "#e3b96b"),
    ("fib", "fibre tracts", None, True, "#bdbdbd"),
    ("BS", "brainstem", None, True, "#9e6a8c"),
    ("MB", "midbrain", "BS", True, "#b98aa8"),
    ("PM", "pons and medulla", "BS", True, "#7d4e6d"),
    ("Cb", "cerebellum", None, True, "#6a9e6a"),
    ("Hy", "hypothalamus", None, True, "#c98f5a"),
    ("GMO", "other grey matter", None, True, "#a8a08a"),
)

# Cortical leaves of the right hemisphere: (abbreviation, y range mm, angle range degrees),
# angle = atan2(z, |x|) in the coronal plane (0° lateral, 90° dorsal). Lists of ranges are
# unions.
_CORTEX_AREAS: tuple[
    tuple[str, tuple[tuple[tuple[float, float], tuple[float, float]], ...]], ...
] = (
    ("A1", (((-2.7, -1.1), (0.0, 24.0)),)),
    ("A2", (((-2.7, -1.1), (24.0, 38.0)), ((-2.7, -1.1), (-16.0, 0.0)))),
    ("S1FL", (((-0.6, 1.0), (38.0, 58.0)),)),
    ("S1HL", (((-1.6, 0.6), (58.0, 90.1)),)),
    ("Mot", (((0.6, 3.4), (58.0, 90.1)),)),
    ("Vis", (((-3.3, -1.9), (40.0, 90.1)),)),
)

# Deep structures of the right hemisphere as ellipsoids: centre (mm), semi-axes (mm).
_DEEP_ELLIPSOIDS: tuple[tuple[str, tuple[float, float, float], tuple[float, float, float]], ...] = (
    ("IC", (0.9, -3.8, 1.2), (0.7, 0.55, 0.6)),
    ("Hip", (1.7, -1.9, 1.0), (1.1, 0.9, 0.55)),
    ("Th", (0.8, -0.9, -0.3), (0.65, 1.0, 0.8)),
    ("Str", (1.5, 1.6, 0.2), (0.9, 1.3, 1.1)),
)
# Ventricles: lateral ventricles (ellipsoids mirrored on both sides) and the third ventricle
# (a midline slab: |x| < 0.2 mm, y and z ranges in mm).
_LATERAL_VENTRICLE = ((1.1, 0.4, 1.0), (0.25, 1.1, 0.3))
_THIRD_VENTRICLE_Y = (-1.8, 0.2)
_THIRD_VENTRICLE_Z = (-1.2, 0.4)

# The filling structures (invented, placed as in a mouse brain without its details):
# the olfactory bulb is the brain anterior of the cortex (y >= CORTEX_Y_MM[1]); behind the
# cortex (y <= CORTEX_Y_MM[0]) lie the cerebellum (dorsal) and the pons and medulla
# (ventral of _HINDBRAIN_TOP_Z_MM); the midbrain is the deep brain of the y range below;
# the hypothalamus is a ventral band near the midline; the piriform area the ventral-
# lateral surface below the cortex; the fibre tracts the sheet beneath the cortex.
_HINDBRAIN_TOP_Z_MM = -0.6
_MIDBRAIN_Y_MM = (-3.3, -2.2)
_HYPOTHALAMUS_Y_MM = (-1.8, 0.6)
_HYPOTHALAMUS_HALF_WIDTH_MM = 1.0
_HYPOTHALAMUS_TOP_Z_MM = -1.2

# Template intensities (arbitrary units) per tissue class.
_INTENSITY = {
    "deep": 0.62,
    "cortex": 0.86,
    "white": 0.45,
    "ventricle": 0.15,
    "Hip": 0.72,
    "Str": 0.68,
    "Th": 0.58,
    "IC": 0.74,
}
# Thickness (mm) of the white-matter sheet beneath the cortex.
_WHITE_MATTER_MM = 0.25
# Brightness gain from ventral to dorsal edge (receive-coil profile, common practice).
_TEMPLATE_DORSAL_GAIN = 0.15


# --------------------------------------------------------------------------------------
# Dataclasses
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Anatomy:
    """The invented template space.

    Attributes
    ----------
    affine
        4 × 4 voxel → mm affine (RAS+: x left→right, y posterior→anterior,
        z ventral→dorsal); x = 0 is the midline plane.
    template
        Template intensities, 0 outside the head.
    mask
        Brain mask (bool).
    atlas
        Integer leaf labels (0 = unlabelled).
    atlas_table
        One row per atlas entry (leaves and parents): index, name, abbreviation,
        hemisphere, parent (index or ``<NA>``), color.
    coords
        World coordinates (mm) of every voxel centre, shape ``(3, *GRID_SHAPE)``.
    """

    affine: np.ndarray
    template: np.ndarray
    mask: np.ndarray
    atlas: np.ndarray
    atlas_table: pd.DataFrame
    coords: np.ndarray

    def index_of(self, abbreviation: str, hemisphere: str) -> int:
        """Atlas index of a structure given its abbreviation and hemisphere."""
        t = self.atlas_table
        hit = t[(t["abbreviation"] == abbreviation) & (t["hemisphere"] == hemisphere)]
        if len(hit) != 1:
            raise KeyError(f"no unique atlas entry {abbreviation!r} ({hemisphere})")
        return int(hit["index"].iloc[0])


@dataclass(frozen=True)
class RunInfo:
    """One run of the design (both contrasts share it)."""

    animal: str
    run: int
    noisy: bool
    dropout: bool
    excluded: bool
    motion: bool


@dataclass(frozen=True)
class Design:
    """Which runs exist and which carry a planted problem (drawn from the seed)."""

    seed: int
    runs: tuple[RunInfo, ...]

    @property
    def animal_index(self) -> np.ndarray:
        """Index into :data:`ANIMALS` of every run."""
        return np.array([ANIMALS.index(r.animal) for r in self.runs])


@dataclass(frozen=True)
class Simulation:
    """All simulated arrays (shape ``(n, *GRID_SHAPE)`` unless said otherwise).

    Attributes
    ----------
    design
        The design the runs follow.
    truth
        Contrast → true group effect map (``GRID_SHAPE``).
    animal_effect
        Contrast → ``u_animal`` fields, one per animal (in :data:`ANIMALS` order).
    run_effect
        Contrast → ``d_run`` fields, one per run.
    first_level_noise
        Contrast → ``e_run`` fields, one per run.
    variance
        Contrast → first-level variance maps ``s2_run`` (inside the mask; NaN at dropout,
        0 outside the mask).
    effect
        Contrast → the effect maps as written (NaN at dropout, 0 outside the mask).
    motion
        Contrast → the motion rim signal added to each run (zeros for other animals).
    dropout
        Bool map of the dropout region.
    rim
        Bool map of the brain-edge rim that carries the motion signal.
    """

    design: Design
    truth: dict[str, np.ndarray]
    animal_effect: dict[str, np.ndarray]
    run_effect: dict[str, np.ndarray]
    first_level_noise: dict[str, np.ndarray]
    variance: dict[str, np.ndarray]
    effect: dict[str, np.ndarray]
    motion: dict[str, np.ndarray]
    dropout: np.ndarray
    rim: np.ndarray


# --------------------------------------------------------------------------------------
# Pure core
# --------------------------------------------------------------------------------------


def grid_affine() -> np.ndarray:
    """Voxel → mm affine of the example grid: RAS+, brain centre at (0, 0, 0).

    The grid is centred so that voxel ``i`` along x and voxel ``nx - 1 - i`` are mirror
    images about the plane x = 0.
    """
    affine = np.diag([VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    affine[:3, 3] = [-VOXEL_MM * (n - 1) / 2.0 for n in GRID_SHAPE]
    return affine


def _ellipsoid(
    coords: np.ndarray,
    centre: tuple[float, float, float],
    semi_axes: tuple[float, float, float],
) -> np.ndarray:
    x, y, z = coords
    return (
        ((x - centre[0]) / semi_axes[0]) ** 2
        + ((y - centre[1]) / semi_axes[1]) ** 2
        + ((z - centre[2]) / semi_axes[2]) ** 2
    ) <= 1.0


def _brain_mask(coords: np.ndarray) -> np.ndarray:
    x, y, z = coords
    taper = 1.0 - ANTERIOR_TAPER * np.clip(y / BRAIN_HALF_LENGTH_MM, 0.0, 1.0) ** 2
    half_z = np.where(z >= 0.0, BRAIN_DORSAL_MM, BRAIN_VENTRAL_MM)
    r2 = (x / (BRAIN_HALF_WIDTH_MM * taper)) ** 2 + (y / BRAIN_HALF_LENGTH_MM) ** 2
    r2 = r2 + (z / half_z) ** 2
    fissure = (
        (np.abs(x) < VOXEL_MM) & (z > FISSURE_Z_MM) & (y > FISSURE_Y_MM[0]) & (y < FISSURE_Y_MM[1])
    )
    return (r2 <= 1.0) & ~fissure


def _atlas_table() -> pd.DataFrame:
    rows: list[dict[str, object]] = []
    index_of: dict[tuple[str, str], int] = {}
    next_index = 1
    for abbreviation, name, parent, lateral, color in _STRUCTURES:
        hemispheres = ("left", "right") if lateral else ("both",)
        for hemisphere in hemispheres:
            if parent is None:
                parent_index = None
            else:
                parent_index = index_of[(parent, hemisphere)]
            rows.append(
                {
                    "index": next_index,
                    "name": name,
                    "abbreviation": abbreviation,
                    "hemisphere": hemisphere,
                    "parent": parent_index,
                    "color": color,
                }
            )
            index_of[(abbreviation, hemisphere)] = next_index
            next_index += 1
    table = pd.DataFrame(rows)
    table["parent"] = table["parent"].astype("Int64")
    return table


def make_anatomy() -> Anatomy:
    """Build the template, brain mask and atlas of the example (no randomness but a fixed
    texture seed).

    Returns
    -------
    Anatomy
        Template, mask, atlas image and table, affine and voxel coordinates.
    """
    affine = grid_affine()
    ijk = np.indices(GRID_SHAPE, dtype=float)
    coords = np.einsum("ab,b...->a...", affine[:3, :3], ijk) + affine[:3, 3].reshape(3, 1, 1, 1)
    x, y, z = coords
    mask = _brain_mask(coords)
    depth_mm = ndimage.distance_transform_edt(mask) * VOXEL_MM

    table = _atlas_table()

    def idx(abbreviation: str, hemisphere: str) -> int:
        hit = table[(table["abbreviation"] == abbreviation) & (table["hemisphere"] == hemisphere)]
        return int(hit["index"].iloc[0])

    atlas = np.zeros(GRID_SHAPE, dtype=np.int16)
    free = mask.copy()

    def assign(region: np.ndarray, label: int) -> None:
        region = region & free
        atlas[region] = label
        free[region] = False

    # Ventricles first (they cut through the other structures).
    ventricle = _third_ventricle(coords)
    centre, semi = _LATERAL_VENTRICLE
    for sign in (-1.0, 1.0):
        ventricle |= _ellipsoid(coords, (sign * centre[0], centre[1], centre[2]), semi)
    assign(ventricle, idx("V", "both"))

    # Cortical areas on the cortex shell.
    cortex = (
        mask
        & (depth_mm <= CORTEX_DEPTH_MM)
        & (z > CORTEX_MIN_Z_MM)
        & (y > CORTEX_Y_MM[0])
        & (y < CORTEX_Y_MM[1])
    )
    angle = np.degrees(np.arctan2(z, np.abs(x)))
    for hemisphere, side in (("left", x < 0.0), ("right", x > 0.0)):
        for abbreviation, ranges in _CORTEX_AREAS:
            region = np.zeros(GRID_SHAPE, dtype=bool)
            for (y0, y1), (a0, a1) in ranges:
                region |= (y >= y0) & (y < y1) & (angle >= a0) & (angle < a1)
            assign(region & cortex & side, idx(abbreviation, hemisphere))
        sign = -1.0 if hemisphere == "left" else 1.0
        for abbreviation, centre, semi in _DEEP_ELLIPSOIDS:
            shape = _ellipsoid(coords, (sign * centre[0], centre[1], centre[2]), semi)
            assign(shape & side & ~cortex, idx(abbreviation, hemisphere))

    # The template's tissue classes follow the structures above only.
    template = _template(coords, mask, depth_mm, cortex, atlas, table)

    # Fill the rest of the mask, so that the labels cover the whole brain.
    white = _white_matter(coords, mask, depth_mm, cortex)
    surface = mask & (depth_mm <= CORTEX_DEPTH_MM)
    for hemisphere, side in (("left", x < 0.0), ("right", x > 0.0)):
        inside = mask & side
        assign(inside & (y >= CORTEX_Y_MM[1]), idx("OB", hemisphere))
        behind = inside & (y <= CORTEX_Y_MM[0])
        assign(behind & (z > _HINDBRAIN_TOP_Z_MM), idx("Cb", hemisphere))
        assign(behind, idx("PM", hemisphere))
        assign(white & side, idx("fib", hemisphere))
        assign(cortex & side, idx("CtxO", hemisphere))
        hypothalamus = (
            inside
            & (y >= _HYPOTHALAMUS_Y_MM[0])
            & (y <= _HYPOTHALAMUS_Y_MM[1])
            & (np.abs(x) < _HYPOTHALAMUS_HALF_WIDTH_MM)
            & (z < _HYPOTHALAMUS_TOP_Z_MM)
        )
        assign(hypothalamus, idx("Hy", hemisphere))
        assign(surface & side & (z <= CORTEX_MIN_Z_MM), idx("Pir", hemisphere))
        midbrain = inside & (y > _MIDBRAIN_Y_MM[0]) & (y < _MIDBRAIN_Y_MM[1])
        assign(midbrain, idx("MB", hemisphere))
        assign(inside, idx("GMO", hemisphere))

    return Anatomy(
        affine=affine,
        template=template,
        mask=mask,
        atlas=atlas,
        atlas_table=table,
        coords=coords,
    )


def _third_ventricle(coords: np.ndarray) -> np.ndarray:
    x, y, z = coords
    return (
        (np.abs(x) < VOXEL_MM)
        & (y >= _THIRD_VENTRICLE_Y[0])
        & (y <= _THIRD_VENTRICLE_Y[1])
        & (z >= _THIRD_VENTRICLE_Z[0])
        & (z <= _THIRD_VENTRICLE_Z[1])
    )


def _white_matter(
    coords: np.ndarray, mask: np.ndarray, depth_mm: np.ndarray, cortex: np.ndarray
) -> np.ndarray:
    """The white-matter sheet beneath the cortex."""
    return (
        mask
        & ~cortex
        & (depth_mm <= CORTEX_DEPTH_MM + _WHITE_MATTER_MM)
        & (coords[2] > CORTEX_MIN_Z_MM)
        & (coords[1] > CORTEX_Y_MM[0])
        & (coords[1] < CORTEX_Y_MM[1])
    )


def _template(
    coords: np.ndarray,
    mask: np.ndarray,
    depth_mm: np.ndarray,
    cortex: np.ndarray,
    atlas: np.ndarray,
    table: pd.DataFrame,
) -> np.ndarray:
    z = coords[2]
    image = np.where(mask, _INTENSITY["deep"], 0.0)
    # Cortex brightest at mid-depth (a gentle layer profile).
    mid = CORTEX_DEPTH_MM / 2.0
    layer = 1.0 - 0.08 * ((depth_mm - mid) / mid) ** 2
    image = np.where(cortex, _INTENSITY["cortex"] * layer, image)
    white = _white_matter(coords, mask, depth_mm, cortex)
    image = np.where(white & (atlas == 0), _INTENSITY["white"], image)
    abbreviation_of = dict(zip(table["index"], table["abbreviation"], strict=True))
    for index, abbreviation in abbreviation_of.items():
        if abbreviation in _INTENSITY:
            image = np.where(atlas == index, _INTENSITY[abbreviation], image)
    ventricle = atlas == int(table.loc[table["abbreviation"] == "V", "index"].iloc[0])
    image = np.where(ventricle, _INTENSITY["ventricle"], image)
    rng = np.random.default_rng(TEMPLATE_TEXTURE_SEED)
    texture = smooth_unit_fields(rng, 1, GRID_SHAPE, NOISE_FWHM_VOX)[0]
    z_span = BRAIN_DORSAL_MM + BRAIN_VENTRAL_MM
    gain = 1.0 + _TEMPLATE_DORSAL_GAIN * ((z + BRAIN_VENTRAL_MM) / z_span - 0.5)
    image = image * gain * (1.0 + TEMPLATE_TEXTURE_SD * texture)
    return np.where(mask, image, 0.0).astype(np.float32)


def gaussian_kernel_rss(sigma_vox: float, ndim: int = 3) -> float:
    """Root-sum-of-squares of the separable Gaussian kernel that
    :func:`scipy.ndimage.gaussian_filter` applies (unit sum, cut at
    :data:`KERNEL_TRUNCATE` standard deviations).

    Smoothing white noise of unit variance with a kernel ``k`` gives a field of variance
    ``sum(k**2)``; dividing by this number restores unit variance.
    """
    radius = int(KERNEL_TRUNCATE * sigma_vox + 0.5)
    delta = np.zeros(2 * radius + 1)
    delta[radius] = 1.0
    kernel = ndimage.gaussian_filter1d(delta, sigma_vox, truncate=KERNEL_TRUNCATE, mode="constant")
    return float(np.sqrt(np.sum(kernel**2)) ** ndim)


def smooth_unit_fields(
    rng: np.random.Generator, n: int, shape: tuple[int, ...], fwhm_vox: float
) -> np.ndarray:
    """``n`` independent Gaussian-smoothed noise fields of unit voxelwise variance.

    White noise is smoothed with a Gaussian kernel of the given FWHM (periodic boundary,
    so every voxel has the same variance) and divided by the kernel's root-sum-of-squares.

    Parameters
    ----------
    rng
        Source of randomness.
    n
        Number of fields.
    shape
        Grid shape of one field.
    fwhm_vox
        Full width at half maximum of the kernel in voxels.

    Returns
    -------
    numpy.ndarray
        Array of shape ``(n, *shape)``, float64.
    """
    sigma = fwhm_vox / FWHM_PER_SIGMA
    white = rng.standard_normal((n, *shape))
    smooth = ndimage.gaussian_filter(
        white, (0.0,) + (sigma,) * len(shape), mode="wrap", truncate=KERNEL_TRUNCATE
    )
    smooth /= gaussian_kernel_rss(sigma, len(shape))
    return smooth


def draw_design(seed: int = EXAMPLE_SEED) -> Design:
    """Draw the runs of the example from the seed.

    Runs per animal are :data:`RUNS_PER_ANIMAL` shuffled; noisy, dropout and excluded runs
    are disjoint sets of runs of animals other than the motion animal; excluded runs come
    from animals with at least three runs (so every animal keeps two runs).
    """
    design_rng = np.random.default_rng(np.random.SeedSequence(seed).spawn(2)[0])
    counts = design_rng.permutation(np.array(RUNS_PER_ANIMAL))
    keys = [(a, r) for a, c in zip(ANIMALS, counts, strict=True) for r in range(1, c + 1)]
    n_runs = {a: int(c) for a, c in zip(ANIMALS, counts, strict=True)}
    candidates = [k for k in keys if k[0] != MOTION_ANIMAL]
    order = design_rng.permutation(len(candidates))
    excluded: list[tuple[str, int]] = []
    noisy: list[tuple[str, int]] = []
    dropout: list[tuple[str, int]] = []
    used_animals: set[str] = set()
    for i in order:
        key = candidates[int(i)]
        animal = key[0]
        if animal in used_animals:
            continue  # spread the planted problems over different animals
        if len(excluded) < N_EXCLUDED_RUNS and n_runs[animal] >= 3:
            excluded.append(key)
        elif len(noisy) < N_NOISY_RUNS:
            noisy.append(key)
        elif len(dropout) < N_DROPOUT_RUNS:
            dropout.append(key)
        else:
            continue
        used_animals.add(animal)
    runs = tuple(
        RunInfo(
            animal=a,
            run=r,
            noisy=(a, r) in noisy,
            dropout=(a, r) in dropout,
            excluded=(a, r) in excluded,
            motion=a == MOTION_ANIMAL,
        )
        for a, r in keys
    )
    return Design(seed=seed, runs=runs)


def _blob(anatomy: Anatomy, abbreviation: str, hemisphere: str, amplitude: float) -> np.ndarray:
    """A smooth blob centred on the deepest point of a region and confined to it.

    The blob is built in the right hemisphere and mirrored (the grid and atlas are mirror
    symmetric about x = 0), so left and right blobs are exact mirror images.
    """
    if hemisphere == "left":
        return _blob(anatomy, abbreviation, "right", amplitude)[::-1].copy()
    region = anatomy.atlas == anatomy.index_of(abbreviation, hemisphere)
    inner = ndimage.distance_transform_edt(region)
    centre_vox = np.unravel_index(int(np.argmax(inner)), GRID_SHAPE)
    centre = anatomy.coords[(slice(None), *centre_vox)]
    d2 = np.sum((anatomy.coords - centre.reshape(3, 1, 1, 1)) ** 2, axis=0)
    soft = ndimage.gaussian_filter(region.astype(float), 1.0)
    return amplitude * np.exp(-d2 / (2.0 * BLOB_SD_MM**2)) * soft * region


def true_effects(anatomy: Anatomy) -> dict[str, np.ndarray]:
    """The true group effect map of every contrast (sum of its region blobs)."""
    out: dict[str, np.ndarray] = {}
    for contrast in CONTRASTS:
        total = np.zeros(GRID_SHAPE)
        for (abbreviation, hemisphere), amplitude in AMPLITUDES[contrast].items():
            total += _blob(anatomy, abbreviation, hemisphere, amplitude)
        out[contrast] = total
    return out


def _rim(mask: np.ndarray) -> np.ndarray:
    return mask & ~ndimage.binary_erosion(mask, iterations=MOTION_RIM_VOX)


def _dropout_region(anatomy: Anatomy) -> np.ndarray:
    centre = np.asarray(DROPOUT_CENTRE_MM).reshape(3, 1, 1, 1)
    d2 = np.sum((anatomy.coords - centre) ** 2, axis=0)
    return anatomy.mask & (d2 <= DROPOUT_RADIUS_MM**2)


def simulate(anatomy: Anatomy, design: Design) -> Simulation:
    """Simulate every run's effect and variance maps.

    Parameters
    ----------
    anatomy
        From :func:`make_anatomy`.
    design
        From :func:`draw_design`; its seed also seeds the noise.

    Returns
    -------
    Simulation
        All components and the maps as written.
    """
    rng = np.random.default_rng(np.random.SeedSequence(design.seed).spawn(2)[1])
    mask = anatomy.mask
    z = anatomy.coords[2]
    n_runs = len(design.runs)
    animal_index = design.animal_index
    truth = true_effects(anatomy)
    rim = _rim(mask)
    dropout = _dropout_region(anatomy)
    z_span = BRAIN_DORSAL_MM + BRAIN_VENTRAL_MM
    ventral = (BRAIN_DORSAL_MM - z) / z_span  # 0 at the dorsal pole, 1 at the ventral pole
    rim_shape = np.where(rim, 1.0 - 2.0 * ventral, 0.0)
    y = anatomy.coords[1]
    ramp = np.clip(y / BRAIN_HALF_LENGTH_MM, -1.0, 1.0) * EXCLUDED_RAMP_AMPLITUDE

    noisy = np.array([r.noisy for r in design.runs])
    run_factor = rng.uniform(*S2_RUN_FACTOR, size=n_runs) * np.where(noisy, NOISY_FACTOR, 1.0)
    motion_factor = rng.uniform(*MOTION_RUN_FACTOR, size=n_runs)
    nan_runs = np.array([r.dropout for r in design.runs])
    excluded = np.array([r.excluded for r in design.runs])
    motion_runs = np.array([r.motion for r in design.runs])

    out: dict[str, dict[str, np.ndarray]] = {
        k: {} for k in ("animal", "run", "noise", "variance", "effect", "motion")
    }
    for contrast in CONTRASTS:
        u = smooth_unit_fields(rng, N_ANIMALS, GRID_SHAPE, NOISE_FWHM_VOX) * math.sqrt(TAU2)
        d = smooth_unit_fields(rng, n_runs, GRID_SHAPE, NOISE_FWHM_VOX) * math.sqrt(SIGMA2)
        log_mod = smooth_unit_fields(rng, n_runs, GRID_SHAPE, NOISE_FWHM_VOX * 4.0)
        s2 = (
            S2_BASE[contrast]
            * (1.0 + S2_VENTRAL_GAIN * np.clip(ventral, 0.0, 1.0))[None]
            * np.exp(S2_LOG_SD * log_mod)
            * run_factor[:, None, None, None]
        )
        del log_mod
        e = smooth_unit_fields(rng, n_runs, GRID_SHAPE, NOISE_FWHM_VOX) * np.sqrt(s2)
        motion = (
            MOTION_AMPLITUDE[contrast]
            * (motion_factor * motion_runs)[:, None, None, None]
            * rim_shape[None]
        )
        maps = truth[contrast][None] + u[animal_index] + d + e + motion
        maps += excluded[:, None, None, None] * ramp[None]
        maps = np.where(mask[None], maps, 0.0)
        variance = np.where(mask[None], s2, 0.0)
        holes = nan_runs[:, None, None, None] & dropout[None]
        maps[holes] = np.nan
        variance[holes] = np.nan
        out["animal"][contrast] = u.astype(np.float32)
        out["run"][contrast] = d.astype(np.float32)
        out["noise"][contrast] = e.astype(np.float32)
        out["variance"][contrast] = variance.astype(np.float32)
        out["effect"][contrast] = maps.astype(np.float32)
        out["motion"][contrast] = motion.astype(np.float32)
    return Simulation(
        design=design,
        truth={k: v.astype(np.float32) for k, v in truth.items()},
        animal_effect=out["animal"],
        run_effect=out["run"],
        first_level_noise=out["noise"],
        variance=out["variance"],
        effect=out["effect"],
        motion=out["motion"],
        dropout=dropout,
        rim=rim,
    )


# --------------------------------------------------------------------------------------
# Table, configuration and ground truth (text)
# --------------------------------------------------------------------------------------


def _map_name(animal: str, run: int, contrast: str, kind: str) -> str:
    return f"{MAP_DIR}/{animal}_ses-{SESSION}_run-{run}_{contrast}_{kind}.nii.gz"


def example_table(seed: int = EXAMPLE_SEED) -> pd.DataFrame:
    """The runs table of the example as written to ``runs.tsv``.

    One row per run and contrast, columns :data:`TABLE_COLUMNS`; ``exclude`` is bool,
    ``reason`` is empty unless the run is excluded; paths are relative to the table.
    """
    rows = []
    for run in draw_design(seed).runs:
        for contrast in CONTRASTS:
            rows.append(
                {
                    "animal": run.animal,
                    "session": SESSION,
                    "run": run.run,
                    "condition": contrast,
                    "effect": _map_name(run.animal, run.run, contrast, "effect"),
                    "variance": _map_name(run.animal, run.run, contrast, "variance"),
                    "exclude": run.excluded,
                    "reason": EXCLUDE_REASON if run.excluded else "",
                }
            )
    return pd.DataFrame(rows, columns=list(TABLE_COLUMNS))


def _table_text(table: pd.DataFrame) -> str:
    lines = ["\t".join(TABLE_COLUMNS)]
    for row in table.itertuples(index=False):
        values = [
            row.animal,
            str(row.session),
            str(row.run),
            row.condition,
            row.effect,
            row.variance,
            "true" if row.exclude else "false",
            row.reason,
        ]
        lines.append("\t".join(values))
    return "\n".join(lines) + "\n"


def _toml_float(value: float) -> str:
    return repr(float(value))


def example_config_text() -> str:
    """The ``study.toml`` of the example (the source of truth of the committed file)."""
    origin = ", ".join(_toml_float(v) for v in ORIGIN_MM)
    return f"""\
# grouplevel example study. ALL DATA IN THIS STUDY ARE INVENTED (simulated); see README.md.

[study]
# One line that names the study; it heads the report.
title = "Invented example: awake head-fixed mice, sound and left-forepaw blocks (simulated)"
# The runs table (tab-separated): one row per run and first-level condition.
# Map paths inside it are relative to the table's folder.
table = "runs.tsv"
# The template image: every map must share its voxel grid and affine (mm space).
template = "template.nii.gz"
# Voxels to analyse: the non-zero voxels of this image (same grid as the template).
mask = "brain_mask.nii.gz"
# Analyse a voxel only where at least this fraction of the included runs has data
# (a NaN marks missing data, e.g. signal dropout near the ear canals).
min_coverage = {_toml_float(MIN_COVERAGE)}

[space]
# The stereotaxic origin in template mm (x left->right, y posterior->anterior,
# z ventral->dorsal); reported coordinates are given relative to it.
origin_mm = [{origin}]
# The name of that origin, used in tables and the report.
origin_name = "{ORIGIN_NAME}"

[atlas]
# Integer label image on the template grid (0 = unlabelled).
image = "atlas.nii.gz"
# Label table (tab-separated): index, name, abbreviation, hemisphere, parent, color.
labels = "atlas.tsv"

[model]
# Group-level fixed effects as a formula over columns of the runs table;
# "1" = one group mean per first-level condition.
formula = "1"
# Between-run variance within an animal: "estimate" fits it by REML,
# "known" sets it to 0 and trusts the variance maps alone.
run_variance = "estimate"

[[comparison]]
# The two conditions compared within animals, from the runs that carry both: each
# run's paw map minus its sound map. The comparison is tested against how much it
# varies from animal to animal (a random intercept per animal on the difference).
name = "paw-minus-sound"
conditions = {{ paw = 1, sound = -1 }}

[inference]
# Permutations of whole animals (here: sign flips, since the contrast is the group
# mean). With 10 animals there are only 2^10 = 1024 distinct flips, fewer than asked,
# so all of them are enumerated (an exact test). 0 = parametric inference only.
permutations = 5000
# Seed of the random number generator (used when permutations are drawn at random).
seed = 1
# Two-sided test; clusters form where p < 0.001; 26-connected neighbours.
sided = "two"
cluster_forming_p = 0.001
connectivity = 26

[questions]
# Regions whose left/right symmetry is tested (any level of the atlas hierarchy).
symmetry = ["primary auditory area", "inferior colliculus"]
# Where the activation is expected; the rest of the brain is "off-target".
targets = ["auditory cortex", "inferior colliculus"]
# |laterality index| up to 0.2 counts as symmetric.
equivalence_margin = 0.2

[questions.paw]
# The paw contrast has its own questions: the left forepaw was stimulated, so the
# right (contralateral) forelimb area is expected to dominate.
symmetry = ["forelimb area"]
targets = ["forelimb area"]
stimulus_side = "left"

[questions.paw-minus-sound]
# Where does paw differ from sound? Expected: more in the right forelimb area, less in
# both auditory areas (a negative difference there).
symmetry = ["forelimb area", "primary auditory area"]
targets = ["forelimb area"]
stimulus_side = "left"
"""


def _world(anatomy: Anatomy, flat_index: int) -> list[float]:
    voxel = np.unravel_index(flat_index, GRID_SHAPE)
    return [round(float(v), 4) for v in anatomy.coords[(slice(None), *voxel)]]


def _truth_record(anatomy: Anatomy, sim: Simulation) -> dict[str, object]:
    design = sim.design
    origin = np.asarray(ORIGIN_MM)

    def relative(mm: list[float]) -> list[float]:
        return [round(float(v), 4) for v in np.asarray(mm) - origin]

    effects = []
    for contrast in CONTRASTS:
        for (abbreviation, hemisphere), amplitude in AMPLITUDES[contrast].items():
            index = anatomy.index_of(abbreviation, hemisphere)
            row = anatomy.atlas_table.set_index("index").loc[index]
            blob = np.where(anatomy.atlas == index, sim.truth[contrast], 0.0)
            peak = int(np.argmax(blob))
            peak_mm = _world(anatomy, peak)
            effects.append(
                {
                    "contrast": contrast,
                    "region": str(row["name"]),
                    "abbreviation": abbreviation,
                    "hemisphere": hemisphere,
                    "atlas_index": index,
                    "amplitude": amplitude,
                    "peak_value": round(float(blob.flat[peak]), 6),
                    "peak_mm": peak_mm,
                    "peak_from_origin_mm": relative(peak_mm),
                }
            )
    variance_ranges = {}
    for contrast in CONTRASTS:
        inside = sim.variance[contrast][:, anatomy.mask]
        variance_ranges[contrast] = {
            "base_dorsal": S2_BASE[contrast],
            "min": round(float(np.nanmin(inside)), 6),
            "max": round(float(np.nanmax(inside)), 6),
        }

    def runs(flag: str) -> list[dict[str, object]]:
        return [{"animal": r.animal, "run": r.run} for r in design.runs if getattr(r, flag)]

    dropout_idx = np.flatnonzero(sim.dropout)
    return {
        "note": "All data of this study are invented (simulated by grouplevel.example).",
        "seed": design.seed,
        "noise_model": "y = effect + u_animal + d_run + e_run (smooth Gaussian fields)",
        "tau2": TAU2,
        "sigma2": SIGMA2,
        "noise_fwhm_vox": NOISE_FWHM_VOX,
        "voxel_mm": VOXEL_MM,
        "variance_map_ranges": variance_ranges,
        "effects": effects,
        "motion": {
            "animal": MOTION_ANIMAL,
            "rim_voxels": MOTION_RIM_VOX,
            "amplitude": MOTION_AMPLITUDE,
            "sign": "positive dorsally, negative ventrally",
            "runs": runs("motion"),
        },
        "noisy_runs": {"factor": NOISY_FACTOR, "runs": runs("noisy")},
        "dropout": {
            "region": "left ventral-lateral edge near the ear canal",
            "centre_mm": list(DROPOUT_CENTRE_MM),
            "radius_mm": DROPOUT_RADIUS_MM,
            "voxels": int(dropout_idx.size),
            "runs": runs("dropout"),
        },
        "excluded_runs": {
            "reason": EXCLUDE_REASON,
            "artefact": "linear posterior-to-anterior ramp",
            "ramp_amplitude": EXCLUDED_RAMP_AMPLITUDE,
            "runs": runs("excluded"),
        },
        "origin": {"name": ORIGIN_NAME, "mm": list(ORIGIN_MM)},
        "runs_per_animal": {a: sum(1 for r in design.runs if r.animal == a) for a in ANIMALS},
    }


# --------------------------------------------------------------------------------------
# Shell: files
# --------------------------------------------------------------------------------------


def _save(array: np.ndarray, affine: np.ndarray, path: pathlib.Path, what: str) -> None:
    image = nib.Nifti1Image(array, affine)
    image.header.set_xyzt_units("mm")
    image.set_sform(affine, code="template")
    image.set_qform(affine, code="template")
    image.header["descrip"] = f"grouplevel example (invented): {what}"[:79].encode()
    nib.save(image, str(path))


def write_example(out_dir: pathlib.Path, seed: int = EXAMPLE_SEED) -> pathlib.Path:
    """Write the example study into ``out_dir`` and return the path of its study.toml.

    The folder is created if missing; an earlier example in it (recognised by its
    ``truth.json``) is overwritten. Any other folder that is not empty is refused: it
    may hold a study of one's own, whose study.toml and runs.tsv would be replaced.
    Written: ``study.toml``, ``runs.tsv``, ``template.nii.gz``, ``brain_mask.nii.gz``,
    ``atlas.nii.gz``, ``atlas.tsv``, ``truth.json``, ``truth/<contrast>_effect.nii.gz`` and
    ``maps/<animal>_ses-1_run-<r>_<contrast>_{effect,variance}.nii.gz``.

    Parameters
    ----------
    out_dir
        Target folder.
    seed
        Seed of the design draws and noise fields.

    Returns
    -------
    pathlib.Path
        ``out_dir / "study.toml"``.
    """
    out_dir = pathlib.Path(out_dir)
    if out_dir.is_dir() and any(out_dir.iterdir()) and not (out_dir / "truth.json").is_file():
        raise UserError(
            f"{out_dir}: is not empty and holds no earlier example; write the example into "
            "a new or empty folder"
        )
    if out_dir.exists() and not out_dir.is_dir():
        raise UserError(f"{out_dir}: exists and is not a folder; choose a new folder")
    (out_dir / MAP_DIR).mkdir(parents=True, exist_ok=True)
    (out_dir / "truth").mkdir(exist_ok=True)
    anatomy = make_anatomy()
    sim = simulate(anatomy, draw_design(seed))
    affine = anatomy.affine

    _save(anatomy.template, affine, out_dir / "template.nii.gz", "template")
    _save(anatomy.mask.astype(np.uint8), affine, out_dir / "brain_mask.nii.gz", "brain mask")
    _save(anatomy.atlas, affine, out_dir / "atlas.nii.gz", "atlas labels")
    labels = anatomy.atlas_table.copy()
    labels["parent"] = labels["parent"].astype(object).where(labels["parent"].notna(), "")
    labels.to_csv(out_dir / "atlas.tsv", sep="\t", index=False, lineterminator="\n")

    for contrast in CONTRASTS:
        _save(
            sim.truth[contrast],
            affine,
            out_dir / "truth" / f"{contrast}_effect.nii.gz",
            f"true {contrast} effect",
        )
        for k, run in enumerate(sim.design.runs):
            for kind, maps in (("effect", sim.effect), ("variance", sim.variance)):
                name = _map_name(run.animal, run.run, contrast, kind)
                _save(maps[contrast][k], affine, out_dir / name, f"{contrast} {kind}")

    table = example_table(seed)
    (out_dir / "runs.tsv").write_text(_table_text(table), encoding="utf-8")
    (out_dir / "truth.json").write_text(
        json.dumps(_truth_record(anatomy, sim), indent=2) + "\n", encoding="utf-8"
    )
    study = out_dir / "study.toml"
    study.write_text(example_config_text(), encoding="utf-8")
    return study
