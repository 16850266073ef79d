"""Study configuration: the TOML file, validated into frozen settings.

All defaults live here, each with a note on where it comes from. Unknown keys are
errors with a "did you mean" suggestion, never silently ignored, and every problem in
the file is reported at once.
"""

from __future__ import annotations

import difflib
import tomllib
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from grouplevel.anatomy.coordinates import (
    HEADER_AXIS_WORDS,
    TRUE_HEADER_AXES,
    header_to_true,
)
from grouplevel.errors import UserError

# The level and the sides of a test live with the statistics that use them (the core
# cannot read this module); they are defaults of the settings all the same.
from grouplevel.inference.significance import DEFAULT_ALPHA, DEFAULT_SIDED
from grouplevel.inference.significance import SIDES as SIDED_CHOICES
from grouplevel.intake.textcheck import control_characters
from grouplevel.outputs.columns import MANUSCRIPT_TABLES, P_CORRECTED, TABLES
from grouplevel.outputs.names import NAME_RULE, name_problem

# --- defaults (one place) -----------------------------------------------------------
DEFAULT_MIN_COVERAGE = 1.0  # every run must have data at a voxel unless the user allows less
DEFAULT_FORMULA = "1"  # one-sample design: the group mean
DEFAULT_RUN_VARIANCE = "estimate"  # estimate σ² (between-run variance) by REML
DEFAULT_DF_METHOD = "between"  # conservative between-animal df (Pinheiro & Bates 2000)
# The one contrast of an intercept-only design. With factors or covariates the default
# contrasts are named after what they test (grouplevel.design: mean-<level>,
# <level>-minus-<reference>, mean-over-groups, <covariate>-slope).
DEFAULT_CONTRAST_NAME = "mean"
# Centre numeric covariates at their mean over animals, so that an intercept is a mean
# at the average covariate, never an effect at covariate 0 (common practice for
# covariates in group models).
DEFAULT_CENTER_COVARIATES = True
# Permutation inference is the default: parametric cluster inference is unreliable
# (Eklund, Nichols & Knutsson 2016, PNAS 113:7900). 5000 permutations is common practice;
# fewer are run when every distinct permutation can be enumerated.
DEFAULT_PERMUTATIONS = 5000
DEFAULT_SEED = 1
# Seeds are whole numbers 0 ... 2**63 - 1: numpy's generators refuse negative seeds, and
# a seed that fits a signed 64-bit integer survives summary.json in any reader (common
# practice for 64-bit integer fields).
MAX_SEED = 2**63 - 1
DEFAULT_CONNECTIVITY = 26  # faces, edges and corners (common practice for 3-D clusters)
DEFAULT_CLUSTER_FORMING_P = 0.001  # Eklund et al. 2016: p = 0.001 keeps cluster FWE valid
DEFAULT_FDR = "bh"  # Benjamini & Hochberg 1995
DEFAULT_TFCE = True
DEFAULT_TFCE_E = 0.5  # Smith & Nichols 2009, NeuroImage 44:83
DEFAULT_TFCE_H = 2.0  # Smith & Nichols 2009
DEFAULT_MAX_ITER = 100  # Fisher scoring iterations per voxel; REML converges in ~5-15
# A within-animal effect that a contrast tests gets a random slope per animal: without it
# its test is anti-conservative (Barr, Levy, Scheepers & Tily 2013, J Mem Lang 68:255).
DEFAULT_RANDOM_SLOPES = "auto"
# Sessions nested in animals get their own variance when the runs table has repeated
# sessions with several runs (otherwise day-to-day variance is pooled into the run
# variance and a session-level effect is tested against too many df; common practice).
DEFAULT_SESSIONS = "auto"
DEFAULT_ORIGIN_NAME = "origin"
# The image headers are in true millimetres and NIfTI's RAS+ axes unless [space] says
# otherwise (NIfTI-1 standard: world x right, y anterior, z superior/dorsal).
DEFAULT_HEADER_UNITS_PER_MM = 1.0
DEFAULT_HEADER_AXES = TRUE_HEADER_AXES
# Share of the analysis mask that the atlas must label (our own choice: below one half the
# atlas is almost surely on another grid or in another space, and most clusters would be
# "unlabelled").
DEFAULT_ATLAS_MIN_COVERAGE = 0.5
# Sub-peaks of a cluster at least this far apart (1 mm: about five 0.2 mm voxels, a
# rodent-scale analogue of the 8 mm used for human data; common practice).
DEFAULT_SUBPEAK_DISTANCE_MM = 1.0
DEFAULT_TOP_REGIONS = 3  # regions listed per cluster in clusters.tsv
CLUSTER_METHODS = ("tfce", "cluster_mass", "cluster_extent", "voxel", "fdr")
# |laterality index| up to this counts as symmetric (±0.2: a common convention for |LI|;
# value from memory).
DEFAULT_EQUIVALENCE_MARGIN = 0.2
DEFAULT_EDGE_DISTANCE_VOXELS = 2  # shell of the mask tested for edge artefacts
# Runs whose robust z (median/MAD) exceeds this are flagged (Iglewicz & Hoaglin 1993,
# How to Detect and Handle Outliers; 3.5 — value from memory).
DEFAULT_OUTLIER_Z = 3.5
STIMULUS_SIDES = ("left", "right")
BACKENDS = ("local", "dask")
DEFAULT_BACKEND = "local"
# Share of the machine's memory that a run may use when [compute] memory_gb is not set
# (our own choice: leaves room for the operating system and other programs).
DEFAULT_MEMORY_SHARE = 0.25

# The columns of the one-page manuscript tables (tables/<result>_<table>.tex and .md),
# by their TSV names (grouplevel.outputs.columns): what a reader needs first — where
# (region, side, coordinates), how large, how strong, how sure (our own choice, after
# the usual layout of activation tables in the trade; common practice).
DEFAULT_MANUSCRIPT_COLUMNS: dict[str, tuple[str, ...]] = {
    "clusters": (
        "peak_region",
        "peak_region_hemisphere",
        "voxels",
        "volume_mm3",
        "peak_AP_mm",
        "peak_ML_mm",
        "peak_DV_mm",
        "z",
        P_CORRECTED,
    ),
    "regions": ("name", "hemisphere", "effect", "ci_low", "ci_high", "t", "df", "p", "q"),
    "symmetry": (
        "region",
        "li_effect",
        "difference",
        "ci_low",
        "ci_high",
        "p",
        "tost_p",
        "verdict",
    ),
    "specificity": (
        "kind",
        "name",
        "hemisphere",
        "mean_effect",
        "surviving_voxels",
        "activation_share",
    ),
    "consistency": ("animal", "runs", "effect", "ci_low", "ci_high", "positive", "loo_change"),
    "animals": ("animal", "name", "hemisphere", "effect", "se", "runs"),
}
# Rows of a one-page manuscript table: about what fits an A4 page in small type with a
# caption (our own measure); the full table is always written beside it.
DEFAULT_MANUSCRIPT_MAX_ROWS = 40

RUN_VARIANCE_CHOICES = ("estimate", "known")
CONNECTIVITY_CHOICES = (6, 18, 26)
FDR_CHOICES = ("bh", "by")
DF_CHOICES = ("between", "satterthwaite")
RANDOM_SLOPES_WORDS = ("auto", "none")
SESSIONS_CHOICES = ("auto", "model", "none")


@dataclass(frozen=True)
class StudySettings:
    table: Path
    title: str = "Untitled study"
    template: Path | None = None
    mask: Path | None = None
    min_coverage: float = DEFAULT_MIN_COVERAGE


@dataclass(frozen=True)
class SpaceSettings:
    """``[space]``: the coordinate origin, and what the image headers' units and axes
    really are.

    ``origin_mm`` (and ``[atlas] midline_mm``) are true millimetres on true axes: the
    header's coordinates divided by ``header_units_per_mm`` and put in the order that
    ``header_axes`` declares.
    """

    origin_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)
    origin_name: str = DEFAULT_ORIGIN_NAME
    header_units_per_mm: float = DEFAULT_HEADER_UNITS_PER_MM
    header_axes: tuple[str, str, str] = DEFAULT_HEADER_AXES

    @property
    def header_to_true(self) -> np.ndarray:
        """4 × 4 matrix from the headers' world coordinates to true RAS+ mm."""
        return header_to_true(self.header_units_per_mm, self.header_axes)

    @property
    def header_declared(self) -> bool:
        """Whether the headers were declared scaled or their axes exchanged."""
        return (
            self.header_units_per_mm != DEFAULT_HEADER_UNITS_PER_MM
            or tuple(self.header_axes) != DEFAULT_HEADER_AXES
        )


@dataclass(frozen=True)
class AtlasSettings:
    image: Path
    labels: Path
    midline_mm: float | None = None
    min_coverage: float = DEFAULT_ATLAS_MIN_COVERAGE


@dataclass(frozen=True)
class QuestionSettings:
    """What to ask of a result: symmetry, specificity, consistency and run quality."""

    symmetry: tuple[str, ...] = ()
    targets: tuple[str, ...] = ()
    stimulus_side: str | None = None
    equivalence_margin: float = DEFAULT_EQUIVALENCE_MARGIN
    edge_distance_voxels: int = DEFAULT_EDGE_DISTANCE_VOXELS
    outlier_z: float = DEFAULT_OUTLIER_Z


def default_memory_gb() -> float:
    """A safe share of the machine's physical memory, in GiB."""
    import os

    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        total = 8 * 2**30
    return round(DEFAULT_MEMORY_SHARE * total / 2**30, 2)


@dataclass(frozen=True)
class ComputeSettings:
    """Where and within what memory the work runs."""

    memory_gb: float = field(default_factory=default_memory_gb)
    backend: str = DEFAULT_BACKEND
    scheduler: str | None = None  # dask scheduler address; None: a local cluster
    workers: int | None = None  # local dask cluster size; None: the machine's cores


@dataclass(frozen=True)
class ClusterSettings:
    method: str | None = None  # None: "tfce" with permutations and TFCE, else see below
    subpeak_distance_mm: float = DEFAULT_SUBPEAK_DISTANCE_MM
    top_regions: int = DEFAULT_TOP_REGIONS

    def resolved_method(self, inference: InferenceSettings) -> str:
        """The method that decides which clusters are reported as significant."""
        if self.method is not None:
            return self.method
        if inference.permutations == 0:
            return "fdr"
        return "tfce" if inference.tfce else "cluster_mass"


@dataclass(frozen=True)
class TableSettings:
    """``[tables]``: the columns and the row limit of the one-page manuscript tables."""

    columns: dict[str, tuple[str, ...]] = field(
        default_factory=lambda: dict(DEFAULT_MANUSCRIPT_COLUMNS)
    )
    max_rows: int = DEFAULT_MANUSCRIPT_MAX_ROWS


@dataclass(frozen=True)
class ModelSettings:
    formula: str = DEFAULT_FORMULA
    run_variance: str = DEFAULT_RUN_VARIANCE
    df: str = DEFAULT_DF_METHOD
    max_iter: int = DEFAULT_MAX_ITER
    center_covariates: bool = DEFAULT_CENTER_COVARIATES
    # reference level per text variable of the formula (default: alphabetically first)
    reference: dict[str, str] = field(default_factory=dict)
    # "auto", "none" or the formula variables that get a random slope per animal
    random_slopes: str | tuple[str, ...] = DEFAULT_RANDOM_SLOPES
    sessions: str = DEFAULT_SESSIONS
    variance_groups: str | None = None  # animal-level factor: one τ² per level


@dataclass(frozen=True)
class ContrastSpec:
    name: str
    weights: dict[str, float]


@dataclass(frozen=True)
class FTestSpec:
    """An F-test of several group contrasts at once (``[[ftest]]``): its name and the
    names of the contrasts (default or ``[[contrast]]``) that are its rows."""

    name: str
    contrasts: tuple[str, ...]


@dataclass(frozen=True)
class ComparisonSpec:
    """A within-animal comparison of first-level conditions (``[[comparison]]``).

    ``conditions`` maps a condition (a value of the runs table's ``condition`` column)
    to its weight; each run that carries every named condition contributes the weighted
    sum of its condition maps.
    """

    name: str
    conditions: dict[str, float]


@dataclass(frozen=True)
class InferenceSettings:
    permutations: int = DEFAULT_PERMUTATIONS
    seed: int = DEFAULT_SEED
    sided: str = DEFAULT_SIDED
    connectivity: int = DEFAULT_CONNECTIVITY
    cluster_forming_p: float = DEFAULT_CLUSTER_FORMING_P
    alpha: float = DEFAULT_ALPHA
    fdr: str = DEFAULT_FDR
    tfce: bool = DEFAULT_TFCE
    tfce_e: float = DEFAULT_TFCE_E
    tfce_h: float = DEFAULT_TFCE_H


@dataclass(frozen=True)
class Settings:
    """Everything a study's TOML says, with defaults filled in and paths resolved."""

    source: Path
    study: StudySettings
    space: SpaceSettings
    model: ModelSettings
    contrasts: tuple[ContrastSpec, ...]
    inference: InferenceSettings
    atlas: AtlasSettings | None = None
    clusters: ClusterSettings = field(default_factory=ClusterSettings)
    questions: QuestionSettings = field(default_factory=QuestionSettings)
    # per first-level contrast overrides of [questions] ([questions.<contrast>])
    questions_by_contrast: dict[str, QuestionSettings] = field(default_factory=dict)
    compute: ComputeSettings = field(default_factory=ComputeSettings)
    user_contrasts: bool = field(default=False)
    # within-animal comparisons of first-level conditions ([[comparison]])
    comparisons: tuple[ComparisonSpec, ...] = ()
    # F-tests declared in the study file ([[ftest]]); the design adds one per factor
    # with more than two levels (grouplevel.intake.design)
    ftests: tuple[FTestSpec, ...] = ()
    tables: TableSettings = field(default_factory=TableSettings)

    def questions_for(self, first_level: str | None) -> QuestionSettings:
        """The questions of one first-level contrast (its override, else [questions])."""
        if first_level is not None and first_level in self.questions_by_contrast:
            return self.questions_by_contrast[first_level]
        return self.questions

    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON form (paths as strings) for summary.json."""

        def clean(value: Any) -> Any:
            if isinstance(value, Path):
                return str(value)
            if isinstance(value, dict):
                return {k: clean(v) for k, v in value.items()}
            if isinstance(value, list | tuple):
                return [clean(v) for v in value]
            return value

        plain = clean(asdict(self))
        # the method that decides significance, as resolved (null would hide the default)
        plain["clusters"]["method"] = self.clusters.resolved_method(self.inference)
        return plain


# --- schema -------------------------------------------------------------------------
# section -> allowed keys. Types are checked by the readers below.
_SCHEMA: dict[str, tuple[str, ...]] = {
    "study": ("title", "table", "template", "mask", "min_coverage"),
    "space": ("origin_mm", "origin_name", "header_units_per_mm", "header_axes"),
    "atlas": ("image", "labels", "midline_mm", "min_coverage"),
    "clusters": ("method", "subpeak_distance_mm", "top_regions"),
    "compute": ("memory_gb", "backend", "scheduler", "workers"),
    "questions": (
        "symmetry",
        "targets",
        "stimulus_side",
        "equivalence_margin",
        "edge_distance_voxels",
        "outlier_z",
    ),
    "model": (
        "formula",
        "run_variance",
        "df",
        "max_iter",
        "center_covariates",
        "reference",
        "random_slopes",
        "sessions",
        "variance_groups",
    ),
    "contrast": ("name", "weights"),
    "ftest": ("name", "contrasts"),
    "comparison": ("name", "conditions"),
    "tables": (*MANUSCRIPT_TABLES, "max_rows"),
    "inference": (
        "permutations",
        "seed",
        "sided",
        "connectivity",
        "cluster_forming_p",
        "alpha",
        "fdr",
        "tfce",
        "tfce_e",
        "tfce_h",
    ),
}


def _suggest(word: str, choices: list[str] | tuple[str, ...]) -> str:
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


class _Reader:
    """Collects problems while reading one TOML file."""

    def __init__(self, path: Path) -> None:
        self.file = path
        self.problems: list[str] = []

    def problem(self, where: str, text: str) -> None:
        self.problems.append(f"{self.file.name}: {where}: {text}")

    def check_keys(self, where: str, table: dict[str, Any], allowed: tuple[str, ...]) -> None:
        for key in table:
            if key not in allowed:
                self.problem(
                    f"[{where}] {key}",
                    f"unknown key{_suggest(key, allowed)}; allowed keys: {', '.join(allowed)}",
                )

    def get(
        self,
        where: str,
        table: dict[str, Any],
        key: str,
        kind: type | tuple[type, ...],
        default: Any = None,
        required: bool = False,
    ) -> Any:
        if key not in table:
            if required:
                self.problem(f"[{where}] {key}", "required key is missing")
            return default
        value = table[key]
        kinds = kind if isinstance(kind, tuple) else (kind,)
        # TOML integers are acceptable where a float is asked for; booleans never are.
        if float in kinds and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if isinstance(value, bool) and bool not in kinds:
            ok = False
        else:
            ok = isinstance(value, kinds)
        if not ok:
            names = " or ".join(k.__name__ for k in kinds)
            self.problem(f"[{where}] {key}", f"expected {names}, got {value!r}")
            return default
        return value

    def path(self, where: str, table: dict[str, Any], key: str, required: bool = False):
        value = self.get(where, table, key, str, required=required)
        if value is None:
            return None
        p = Path(value).expanduser()
        return p if p.is_absolute() else (self.file.parent / p).resolve()


def load_settings(path: str | Path) -> Settings:
    """Read and validate a study TOML file.

    Parameters
    ----------
    path
        The study's TOML file. Relative paths inside it are relative to its folder.

    Returns
    -------
    Settings
        Frozen settings with every default filled in.

    Raises
    ------
    UserError
        Listing every problem found in the file (unknown keys, wrong types, bad values).
    """
    path = Path(path).expanduser().resolve()
    raw = _parse_toml(path)
    r = _Reader(path)
    _check_sections(r, raw)
    study = _read_study(r, _section(r, raw, "study", required=True))
    space = _read_space(r, _section(r, raw, "space"))
    atlas = _read_atlas(r, _section(r, raw, "atlas")) if "atlas" in raw else None
    model = _read_model(r, _section(r, raw, "model"))
    contrasts = _read_contrasts(r, raw.get("contrast", []))
    comparisons = _read_comparisons(r, raw)
    ftests = _read_ftests(r, raw.get("ftest", []), contrasts)
    inference = _read_inference(r, _section(r, raw, "inference"))
    clusters = _read_clusters(r, _section(r, raw, "clusters"), inference)
    questions, overrides = _read_questions_tables(r, raw.get("questions", {}))
    compute = _read_compute(r, _section(r, raw, "compute"))
    tables = _read_tables(r, _section(r, raw, "tables"))
    if r.problems:
        raise UserError(f"{path}: {len(r.problems)} problem(s) in the study file", r.problems)
    return Settings(
        source=path,
        study=study,
        space=space,
        model=model,
        contrasts=contrasts,
        inference=inference,
        atlas=atlas,
        clusters=clusters,
        questions=questions,
        questions_by_contrast=overrides,
        compute=compute,
        # without [[contrast]] blocks the design's default contrasts are tested, each
        # named after what it tests (grouplevel.design); none is assumed here
        user_contrasts=bool(contrasts),
        comparisons=comparisons,
        ftests=ftests,
        tables=tables,
    )


def _parse_toml(path: Path) -> dict[str, Any]:
    """The study file's TOML as nested dicts; a missing or unreadable file is a UserError."""
    if not path.is_file():
        raise UserError(f"{path}: study file not found")
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: not valid TOML: {exc}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: cannot read the study file: {exc}") from None


def _check_sections(r: _Reader, raw: dict[str, Any]) -> None:
    """A problem for every top-level section that the schema does not know."""
    for section in raw:
        if section not in _SCHEMA:
            r.problem(
                f"[{section}]",
                f"unknown section{_suggest(section, list(_SCHEMA))}; "
                f"allowed sections: {', '.join(_SCHEMA)}",
            )


def _section(r: _Reader, raw: dict[str, Any], name: str, required: bool = False) -> dict[str, Any]:
    """The table of section ``name`` with its keys checked; {} when absent or not a table."""
    value = raw.get(name, {})
    if name not in raw and required:
        r.problem(f"[{name}]", "required section is missing")
    if not isinstance(value, dict):
        r.problem(f"[{name}]", "must be a table (a [section] header)")
        return {}
    r.check_keys(name, value, _SCHEMA[name])
    return value


def _read_study(r: _Reader, s: dict[str, Any]) -> StudySettings:
    """``[study]``: the runs table, title, template, mask and minimum coverage."""
    table = r.path("study", s, "table", required=True)
    min_cov = r.get("study", s, "min_coverage", float, DEFAULT_MIN_COVERAGE)
    if not 0.0 < min_cov <= 1.0:
        r.problem("[study] min_coverage", f"must be in (0, 1], got {min_cov}")
    return StudySettings(
        table=table if table is not None else r.file.parent,
        title=r.get("study", s, "title", str, "Untitled study"),
        template=r.path("study", s, "template"),
        mask=r.path("study", s, "mask"),
        min_coverage=min_cov,
    )


def _read_space(r: _Reader, sp: dict[str, Any]) -> SpaceSettings:
    """``[space]``: the origin of the coordinates and its name."""
    origin = r.get("space", sp, "origin_mm", list, [0.0, 0.0, 0.0])
    if not (
        len(origin) == 3
        and all(isinstance(v, int | float) and not isinstance(v, bool) for v in origin)
    ):
        r.problem("[space] origin_mm", f"must be three numbers [x, y, z] in mm, got {origin!r}")
        origin = [0.0, 0.0, 0.0]
    return SpaceSettings(
        origin_mm=tuple(float(v) for v in origin),  # type: ignore[arg-type]
        origin_name=r.get("space", sp, "origin_name", str, DEFAULT_ORIGIN_NAME),
        header_units_per_mm=_read_header_units(r, sp),
        header_axes=_read_header_axes(r, sp),
    )


def _read_header_units(r: _Reader, sp: dict[str, Any]) -> float:
    """``[space] header_units_per_mm``: a positive number (10 for a ×10 header)."""
    units = r.get("space", sp, "header_units_per_mm", float, DEFAULT_HEADER_UNITS_PER_MM)
    if not (np.isfinite(units) and units > 0):
        r.problem(
            "[space] header_units_per_mm",
            f"must be a positive number (10 when the headers store 0.1 mm voxels as 1 mm; "
            f"1 when they are in true mm), got {units}",
        )
        return DEFAULT_HEADER_UNITS_PER_MM
    return float(units)


def _read_header_axes(r: _Reader, sp: dict[str, Any]) -> tuple[str, str, str]:
    """``[space] header_axes``: towards which side of the animal header x, y, z grow."""
    axes = r.get("space", sp, "header_axes", list, list(DEFAULT_HEADER_AXES))
    words = [str(a).strip().lower() for a in axes] if isinstance(axes, list) else []
    sides = [HEADER_AXIS_WORDS[w][0] for w in words if w in HEADER_AXIS_WORDS]
    if len(words) != 3 or len(sides) != 3 or sorted(sides) != [0, 1, 2]:
        r.problem(
            "[space] header_axes",
            "must say towards which side of the animal the headers' x, y and z grow, "
            f"one word each from {', '.join(HEADER_AXIS_WORDS)}, naming left/right, "
            'anterior/posterior and dorsal/ventral once each (e.g. ["right", '
            f'"dorsal", "anterior"]); got {axes!r}',
        )
        return DEFAULT_HEADER_AXES
    return (words[0], words[1], words[2])


def _read_atlas(r: _Reader, a: dict[str, Any]) -> AtlasSettings | None:
    """``[atlas]``: image, labels, midline and coverage; None when a file is not named."""
    image = r.path("atlas", a, "image", required=True)
    labels = r.path("atlas", a, "labels", required=True)
    midline = r.get("atlas", a, "midline_mm", float, None)
    atlas_cov = r.get("atlas", a, "min_coverage", float, DEFAULT_ATLAS_MIN_COVERAGE)
    if not 0.0 < atlas_cov <= 1.0:
        r.problem("[atlas] min_coverage", f"must be in (0, 1], got {atlas_cov}")
    if image is None or labels is None:
        return None
    return AtlasSettings(image=image, labels=labels, midline_mm=midline, min_coverage=atlas_cov)


def _read_model(r: _Reader, m: dict[str, Any]) -> ModelSettings:
    """``[model]``: formula, run variance, df rule, iterations, references, random effects."""
    run_variance = r.get("model", m, "run_variance", str, DEFAULT_RUN_VARIANCE)
    if run_variance not in RUN_VARIANCE_CHOICES:
        r.problem(
            "[model] run_variance",
            f"must be one of {', '.join(RUN_VARIANCE_CHOICES)}, got {run_variance!r}"
            + _suggest(run_variance, RUN_VARIANCE_CHOICES),
        )
    df = r.get("model", m, "df", str, DEFAULT_DF_METHOD)
    if df not in DF_CHOICES:
        r.problem(
            "[model] df",
            f"must be one of {', '.join(DF_CHOICES)}, got {df!r}" + _suggest(df, DF_CHOICES),
        )
    max_iter = r.get("model", m, "max_iter", int, DEFAULT_MAX_ITER)
    if max_iter < 1:
        r.problem("[model] max_iter", f"must be at least 1, got {max_iter}")
    formula = r.get("model", m, "formula", str, DEFAULT_FORMULA).strip()
    if not formula:
        r.problem("[model] formula", 'is empty; use "1" for the group mean')
    reference = r.get("model", m, "reference", dict, {})
    for var, level in list(reference.items()):
        if not isinstance(level, str) or not level:
            r.problem(
                f"[model] reference.{var}",
                f"must be the name of a level (text), got {level!r}; e.g. reference = "
                '{ genotype = "wt" }',
            )
            reference.pop(var)
    return ModelSettings(
        formula=formula,
        run_variance=run_variance,
        df=df,
        max_iter=max_iter,
        center_covariates=r.get("model", m, "center_covariates", bool, DEFAULT_CENTER_COVARIATES),
        reference=dict(reference),
        **_read_random_effects(r, m),
    )


def _read_contrasts(r: _Reader, blocks: Any) -> tuple[ContrastSpec, ...]:
    """``[[contrast]]`` blocks: a name (it names a folder) and weights on coefficients."""
    contrasts: list[ContrastSpec] = []
    if not isinstance(blocks, list):
        r.problem("[contrast]", "write contrasts as [[contrast]] blocks (an array of tables)")
        blocks = []
    seen: set[str] = set()
    for i, c in enumerate(blocks, start=1):
        where = f"contrast {i}"
        if not isinstance(c, dict):
            r.problem(f"[[contrast]] {i}", "must be a table")
            continue
        r.check_keys(where, c, _SCHEMA["contrast"])
        name = r.get(where, c, "name", str, required=True)
        weights = r.get(where, c, "weights", dict, required=True)
        if name is None or weights is None:
            continue
        why = name_problem(name)
        if why:
            r.problem(f"[{where}] name", f"{name!r} {why}; it names a folder: {NAME_RULE}")
            continue
        if name.casefold() in seen:
            r.problem(
                f"[{where}] name",
                f"contrast name {name!r} is used twice (names that differ only in case "
                "count as one: they are one folder on many file systems)",
            )
        seen.add(name.casefold())
        clean: dict[str, float] = {}
        for coef, w in weights.items():
            if isinstance(w, bool) or not isinstance(w, int | float):
                r.problem(f"[{where}] weights.{coef}", f"weight must be a number, got {w!r}")
            else:
                clean[coef] = float(w)
        if clean and all(w == 0 for w in clean.values()):
            r.problem(f"[{where}] weights", "all weights are zero")
        contrasts.append(ContrastSpec(name=name, weights=clean))
    for spec in contrasts:  # names become table cells: no tab or line break in them
        bad = control_characters(spec.name)
        if bad:
            r.problem(
                "[[contrast]] name",
                f"{spec.name!r} holds {', '.join(bad)}, which would break the rows of the "
                "tables written; remove it",
            )
    return tuple(contrasts)


def _read_ftests(
    r: _Reader, blocks: Any, contrasts: tuple[ContrastSpec, ...]
) -> tuple[FTestSpec, ...]:
    """``[[ftest]]`` blocks: a name (it names a folder) and the contrasts tested jointly.

    Whether the named contrasts exist and are linearly independent is checked against
    each design (:mod:`grouplevel.intake.study`), where the default contrasts are known.
    """
    if not isinstance(blocks, list):
        r.problem("[ftest]", "write F-tests as [[ftest]] blocks (an array of tables)")
        return ()
    out: list[FTestSpec] = []
    taken = {c.name.casefold() for c in contrasts}
    seen: set[str] = set()
    for i, block in enumerate(blocks, start=1):
        where = f"ftest {i}"
        if not isinstance(block, dict):
            r.problem(f"[[ftest]] {i}", "must be a table")
            continue
        r.check_keys(where, block, _SCHEMA["ftest"])
        name = r.get(where, block, "name", str, required=True)
        rows = r.get(where, block, "contrasts", list, required=True)
        if name is None or rows is None:
            continue
        why = name_problem(name) or (
            f"holds {', '.join(control_characters(name))}" if control_characters(name) else None
        )
        if why:
            r.problem(f"[{where}] name", f"{name!r} {why}; it names a folder: {NAME_RULE}")
            continue
        if name.casefold() in seen or name.casefold() in taken:
            r.problem(
                f"[{where}] name",
                f"{name!r} is already the name of another [[ftest]] or [[contrast]] (names "
                "that differ only in case count as one); choose another",
            )
        seen.add(name.casefold())
        if not rows or not all(isinstance(x, str) for x in rows):
            r.problem(
                f"[{where}] contrasts",
                'must be a list of contrast names, e.g. ["high-minus-none", "low-minus-none"]',
            )
            continue
        twice = sorted({x for x in rows if rows.count(x) > 1})
        if twice:
            r.problem(
                f"[{where}] contrasts",
                f"names {', '.join(repr(x) for x in twice)} more than once; each contrast is "
                "one row of the F-test",
            )
            continue
        out.append(FTestSpec(name=name, contrasts=tuple(rows)))
    return tuple(out)


def _read_inference(r: _Reader, inf: dict[str, Any]) -> InferenceSettings:
    """``[inference]``: permutations, seed, sides, clusters, alpha, FDR and TFCE."""
    permutations = r.get("inference", inf, "permutations", int, DEFAULT_PERMUTATIONS)
    if permutations < 0:
        r.problem("[inference] permutations", f"must be 0 or more, got {permutations}")
    sided = r.get("inference", inf, "sided", str, DEFAULT_SIDED)
    if sided not in SIDED_CHOICES:
        r.problem(
            "[inference] sided",
            f"must be one of {', '.join(SIDED_CHOICES)}, got {sided!r}"
            + _suggest(sided, SIDED_CHOICES),
        )
    connectivity = r.get("inference", inf, "connectivity", int, DEFAULT_CONNECTIVITY)
    if connectivity not in CONNECTIVITY_CHOICES:
        r.problem(
            "[inference] connectivity",
            f"must be 6 (faces), 18 (faces and edges) or 26 (faces, edges and corners), "
            f"got {connectivity}",
        )
    cfp = r.get("inference", inf, "cluster_forming_p", float, DEFAULT_CLUSTER_FORMING_P)
    if not 0.0 < cfp < 1.0:
        r.problem("[inference] cluster_forming_p", f"must be between 0 and 1, got {cfp}")
    alpha = r.get("inference", inf, "alpha", float, DEFAULT_ALPHA)
    if not 0.0 < alpha < 1.0:
        r.problem("[inference] alpha", f"must be between 0 and 1, got {alpha}")
    fdr = r.get("inference", inf, "fdr", str, DEFAULT_FDR)
    if fdr not in FDR_CHOICES:
        r.problem(
            "[inference] fdr",
            f'must be "bh" (Benjamini-Hochberg) or "by" (Benjamini-Yekutieli), got {fdr!r}',
        )
    tfce_e = r.get("inference", inf, "tfce_e", float, DEFAULT_TFCE_E)
    tfce_h = r.get("inference", inf, "tfce_h", float, DEFAULT_TFCE_H)
    if tfce_e <= 0 or tfce_h <= 0:
        r.problem("[inference] tfce_e / tfce_h", "TFCE exponents must be positive")
    seed = r.get("inference", inf, "seed", int, DEFAULT_SEED)
    seed_problem = seed_error(seed)
    if seed_problem:
        r.problem("[inference] seed", seed_problem)
        seed = DEFAULT_SEED
    return InferenceSettings(
        permutations=permutations,
        seed=seed,
        sided=sided,
        connectivity=connectivity,
        cluster_forming_p=cfp,
        alpha=alpha,
        fdr=fdr,
        tfce=r.get("inference", inf, "tfce", bool, DEFAULT_TFCE),
        tfce_e=tfce_e,
        tfce_h=tfce_h,
    )


def _read_clusters(r: _Reader, cl: dict[str, Any], inference: InferenceSettings) -> ClusterSettings:
    """``[clusters]``: the method that decides significance (checked against
    ``inference``), the sub-peak distance and the regions listed per cluster."""
    method = r.get("clusters", cl, "method", str, None)
    if method is not None and method not in CLUSTER_METHODS:
        r.problem(
            "[clusters] method",
            f"must be one of {', '.join(CLUSTER_METHODS)}, got {method!r}"
            + _suggest(method, CLUSTER_METHODS),
        )
    elif method is not None and method != "fdr" and inference.permutations == 0:
        r.problem(
            "[clusters] method",
            f'{method!r} needs permutations; set [inference] permutations > 0 or use "fdr"',
        )
    elif method == "tfce" and not inference.tfce:
        r.problem("[clusters] method", '"tfce" needs [inference] tfce = true')
    subpeak = r.get("clusters", cl, "subpeak_distance_mm", float, DEFAULT_SUBPEAK_DISTANCE_MM)
    if subpeak <= 0:
        r.problem("[clusters] subpeak_distance_mm", f"must be positive, got {subpeak}")
    top = r.get("clusters", cl, "top_regions", int, DEFAULT_TOP_REGIONS)
    if top < 1:
        r.problem("[clusters] top_regions", f"must be at least 1, got {top}")
    return ClusterSettings(method=method, subpeak_distance_mm=subpeak, top_regions=top)


def _read_tables(r: _Reader, t: dict[str, Any]) -> TableSettings:
    """``[tables]``: manuscript columns per table (TSV column names) and the row limit."""
    columns = dict(DEFAULT_MANUSCRIPT_COLUMNS)
    for key in MANUSCRIPT_TABLES:
        value = r.get("tables", t, key, list, None)
        if value is None:
            continue
        known = TABLES[key].names
        if not value:
            r.problem(f"[tables] {key}", f"name at least one column of {TABLES[key].file}")
            continue
        bad = [v for v in value if not isinstance(v, str) or v not in known]
        for name in bad:
            hint = _suggest(name, known) if isinstance(name, str) else ""
            r.problem(
                f"[tables] {key}",
                f"unknown column {name!r}{hint}; the columns of {TABLES[key].file} are "
                + ", ".join(known),
            )
        if len(set(value)) != len(value):
            r.problem(f"[tables] {key}", "names a column twice; name each column once")
        if not bad:
            columns[key] = tuple(value)
    max_rows = r.get("tables", t, "max_rows", int, DEFAULT_MANUSCRIPT_MAX_ROWS)
    if max_rows < 1:
        r.problem("[tables] max_rows", f"must be at least 1, got {max_rows}")
    return TableSettings(columns=columns, max_rows=max_rows)


def _read_questions_tables(
    r: _Reader, q_raw: Any
) -> tuple[QuestionSettings, dict[str, QuestionSettings]]:
    """``[questions]`` and its ``[questions.<contrast>]`` overrides (keys they omit come
    from ``[questions]``)."""
    overrides: dict[str, QuestionSettings] = {}
    questions = QuestionSettings()
    if not isinstance(q_raw, dict):
        r.problem("[questions]", "must be a table (a [questions] header)")
        return questions, overrides
    base_keys = {k: v for k, v in q_raw.items() if not isinstance(v, dict)}
    questions = _read_questions(r, "questions", base_keys, QuestionSettings())
    for name, sub in q_raw.items():
        if isinstance(sub, dict):
            overrides[name] = _read_questions(r, f"questions.{name}", sub, questions)
    return questions, overrides


def _read_compute(r: _Reader, co: dict[str, Any]) -> ComputeSettings:
    """``[compute]``: memory, backend (dask only when installed), scheduler, workers."""
    memory_gb = r.get("compute", co, "memory_gb", float, None)
    if memory_gb is not None and memory_gb <= 0:
        r.problem("[compute] memory_gb", f"must be positive, got {memory_gb}")
        memory_gb = None
    backend = r.get("compute", co, "backend", str, DEFAULT_BACKEND)
    if backend not in BACKENDS:
        r.problem(
            "[compute] backend",
            f"must be one of {', '.join(BACKENDS)}, got {backend!r}" + _suggest(backend, BACKENDS),
        )
    if backend == "dask":
        import importlib.util

        if importlib.util.find_spec("distributed") is None:
            r.problem(
                "[compute] backend",
                '"dask" needs the optional packages dask and distributed: '
                "pip install 'grouplevel[distributed]'",
            )
    workers = r.get("compute", co, "workers", int, None)
    if workers is not None and workers < 1:
        r.problem("[compute] workers", f"must be at least 1, got {workers}")
    return ComputeSettings(
        memory_gb=memory_gb if memory_gb is not None else default_memory_gb(),
        backend=backend,
        scheduler=r.get("compute", co, "scheduler", str, None),
        workers=workers,
    )


def _read_comparisons(r: _Reader, raw: dict[str, Any]) -> tuple[ComparisonSpec, ...]:
    """``[[comparison]]`` blocks: a name and condition weights, e.g.
    ``conditions = { paw = 1, sound = -1 }``."""
    blocks = raw.get("comparison", [])
    if not isinstance(blocks, list):
        r.problem("[comparison]", "write comparisons as [[comparison]] blocks (an array of tables)")
        return ()
    out: list[ComparisonSpec] = []
    seen: set[str] = set()
    for i, block in enumerate(blocks, start=1):
        where = f"comparison {i}"
        if not isinstance(block, dict):
            r.problem(f"[[comparison]] {i}", "must be a table")
            continue
        r.check_keys(where, block, _SCHEMA["comparison"])
        name = r.get(where, block, "name", str, required=True)
        conditions = r.get(where, block, "conditions", dict, required=True)
        if name is None or conditions is None:
            continue
        if name in seen:
            r.problem(f"[{where}] name", f"comparison name {name!r} is used twice")
        seen.add(name)
        weights: dict[str, float] = {}
        for cond, w in conditions.items():
            if isinstance(w, bool) or not isinstance(w, int | float):
                r.problem(f"[{where}] conditions.{cond}", f"weight must be a number, got {w!r}")
            elif w != 0:
                weights[str(cond)] = float(w)
        if not weights:
            r.problem(
                f"[{where}] conditions",
                "needs at least one condition with a non-zero weight, "
                "e.g. conditions = { paw = 1, sound = -1 }",
            )
            continue
        out.append(ComparisonSpec(name=name, conditions=weights))
    return tuple(out)


def _read_random_effects(r: _Reader, m: dict[str, Any]) -> dict[str, Any]:
    """``random_slopes``, ``sessions`` and ``variance_groups`` of [model]."""
    slopes = r.get("model", m, "random_slopes", (str, list), DEFAULT_RANDOM_SLOPES)
    if isinstance(slopes, str) and slopes not in RANDOM_SLOPES_WORDS:
        r.problem(
            "[model] random_slopes",
            f'must be "auto", "none" or a list of formula variables, got {slopes!r}'
            + _suggest(slopes, RANDOM_SLOPES_WORDS),
        )
        slopes = DEFAULT_RANDOM_SLOPES
    elif isinstance(slopes, list):
        if not slopes or not all(isinstance(v, str) and v.strip() for v in slopes):
            r.problem(
                "[model] random_slopes",
                f'a list must name formula variables (e.g. ["drug"]), got {slopes!r}',
            )
            slopes = DEFAULT_RANDOM_SLOPES
        else:
            slopes = tuple(dict.fromkeys(v.strip() for v in slopes))
    sessions = r.get("model", m, "sessions", str, DEFAULT_SESSIONS)
    if sessions not in SESSIONS_CHOICES:
        r.problem(
            "[model] sessions",
            f"must be one of {', '.join(SESSIONS_CHOICES)}, got {sessions!r}"
            + _suggest(sessions, SESSIONS_CHOICES),
        )
        sessions = DEFAULT_SESSIONS
    groups = r.get("model", m, "variance_groups", str, None)
    if groups is not None and not groups.strip():
        r.problem(
            "[model] variance_groups", "is empty; name an animal-level column or leave it out"
        )
        groups = None
    return {
        "random_slopes": slopes,
        "sessions": sessions,
        "variance_groups": groups.strip() if groups else None,
    }


def _read_questions(
    r: _Reader, where: str, table: dict[str, Any], base: QuestionSettings
) -> QuestionSettings:
    """One [questions] table; keys it omits come from ``base`` (the study-wide table)."""
    r.check_keys(where, table, _SCHEMA["questions"])

    def names(key: str) -> tuple[str, ...]:
        value = r.get(where, table, key, list, list(getattr(base, key)))
        if not all(isinstance(v, str) and v.strip() for v in value):
            r.problem(f"[{where}] {key}", f"must be a list of region names, got {value!r}")
            return getattr(base, key)
        return tuple(v.strip() for v in value)

    side = r.get(where, table, "stimulus_side", str, base.stimulus_side)
    if side is not None and side not in STIMULUS_SIDES:
        r.problem(
            f"[{where}] stimulus_side",
            f'must be "left" or "right" (the side of the stimulated body part), got {side!r}',
        )
        side = None
    margin = r.get(where, table, "equivalence_margin", float, base.equivalence_margin)
    if not 0.0 < margin < 1.0:
        r.problem(f"[{where}] equivalence_margin", f"must be between 0 and 1, got {margin}")
    edge = r.get(where, table, "edge_distance_voxels", int, base.edge_distance_voxels)
    if edge < 1:
        r.problem(f"[{where}] edge_distance_voxels", f"must be at least 1, got {edge}")
    outlier = r.get(where, table, "outlier_z", float, base.outlier_z)
    if outlier <= 0:
        r.problem(f"[{where}] outlier_z", f"must be positive, got {outlier}")
    return QuestionSettings(
        symmetry=names("symmetry"),
        targets=names("targets"),
        stimulus_side=side,
        equivalence_margin=margin,
        edge_distance_voxels=edge,
        outlier_z=outlier,
    )


def seed_error(seed: int) -> str | None:
    """What is wrong with a seed, or None when it is a whole number 0 ... MAX_SEED."""
    if not 0 <= seed <= MAX_SEED:
        return f"must be a whole number from 0 to {MAX_SEED} (2**63 - 1), got {seed}"
    return None


def with_overrides(
    settings: Settings, *, permutations: int | None = None, seed: int | None = None
) -> Settings:
    """Settings with command-line overrides of ``[inference] permutations`` and ``seed``."""
    inf = settings.inference
    if permutations is not None:
        if permutations < 0:
            raise UserError(f"--permutations must be 0 or more, got {permutations}")
        inf = replace(inf, permutations=permutations)
    if seed is not None:
        seed_problem = seed_error(seed)
        if seed_problem:
            raise UserError(f"--seed {seed_problem}")
        inf = replace(inf, seed=seed)
    return replace(settings, inference=inf)
