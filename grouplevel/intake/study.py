"""The runs table and its maps: validation and masked loading.

A study is one runs table (TSV or CSV, one row per run and first-level condition) plus
the settings of its TOML file. :func:`inspect_study` reads every header and every map
once and reports **all** problems together, each naming the file, the table line or
the key. :func:`load_runs` then reads the maps of one first-level contrast into masked
arrays (runs × voxels), one 3-D image at a time.

Validity of a value: an effect is usable at a voxel when it is finite (and, when no
mask is given, not exactly 0, since first-level tools write 0 outside their own brain
mask — common practice); its first-level variance, when given, must be finite and
positive. A run without a usable value at a voxel carries no weight there.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from grouplevel.anatomy.atlas import Atlas, read_atlas
from grouplevel.anatomy.coordinates import AXIS_NAMES, mask_extent_mm
from grouplevel.errors import UserError
from grouplevel.intake.bids import derivatives_table
from grouplevel.intake.comparisons import PAIRED_LINES, TERMS, combine, comparison_rows
from grouplevel.intake.design import (
    Design,
    GroupFTest,
    RandomEffects,
    build_design,
    contrast_vector,
    formula_variables,
    missing_variables,
    model_problems,
)
from grouplevel.intake.images import (
    Grid,
    grid_mismatch,
    headers_read_once,
    read_header_grid,
    read_volume,
)
from grouplevel.intake.settings import (
    DEFAULT_CONTRAST_NAME,
    Settings,
    load_settings,
    with_overrides,
)
from grouplevel.intake.textcheck import control_characters, read_text_table
from grouplevel.model.ftest import contrast_rank
from grouplevel.outputs.names import NAME_RULE, case_collisions, name_problem, reserved

TRUE_WORDS = {"true", "yes", "1", "y", "t", "x"}
FALSE_WORDS = {"false", "no", "0", "n", "f", ""}
# A mouse brain is about 10 mm and a rat brain about 20 mm long (common practice); a
# mask extent above this along any axis suggests the ×10 header scaling that some labs
# apply to rodent images so that human-brain software accepts them.
MAX_PLAUSIBLE_BRAIN_EXTENT_MM = 40.0
# A rodent brain is longest anterior–posterior (mouse about 10 × 6 × 6 mm, rat about
# 20 × 15 × 10 mm; common practice). Another axis longer by more than this factor makes
# the axis-order warning; the margin spares masks cut short at the olfactory bulb or
# cerebellum (our own choice).
AXIS_ORDER_MARGIN = 1.1
MIN_ANIMALS = 2
# the runs table's first-level condition column was called "contrast" before it was
# told apart from the group-level [[contrast]] blocks; read for one release
OLD_CONDITION_COLUMN = "contrast"


@dataclass(frozen=True)
class FirstLevel:
    """The included runs of one first-level contrast and their group design."""

    name: str | None  # the ``condition`` value or comparison name; None without conditions
    runs: pd.DataFrame  # included rows, with absolute paths and a ``line`` column
    excluded: pd.DataFrame  # excluded rows with their reasons
    design: Design
    contrasts: tuple[tuple[str, np.ndarray], ...]  # (group contrast name, weights)
    mask: np.ndarray  # analysis mask (3-D bool)
    coverage_runs: np.ndarray  # (3-D int) runs with data per voxel
    coverage_animals: np.ndarray  # (3-D int) animals with data per voxel
    variance_kind: str  # "variance", "se" or "none"
    # for a within-animal comparison ([[comparison]]): condition -> weight; else None
    conditions: dict[str, float] | None = None
    # group contrast name -> what it tests, in plain words (default contrasts)
    contrast_meanings: dict[str, str] = field(default_factory=dict)
    random: RandomEffects = field(default_factory=RandomEffects)  # slopes, sessions, groups
    # F-tests of several group contrasts at once (default per factor, and [[ftest]])
    ftests: tuple[GroupFTest, ...] = ()

    def output_name(self, contrast_name: str, default_contrast: bool) -> str:
        """Folder name of a group contrast's maps (see DESIGN.md, output contract)."""
        if self.name is None:
            return contrast_name
        return self.name if default_contrast else f"{self.name}.{contrast_name}"


@dataclass(frozen=True)
class Study:
    """A validated study, ready to load and fit."""

    settings: Settings
    table: pd.DataFrame
    grid: Grid
    first_levels: tuple[FirstLevel, ...]
    user_mask: np.ndarray | None
    warnings: tuple[str, ...] = field(default=())
    atlas: Atlas | None = None  # on the study grid; its shares cover ``atlas_mask``

    @property
    def atlas_mask(self) -> np.ndarray | None:
        """The mask whose voxels are the rows of ``atlas.shares`` (C order)."""
        if self.atlas is None:
            return None
        if self.user_mask is not None:
            return self.user_mask
        return np.logical_or.reduce([fl.mask for fl in self.first_levels])

    @property
    def table_path(self) -> Path:
        return self.settings.study.table


# --- table ------------------------------------------------------------------------
def read_table(path: Path) -> pd.DataFrame:
    """Read the runs table (TSV, or CSV by extension) as text, with a ``line`` column.

    ``line`` is the physical line of the file (the header is line 1; blank lines count).
    A byte-order mark and Windows line endings are accepted. Refused, each with the
    line named: a repeated column name, a quote that runs over line ends (rows would
    merge silently), and control characters (tab, line break...) inside a value.
    A folder is read as a BIDS-style derivatives folder (:mod:`grouplevel.intake.bids`); its
    ``line`` numbers are those of the table ``grouplevel table FOLDER`` writes, and
    ``table.attrs["skipped"]`` lists the files it left out.
    """
    if path.is_dir():
        found = derivatives_table(path)
        table = found.table.astype(str)
        table.insert(0, "line", np.arange(len(table)) + 2)
        table.attrs["skipped"] = list(found.skipped)
        return table
    if not path.is_file():
        raise UserError(f"{path}: runs table not found ([study] table)")
    table = read_text_table(path, "runs table", "animal, effect, ...")
    _check_control_characters(path, table)
    table = table.apply(lambda col: col.str.strip() if col.name != "line" else col)
    blank = (table.drop(columns="line") == "").all(axis=1)
    table = table[~blank].reset_index(drop=True)  # a row of empty cells (",,,") is blank
    if table.empty:
        raise UserError(
            f"{path}: the runs table has no rows (only a header line); add one line per run"
        )
    return table


def _check_control_characters(path: Path, table: pd.DataFrame) -> None:
    problems = []
    for col in table.columns:
        if col == "line":
            continue
        for line, value in zip(table["line"], table[col], strict=True):
            bad = control_characters(value)
            if bad:
                problems.append(
                    f"{path.name} line {line}, column '{col}': the value {value!r} holds "
                    f"{', '.join(bad)}, which would break the rows of the tables written "
                    "from it; remove it"
                )
    if problems:
        raise UserError(f"{path}: {len(problems)} value(s) hold control characters", problems)


def _where(path: Path, row: pd.Series) -> str:
    animal = row.get("animal", "")
    extra = f" (animal {animal})" if animal else ""
    paired = row.get(PAIRED_LINES, "")
    if isinstance(paired, str) and paired:
        return f"{path.name} lines {paired}{extra}, comparison {row['condition']!r}"
    return f"{path.name} line {row['line']}{extra}"


def _condition_column(path: Path, table: pd.DataFrame, problems: list[str], warnings: list[str]):
    """The first-level condition column is ``condition``; ``contrast`` is its old name.

    The group-level ``[[contrast]]`` blocks are a different thing, so the runs table's
    column was renamed; the old name is read for one release, with a warning.
    """
    if OLD_CONDITION_COLUMN in table.columns:
        if "condition" in table.columns:
            problems.append(
                f"{path.name}: has both 'condition' and its old name '{OLD_CONDITION_COLUMN}'; "
                "keep only 'condition'"
            )
            return table
        warnings.append(
            f"{path.name}: the column '{OLD_CONDITION_COLUMN}' is now called 'condition' "
            "(the first-level condition of each row); it is read as 'condition' for now — "
            "rename the column"
        )
        table = table.rename(columns={OLD_CONDITION_COLUMN: "condition"})
    return _bids_columns(path, table, problems)


def _bids_columns(path: Path, table: pd.DataFrame, problems: list[str]) -> pd.DataFrame:
    """A BIDS-style ``participant_id`` (``sub-m01``) stands for ``animal`` (``m01``), and
    ``session_id`` (``ses-1``) for ``session`` (``1``)."""
    for bids, ours, prefix in (
        ("participant_id", "animal", "sub-"),
        ("session_id", "session", "ses-"),
    ):
        if bids not in table.columns:
            continue
        if ours in table.columns:
            problems.append(f"{path.name}: has both '{ours}' and '{bids}'; keep one of them")
            continue
        table = table.rename(columns={bids: ours})
        table[ours] = table[ours].str.removeprefix(prefix)
    return table


def _check_rows(path: Path, table: pd.DataFrame, problems: list[str]) -> pd.DataFrame:
    """Row-level checks; returns the table with parsed ``exclude`` and absolute paths."""
    for col in ("animal", "effect"):
        if col not in table.columns:
            problems.append(
                f"{path.name}: required column '{col}' is missing; columns: "
                f"{', '.join(c for c in table.columns if c != 'line')}"
            )
    if problems:
        return table
    if "variance" in table.columns and "se" in table.columns:
        both = table[(table["variance"] != "") & (table["se"] != "")]
        for _, row in both.iterrows():
            problems.append(f"{_where(path, row)}: give either 'variance' or 'se', not both")
    folder = path.parent
    table = table.copy()
    exclude = []
    for _, row in table.iterrows():
        if row["animal"] == "":
            problems.append(f"{path.name} line {row['line']}: 'animal' is empty")
        if row["effect"] == "":
            problems.append(f"{_where(path, row)}: 'effect' (path of the effect map) is empty")
        word = row.get("exclude", "").lower() if "exclude" in table.columns else ""
        if word in TRUE_WORDS:
            exclude.append(True)
        elif word in FALSE_WORDS:
            exclude.append(False)
        else:
            problems.append(f"{_where(path, row)}: 'exclude' must be true or false, got {word!r}")
            exclude.append(False)
    table["exclude"] = exclude
    if "reason" not in table.columns:
        table["reason"] = ""
    for col in ("effect", "variance", "se"):
        if col in table.columns:
            table[col] = [
                str((folder / v).resolve()) if v and not Path(v).is_absolute() else v
                for v in table[col]
            ]
    for col in ("session", "run"):
        if col not in table.columns:
            table[col] = ""
    if "condition" not in table.columns:
        table["condition"] = ""
    problems.extend(_shared_files(path, table))
    if not problems and "run" in table.columns:
        key = ["condition", "animal", "session", "run"]
        keyed = table[table["run"] != ""]
        dup = keyed[keyed.duplicated(key, keep=False)]
        for _, group in dup.groupby(key, sort=False):
            lines = ", ".join(str(v) for v in group["line"])
            row = group.iloc[0]
            what = f"animal {row['animal']}, session {row['session'] or '-'}, run {row['run']}"
            if row["condition"]:
                what += f", condition {row['condition']}"
            problems.append(f"{path.name} lines {lines}: duplicate run ({what})")
    _check_condition_names(path, table, problems)
    return table


def _check_condition_names(path: Path, table: pd.DataFrame, problems: list[str]) -> None:
    """Condition names become folder names: see :mod:`grouplevel.outputs.names`."""
    named = table[table["condition"] != ""]
    if named.empty:
        return
    for _, row in table[table["condition"] == ""].iterrows():
        problems.append(
            f"{_where(path, row)}: 'condition' is empty while other rows name one; "
            "give every row its first-level condition"
        )
    first_line = named.groupby("condition", sort=False)["line"].first()
    for name, line in first_line.items():
        why = name_problem(name)
        if why:
            problems.append(
                f"{path.name} line {line}: 'condition' {name!r} {why}; it names a folder: "
                f"{NAME_RULE}"
            )
    for group in case_collisions(first_line.index):
        lines = ", ".join(f"{n!r} (line {first_line[n]})" for n in group)
        problems.append(
            f"{path.name}: conditions {lines} differ only in upper and lower case; "
            "they would be one folder on many file systems: rename one"
        )


def _check_output_names(first_levels: list[FirstLevel]) -> list[str]:
    """Result folder names must differ (ignoring case) and not clash with our own files."""
    where: dict[str, str] = {}
    for fl in first_levels:
        for cname, _ in fl.contrasts:
            out = fl.output_name(cname, cname == DEFAULT_CONTRAST_NAME)
            where[out] = f"condition {fl.name!r}, group contrast {cname!r}"
        for ft in fl.ftests:
            out = fl.output_name(ft.name, False)
            where[out] = f"condition {fl.name!r}, F-test {ft.name!r}"
    problems = [
        f"result folder {name!r} ({what}) would clash with grouplevel's own {name!r} in the "
        "output folder; rename the contrast"
        for name, what in where.items()
        if reserved(name)
    ]
    for group in case_collisions(where):
        problems.append(
            "result folders "
            + " and ".join(f"{n!r} ({where[n]})" for n in group)
            + " differ only in case: they would be one folder on many file systems; "
            "rename a contrast"
        )
    return problems


def _shared_files(path: Path, table: pd.DataFrame) -> list[str]:
    """One map file named for two included runs (a copy-paste slip in the table)."""
    problems = []
    included = table[~table["exclude"]]
    for col in ("effect", "variance", "se"):
        if col not in included.columns:
            continue
        named = included[included[col] != ""]
        shared = named[named.duplicated(col, keep=False)]
        for file, group in shared.groupby(col, sort=False):
            lines = ", ".join(str(v) for v in group["line"])
            problems.append(
                f"{path.name} lines {lines}: the same '{col}' file {Path(file).name} is "
                "listed for several runs; each run needs its own map (fix the path, or "
                "exclude the duplicate runs)"
            )
    return problems


def _covariates(
    path: Path, runs: pd.DataFrame, variables: list[str], problems: list[str]
) -> pd.DataFrame:
    """Convert the formula's covariates: numeric when every value parses, else text.

    A column whose values all parse as numbers once a single decimal comma is read as a
    point (``2,5``) is refused: taken as text it would silently become a factor.
    """
    runs = runs.copy()
    for var in variables:
        if var not in runs.columns:
            continue
        empty = runs[runs[var].isin(["", "NA", "n/a", "NaN", "nan"])]
        for _, row in empty.iterrows():
            problems.append(
                f"{_where(path, row)}: covariate '{var}' is missing; fill it in or exclude the run"
            )
        numeric = pd.to_numeric(runs[var], errors="coerce")
        if numeric.notna().all():
            runs[var] = numeric.astype(float)
            continue
        filled = runs[var][~runs[var].isin(["", "NA", "n/a", "NaN", "nan"])]
        commas = filled[filled.str.count(",") == 1]
        as_point = pd.to_numeric(filled.str.replace(",", ".", regex=False), errors="coerce")
        if len(commas) and as_point.notna().all():
            first = runs.loc[commas.index[0]]
            problems.append(
                f"{_where(path, first)}: covariate '{var}' is written with a decimal comma "
                f"({first[var]!r}); {len(commas)} value(s) of the column would be read as "
                "text and make it a categorical factor. Write decimals with a point (2.5)"
            )
    return runs


# --- images -------------------------------------------------------------------------
def _valid(effect: np.ndarray, variance: np.ndarray | None, masked: bool) -> np.ndarray:
    ok = np.isfinite(effect)
    if not masked:
        ok &= effect != 0
    if variance is not None:
        ok &= np.isfinite(variance) & (variance > 0)
    return ok


def _read_variance(row: pd.Series, kind: str) -> np.ndarray | None:
    terms = row.get(TERMS)
    if isinstance(terms, tuple):
        return _read_terms(terms, kind)[1]
    return _read_variance_file(row.get(kind, ""), kind)


def _read_variance_file(path: str, kind: str) -> np.ndarray | None:
    if kind == "none" or not path:
        return None
    data = read_volume(Path(path))
    return data**2 if kind == "se" else data


def _read_effect(row: pd.Series) -> np.ndarray:
    """A row's effect map; for a comparison, the weighted sum of its condition maps."""
    terms = row.get(TERMS)
    if isinstance(terms, tuple):
        return _read_terms(terms, "none")[0]
    return read_volume(Path(row["effect"]))


def _read_terms(terms: tuple, kind: str) -> tuple[np.ndarray, np.ndarray | None]:
    weights = [w for w, _, _ in terms]
    effects = [read_volume(Path(e)) for _, e, _ in terms]
    variances = [_read_variance_file(v, kind) for _, _, v in terms]
    return combine(weights, effects, variances)


def _row_files(row: pd.Series, kind: str) -> list[str]:
    """Every map file a row reads (a comparison reads one pair per condition)."""
    terms = row.get(TERMS)
    if isinstance(terms, tuple):
        return [f for _, e, v in terms for f in (e, v) if f]
    return [f for f in (row["effect"], row.get(kind, "") if kind != "none" else "") if f]


@dataclass(frozen=True)
class _MapCheck:
    problems: list[str]
    warnings: list[str]


def _check_run_maps(
    where: str,
    row: pd.Series,
    kind: str,
    effect: np.ndarray,
    raw_variance: np.ndarray | None,
    ok: np.ndarray,
    user_mask: np.ndarray | None,
    min_coverage: float,
) -> _MapCheck:
    """Problems and warnings of one run's effect and variance (or se) maps.

    ``ok`` marks the voxels where the run is usable (see :func:`_valid`); ``raw_variance``
    is the map as written (standard errors not yet squared).
    """
    problems: list[str] = []
    warnings: list[str] = []
    effect_at = f"{where}: {Path(row['effect']).name}"
    var_at = f"{where}: {Path(row[kind]).name}" if raw_variance is not None else ""
    if np.isinf(effect).any():
        problems.append(f"{effect_at}: {int(np.isinf(effect).sum())} infinite value(s)")
    if raw_variance is not None and np.isinf(raw_variance).any():
        problems.append(f"{var_at}: {int(np.isinf(raw_variance).sum())} infinite value(s)")
    has_value = np.isfinite(effect)
    if user_mask is None:
        has_value &= effect != 0  # 0 is 'no data' without a mask
    region = user_mask if user_mask is not None else np.ones(effect.shape, dtype=bool)
    unusable = not ok[region].any()
    if user_mask is not None and not unusable:  # (a run without data: one message below)
        nan_in = int((np.isnan(effect) & user_mask).sum())
        if nan_in and min_coverage >= 1.0:
            problems.append(
                f"{effect_at}: {nan_in} voxel(s) inside the mask have no value (NaN); "
                "to fit those voxels with the runs that do have data, set "
                "[study] min_coverage below 1 (e.g. 0.8)"
            )
    if raw_variance is not None:
        problems.extend(_variance_problems(var_at, kind, raw_variance, has_value, user_mask))
        warnings.extend(_variance_warnings(var_at, kind, raw_variance, has_value, user_mask))
    if unusable:
        problems.append(_unusable_message(effect_at, var_at, kind, effect, raw_variance, region))
    elif has_value[region].sum() > 1:
        values = effect[has_value & region]
        if values.min() == values.max():
            warnings.append(
                f"{effect_at}: every one of its {values.size} voxel(s) with a value holds "
                f"the same number ({values[0]:g}); a first-level effect map varies across "
                "the brain, so check that the table names the right file"
            )
    return _MapCheck(problems, warnings)


def _variance_problems(
    var_at: str,
    kind: str,
    raw: np.ndarray,
    has_value: np.ndarray,
    user_mask: np.ndarray | None,
) -> list[str]:
    """Negative variances (or se) anywhere; zero ones inside a given mask."""
    finite = np.isfinite(raw)
    if user_mask is not None:
        inside = finite & has_value & user_mask
        negative = int((raw[inside] < 0).sum())
        zero = int((raw[inside] == 0).sum())
        if negative or zero:
            return [
                f"{var_at}: {negative + zero} voxel(s) inside the mask have zero or negative "
                f"{kind} ({negative} negative, {zero} zero); a {kind} must be positive "
                "wherever the run has data: check that the column names the right map, or "
                "shrink the [study] mask to where the first-level fit had data"
            ]
        return []
    negative = int((raw[finite] < 0).sum())
    if negative:
        return [
            f"{var_at}: {negative} voxel(s) hold a negative {kind}; a {kind} cannot be "
            f"negative: check that the '{kind}' column names the {kind} map (not an "
            "effect or t map) and that the first-level tool wrote it correctly"
        ]
    return []


def _variance_warnings(
    var_at: str,
    kind: str,
    raw: np.ndarray,
    has_value: np.ndarray,
    user_mask: np.ndarray | None,
) -> list[str]:
    """Zero variances where the effect has a value (no mask: those voxels are dropped)."""
    if user_mask is not None:
        return []  # inside a mask a zero is an error (see _variance_problems)
    zero = has_value & (raw == 0)
    n_zero, n_value = int(zero.sum()), int(has_value.sum())
    if not n_zero or n_zero == n_value:
        return []  # none, or all: then the run has no usable voxel (an error)
    return [
        f"{var_at}: {n_zero} of the {n_value} voxel(s) where the effect has a value have "
        f"{kind} 0. A zero first-level {kind} says the run was measured without error, "
        "which is almost always a masking artefact of the first-level tool; grouplevel "
        "treats these voxels as having no data for this run. Give a [study] mask to "
        "have them refused instead"
    ]


def _unusable_message(
    effect_at: str,
    var_at: str,
    kind: str,
    effect: np.ndarray,
    raw: np.ndarray | None,
    region: np.ndarray,
) -> str:
    """Why a run has no usable voxel at all (all NaN, all 0, or no positive variance)."""
    n = int(region.sum())
    values = effect[region]
    if np.isnan(values).all():
        why = f"{effect_at}: all {n} voxel(s) are NaN (no value)"
    elif np.all((values == 0) | ~np.isfinite(values)):
        why = (
            f"{effect_at}: all {n} voxel(s) are 0 or NaN (without a [study] mask, 0 is "
            "read as 'no data', as first-level tools write 0 outside their brain mask)"
        )
    elif raw is not None:
        why = f"{var_at}: the {kind} is zero, negative or NaN wherever the effect has a value"
    else:
        why = f"{effect_at}: no voxel holds a finite value"
    return (
        f"{why}; the run has no usable voxel. Check that the table names the right file "
        "(rewrite it if the first-level fit failed), or exclude the run "
        "(exclude = true, with a reason)"
    )


def _single_run_warning(
    label: str, runs: pd.DataFrame, settings: Settings, variance_kind: str
) -> str | None:
    """Warn when every animal has one run: animal and run variance are then confounded."""
    if settings.model.run_variance != "estimate" or runs.groupby("animal").size().max() > 1:
        return None
    remedy = "Add runs per animal to separate the two"
    if variance_kind != "none":
        remedy += (
            ', or set [model] run_variance = "known" (σ² = 0) when the first-level '
            "variance maps are trusted to hold all the run noise"
        )
    return (
        f"{label}: every animal has a single run, so the data hold no within-animal "
        "information: the between-animal variance (var_animal) and the run variance "
        "(var_run) cannot be told apart. grouplevel still fits the model; the REML fit "
        "then estimates only their sum (its information matrix is singular and a "
        "pseudo-inverse is used), so the var_animal and var_run maps are an arbitrary "
        "split of that sum and must not be read one by one. The group effect, its "
        "standard error, t and df (animals minus the design's rank) are still valid, as "
        f"in a one-map-per-animal analysis. {remedy}"
    )


@dataclass(frozen=True)
class _StudyContext:
    """What the study-wide phases of :func:`inspect_study` found, for the phases run
    once per first-level condition or comparison."""

    settings: Settings
    path: Path  # the runs table
    grid: Grid
    user_mask: np.ndarray | None
    bad_files: set[str]  # map files whose header could not be read or is off the grid
    variance_kind: str  # "variance", "se" or "none"
    variables: list[str]  # the formula's variables
    formula_missing: bool  # the formula names a column the runs table lacks


@dataclass(frozen=True)
class _Coverage:
    """Per-voxel counts of one first-level contrast's usable runs and animals, and the
    range of its effects over runs (NaN unless the study has no variance maps)."""

    runs: np.ndarray
    animals: np.ndarray
    low: np.ndarray
    high: np.ndarray


def inspect_study(settings: Settings) -> Study:
    """Validate a study completely and return it, or raise with every problem found.

    Parameters
    ----------
    settings
        The study's validated settings (see :func:`grouplevel.config.load_settings`).

    Raises
    ------
    UserError
        Carrying one line per problem (file, table line or key named in each).
    """
    problems: list[str] = []
    warnings: list[str] = []
    path = settings.study.table
    table = _runs_table(path, problems, warnings)
    if problems:
        raise UserError(f"{path}: {len(problems)} problem(s) in the runs table", problems)
    included = table[~table["exclude"]]
    grid, bad_files = _grids(settings, table, included, problems)
    if grid is None or problems:
        raise UserError(f"{path}: {len(problems)} problem(s) in the study's files", problems)
    user_mask = _user_mask(settings, problems)
    variables, formula_missing = _formula_variables(settings, table, problems)
    variance_kind = _variance_kind(path, table, included, problems)
    context = _StudyContext(
        settings=settings,
        path=path,
        grid=grid,
        user_mask=user_mask,
        bad_files=bad_files,
        variance_kind=variance_kind,
        variables=variables,
        formula_missing=formula_missing,
    )
    first_levels, names = _first_levels(context, table, problems, warnings)
    brain = user_mask if user_mask is not None else (first_levels[0].mask if first_levels else None)
    warnings.extend(_header_warnings(settings, brain, grid))
    n_before_atlas = len(problems)
    atlas = _study_atlas(settings, grid, user_mask, first_levels, problems, warnings)
    atlas_problems = problems[n_before_atlas:]
    problems.extend(_check_output_names(first_levels))
    problems.extend(_check_questions(settings, names, atlas))
    if atlas_problems and len(atlas_problems) == len(problems):
        # only the atlas is wrong: its own summary line, which names the atlas file, heads
        raise UserError(atlas_problems[0], atlas_problems[1:])
    if problems:
        raise UserError(f"{path}: {len(problems)} problem(s) in the study", problems)
    return Study(
        settings=settings,
        table=table,
        grid=grid,
        first_levels=tuple(first_levels),
        user_mask=user_mask,
        warnings=tuple(warnings),
        atlas=atlas,
    )


# -- table --
def _runs_table(path: Path, problems: list[str], warnings: list[str]) -> pd.DataFrame:
    """The runs table with its condition column, its rows checked; a warning for the
    files of a derivatives folder that were left out."""
    table = _condition_column(path, read_table(path), problems, warnings)
    skipped = table.attrs.get("skipped", [])
    if skipped:
        warnings.append(
            f"{path}: {len(skipped)} file(s) of the derivatives folder left out: "
            + "; ".join(skipped[:5])
            + (f"; ... (see grouplevel table {path})" if len(skipped) > 5 else "")
        )
    return _check_rows(path, table, problems)


# -- grids (headers only) --
def _grids(
    settings: Settings, table: pd.DataFrame, included: pd.DataFrame, problems: list[str]
) -> tuple[Grid | None, set[str]]:
    """The study grid (None when no header could be read) and the map files whose
    header is unreadable or off that grid; the atlas files only need to exist."""
    path = settings.study.table
    files: dict[str, str] = {}  # path -> where it is named
    for key, p in (
        ("[study] template", settings.study.template),
        ("[study] mask", settings.study.mask),
    ):
        if p is not None:
            files[str(p)] = key
    if settings.atlas is not None:
        # the atlas may live on another (finer or coarser) grid: read_atlas checks it
        for key, p in (("image", settings.atlas.image), ("labels", settings.atlas.labels)):
            if not p.is_file():
                problems.append(f"{p}: atlas {key} not found ([atlas] {key})")
    for _, row in included.iterrows():
        for col in ("effect", "variance", "se"):
            if col in table.columns and row[col]:
                files.setdefault(row[col], f"{_where(path, row)} '{col}'")
    grids: dict[str, Grid] = {}
    bad_files: set[str] = set()
    for p, where in files.items():
        try:
            grids[p] = read_header_grid(Path(p))
        except UserError as exc:
            problems.append(f"{where}: {exc}")
            bad_files.add(p)
    grid, source = _study_grid(settings, grids, list(included["effect"]))
    if grid is not None:
        for p, g in grids.items():
            why = grid_mismatch(grid, g)
            if why:
                problems.append(f"{files[p]}: {p}: {why} ({source})")
                bad_files.add(p)
        # files are compared as their headers say; the analysis works in true mm
        grid = grid.with_true_units(settings.space.header_to_true)
    return grid, bad_files


# -- mask --
def _user_mask(settings: Settings, problems: list[str]) -> np.ndarray | None:
    """The ``[study] mask`` as booleans (values above 0), or None when none is given."""
    if settings.study.mask is None:
        return None
    user_mask = read_volume(settings.study.mask)
    if not np.all(np.isfinite(user_mask)):
        problems.append(f"[study] mask {settings.study.mask}: contains NaN or infinite values")
    user_mask = np.nan_to_num(user_mask) > 0
    if not user_mask.any():
        problems.append(f"[study] mask {settings.study.mask}: the mask is empty")
    return user_mask


# -- design per first-level contrast --
def _formula_variables(
    settings: Settings, table: pd.DataFrame, problems: list[str]
) -> tuple[list[str], bool]:
    """The formula's variables, and whether it names a column the runs table lacks."""
    missing = missing_variables(
        settings.model.formula, [c for c in table.columns if c not in ("line", "exclude")]
    )
    if missing:
        problems.extend(missing)
        return [], True
    return formula_variables(settings.model.formula), False


def _variance_kind(
    path: Path, table: pd.DataFrame, included: pd.DataFrame, problems: list[str]
) -> str:
    """Which first-level maps the included runs give ("variance", "se" or "none");
    every included run must then give one."""
    variance_kind = "none"
    if "variance" in table.columns and (included["variance"] != "").any():
        variance_kind = "variance"
    elif "se" in table.columns and (included["se"] != "").any():
        variance_kind = "se"
    if variance_kind != "none":
        lacking = included[included[variance_kind] == ""]
        for _, row in lacking.iterrows():
            problems.append(
                f"{_where(path, row)}: '{variance_kind}' is empty while other runs have one; "
                "give every included run a first-level variance map, or none"
            )
    return variance_kind


def _first_levels(
    context: _StudyContext, table: pd.DataFrame, problems: list[str], warnings: list[str]
) -> tuple[list[FirstLevel], list[str]]:
    """One :class:`FirstLevel` per condition and comparison that passes every check, and
    the names of all of them (conditions first, then comparisons)."""
    settings = context.settings
    derived = comparison_rows(
        table, settings.comparisons, context.path, context.variance_kind, problems, warnings
    )
    work = pd.concat([table, derived], ignore_index=True) if len(derived) else table
    comparison_weights = {spec.name: dict(spec.conditions) for spec in settings.comparisons}
    names = list(dict.fromkeys(work["condition"]))
    first_levels: list[FirstLevel] = []
    for name in names:
        rows = work[work["condition"] == name]
        fl = _first_level(context, name, rows, comparison_weights.get(name), problems, warnings)
        if fl is not None:
            first_levels.append(fl)
    return first_levels, names


def _first_level(
    context: _StudyContext,
    name: str,
    rows: pd.DataFrame,
    conditions: dict[str, float] | None,
    problems: list[str],
    warnings: list[str],
) -> FirstLevel | None:
    """One condition (or comparison, with its ``conditions``) from its rows of the table
    to its analysis mask; None when a problem (recorded) stops it."""
    label = f"condition '{name}'" if name else "the study"
    if conditions is not None:
        label = f"comparison '{name}'"
    inc = rows[~rows["exclude"]]
    excl = rows[rows["exclude"]]
    if not _enough_animals(context.path, rows, inc, excl, label, problems):
        return None
    inc = _condition_covariates(context, inc, problems)
    if inc is None:
        return None
    design = _condition_design(context.settings, inc, label, problems)
    if design is None:
        return None
    contrasts, meanings = _group_contrasts(context.settings, design, label, problems)
    ftests = group_ftests(context.settings, design, contrasts, label, problems)
    random = _random_effects(
        context.settings, design, inc, contrasts, label, problems, warnings, ftests
    )
    coverage = _data_pass(context, inc, design, problems, warnings)
    if coverage is None:
        return None
    mask = _coverage_mask(context, label, inc, coverage, problems, warnings)
    if mask is None:
        return None
    return FirstLevel(
        name=name or None,
        runs=inc.reset_index(drop=True),
        excluded=excl.reset_index(drop=True),
        design=design,
        contrasts=tuple(contrasts),
        mask=mask,
        coverage_runs=coverage.runs,
        coverage_animals=coverage.animals,
        variance_kind=context.variance_kind,
        conditions=conditions,
        contrast_meanings=meanings,
        random=random,
        ftests=tuple(ftests),
    )


def _enough_animals(
    path: Path,
    rows: pd.DataFrame,
    inc: pd.DataFrame,
    excl: pd.DataFrame,
    label: str,
    problems: list[str],
) -> bool:
    """Whether the included runs hold at least ``MIN_ANIMALS`` animals; a problem for
    each animal whose runs are all excluded."""
    for animal in dict.fromkeys(rows["animal"]):
        if animal and not (inc["animal"] == animal).any():
            n = int((excl["animal"] == animal).sum())
            problems.append(
                f"{path.name}: animal {animal} has no included runs for {label} "
                f"(all {n} excluded); remove its rows or include a run"
            )
    n_animals = inc["animal"].nunique()
    if n_animals < MIN_ANIMALS:
        problems.append(
            f"{path.name}: {label} has {n_animals} animal(s) with included runs; a group "
            f"analysis needs at least {MIN_ANIMALS}"
        )
        return False
    return True


def _condition_covariates(
    context: _StudyContext, inc: pd.DataFrame, problems: list[str]
) -> pd.DataFrame | None:
    """The included runs with the formula's covariates converted; None when a covariate
    or a formula variable is wrong."""
    covariate_problems: list[str] = []
    inc = _covariates(context.path, inc, context.variables, covariate_problems)
    problems.extend(covariate_problems)
    if context.formula_missing or covariate_problems:
        return None
    return inc


def _condition_design(
    settings: Settings, inc: pd.DataFrame, label: str, problems: list[str]
) -> Design | None:
    """The group design of the included runs, or None (problem recorded)."""
    try:
        return build_design(
            inc,
            settings.model.formula,
            center_covariates=settings.model.center_covariates,
            reference=settings.model.reference,
        )
    except UserError as exc:
        problems.append(f"{label}: {exc}")
        return None


def _random_effects(
    settings: Settings,
    design: Design,
    inc: pd.DataFrame,
    contrasts: list[tuple[str, np.ndarray]],
    label: str,
    problems: list[str],
    warnings: list[str],
    ftests: Sequence[GroupFTest] = (),
) -> RandomEffects:
    """The random effects the design gets ([model]); what cannot be fitted or
    permuted correctly is a problem."""
    random = RandomEffects()
    try:
        random, model_notes, model_warnings = model_problems(
            design,
            inc,
            contrasts,
            settings.model,
            settings.inference.permutations,
            full_coverage=settings.study.min_coverage >= 1.0,
            ftests=ftests,
        )
    except UserError as exc:
        problems.append(f"{label}: {exc}")
    else:
        problems.extend(f"{label}: {p}" for p in model_notes)
        warnings.extend(f"{label}: {w}" for w in model_warnings)
    return random


# -- data pass over one first-level contrast's maps --
def _data_pass(
    context: _StudyContext,
    inc: pd.DataFrame,
    design: Design,
    problems: list[str],
    warnings: list[str],
) -> _Coverage | None:
    """Read and check every included run's maps once and count the usable runs and
    animals per voxel; None when a map could not be read."""
    path, kind, user_mask = context.path, context.variance_kind, context.user_mask
    shape = context.grid.shape
    cov_runs = np.zeros(shape, dtype=np.int32)
    animal_seen = np.zeros((design.n_animals, *shape), dtype=bool)
    low = np.full(shape, np.nan)
    high = np.full(shape, np.nan)
    readable = True
    for i, (_, row) in enumerate(inc.iterrows()):
        if any(f in context.bad_files for f in _row_files(row, kind)):
            readable = False
            continue
        try:
            effect, raw_variance, comparison = _read_run(row, kind)
        except UserError as exc:
            problems.append(f"{_where(path, row)}: {exc}")
            readable = False
            continue
        variance = raw_variance
        if raw_variance is not None and kind == "se" and not comparison:
            variance = raw_variance**2
        ok = _valid(effect, variance, user_mask is not None)
        if not comparison:  # a comparison's maps are checked with their conditions
            checked = _check_run_maps(
                _where(path, row),
                row,
                kind,
                effect,
                raw_variance,
                ok,
                user_mask,
                context.settings.study.min_coverage,
            )
            problems.extend(checked.problems)
            warnings.extend(checked.warnings)
        cov_runs += ok
        animal_seen[design.animal[i]] |= ok
        if kind == "none":  # per-voxel range over runs (no variance: case 6)
            low = np.fmin(low, np.where(ok, effect, np.nan))
            high = np.fmax(high, np.where(ok, effect, np.nan))
    if not readable:
        return None
    cov_animals = animal_seen.sum(axis=0).astype(np.int32)
    return _Coverage(runs=cov_runs, animals=cov_animals, low=low, high=high)


def _read_run(row: pd.Series, kind: str) -> tuple[np.ndarray, np.ndarray | None, bool]:
    """A row's effect map, its variance (or se) map as written, and whether the row is a
    comparison (whose variance is already the weighted sum of its conditions')."""
    comparison = isinstance(row.get(TERMS), tuple)
    effect = _read_effect(row)
    raw_variance = None
    if comparison:  # the weighted sum of the conditions' variances
        raw_variance = _read_variance(row, kind)
    elif kind != "none":
        raw_variance = read_volume(Path(row[kind]))
    return effect, raw_variance, comparison


# -- coverage mask --
def _coverage_mask(
    context: _StudyContext,
    label: str,
    inc: pd.DataFrame,
    coverage: _Coverage,
    problems: list[str],
    warnings: list[str],
) -> np.ndarray | None:
    """The analysis mask: voxels with enough runs ([study] min_coverage) and animals
    (inside the user's mask); None when it is empty or holds nothing to fit."""
    settings, user_mask = context.settings, context.user_mask
    n_runs = len(inc)
    need_runs = math.ceil(settings.study.min_coverage * n_runs - 1e-9)
    mask = (coverage.runs >= need_runs) & (coverage.animals >= MIN_ANIMALS)
    if user_mask is not None:
        mask &= user_mask
    if not mask.any():
        problems.append(
            f"{label}: no voxel has data in at least {need_runs} of {n_runs} runs "
            f"([study] min_coverage = {settings.study.min_coverage}) and 2 animals"
        )
        return None
    if context.variance_kind == "none" and np.all(coverage.low[mask] == coverage.high[mask]):
        problems.append(
            f"{label}: at every analysed voxel all {n_runs} runs hold the same value and "
            "the runs table gives no first-level variance maps, so there is no variance "
            "to estimate and nothing can be fitted; check that each run names its own "
            "effect map, or add a 'variance' or 'se' column"
        )
        return None
    single = _single_run_warning(label, inc, settings, context.variance_kind)
    if single:
        warnings.append(single)
    if user_mask is not None and settings.study.min_coverage < 1.0:
        dropped = int((user_mask & ~mask).sum())
        if dropped:
            warnings.append(
                f"{label}: {dropped} mask voxel(s) left out for too little coverage "
                f"(fewer than {need_runs} of {n_runs} runs or 2 animals with data)"
            )
    return mask


# -- extent and atlas --
def _header_warnings(settings: Settings, brain: np.ndarray | None, grid: Grid) -> list[str]:
    """Warnings when the brain's size or shape says the headers are scaled (×10) or their
    axes exchanged, measured in true mm (after what ``[space]`` declares)."""
    if brain is None or not brain.any():
        return []
    extent = mask_extent_mm(brain, grid.affine)
    warnings = []
    declared = settings.space.header_declared
    if extent.max() > MAX_PLAUSIBLE_BRAIN_EXTENT_MM:
        scale = 10.0 ** np.ceil(np.log10(extent.max() / MAX_PLAUSIBLE_BRAIN_EXTENT_MM))
        units = settings.space.header_units_per_mm * scale
        warnings.append(
            f"the brain spans {_mm_list(extent)} mm along x, y, z (voxel size "
            f"{grid.voxel_size.round(3).tolist()} mm), far more than a rodent brain: the "
            "headers probably carry the ×10 scaling some labs use so that software made "
            "for human brains accepts rodent images. Every volume, distance and "
            "coordinate of the outputs would be in the header's units (mm³ "
            f"{scale**3:g} times too large); declare it with [space] "
            f"header_units_per_mm = {units:g} in {settings.source.name}"
        )
    longest = int(np.argmax(extent))
    if longest != 1 and extent[longest] > extent[1] * AXIS_ORDER_MARGIN:
        header_axis = _header_axis_of(grid, longest)
        fix = (
            "correct [space] header_axes"
            if declared
            else "if they are, declare where each header axis points with [space] "
            'header_axes (e.g. ["right", "dorsal", "anterior"] when the header\'s y is '
            "dorsal and its z anterior)"
        )
        warnings.append(
            f"the brain is longest along the {AXIS_NAMES[longest]} axis "
            f"({extent[longest]:.1f} mm, header axis {header_axis}) and only "
            f"{extent[1]:.1f} mm anterior–posterior, yet a rodent brain is longest "
            "anterior–posterior: the headers' axes may be exchanged, and AP, ML and DV in "
            "the outputs would then be swapped (a mask that covers only part of the brain "
            f"along AP does this too, and then nothing needs declaring); {fix}"
        )
    return warnings


def _mm_list(values: np.ndarray) -> str:
    return "[" + ", ".join(f"{v:.1f}" for v in values) + "]"


def _header_axis_of(grid: Grid, true_axis: int) -> str:
    """The header's world axis (x, y or z) that holds a true axis."""
    column = int(np.argmax(np.abs(grid.header_to_true[true_axis, :3])))
    return "xyz"[column]


def _study_atlas(
    settings: Settings,
    grid: Grid,
    user_mask: np.ndarray | None,
    first_levels: list[FirstLevel],
    problems: list[str],
    warnings: list[str],
) -> Atlas | None:
    """The atlas on the study grid over the atlas mask; read only when the study has
    an [atlas], a first-level contrast, and no problem so far."""
    if settings.atlas is None or not first_levels or problems:
        return None
    atlas_mask = (
        user_mask
        if user_mask is not None
        else np.logical_or.reduce([fl.mask for fl in first_levels])
    )
    try:
        atlas = read_atlas(
            settings.atlas.image,
            settings.atlas.labels,
            grid,
            atlas_mask,
            midline_mm=settings.atlas.midline_mm,
            min_coverage=settings.atlas.min_coverage,
        )
    except UserError as exc:
        # the summary line names the atlas file; its detail lines follow it once each
        problems.append(exc.args[0] if exc.args else str(exc))
        problems.extend(exc.problems)
        return None
    warnings.extend(atlas.warnings)
    return atlas


def _study_grid(
    settings: Settings, grids: dict[str, Grid], effects: list[str]
) -> tuple[Grid | None, str]:
    """The study grid: the template's, else the mask's, else the one most maps share.

    Choosing the majority grid when no template or mask is given names only the odd
    map(s) when one file differs, whichever line of the table it is on.
    """
    for key, p in (("template", settings.study.template), ("mask", settings.study.mask)):
        if p is not None:
            return grids.get(str(p)), f"the grid of [study] {key}"
    groups: list[tuple[Grid, int]] = []
    for p in effects:
        g = grids.get(p)
        if g is None:
            continue
        for k, (ref, count) in enumerate(groups):
            if grid_mismatch(ref, g) is None:
                groups[k] = (ref, count + 1)
                break
        else:
            groups.append((g, 1))
    if not groups:
        return None, ""
    grid, count = max(groups, key=lambda item: item[1])  # ties: the earliest in the table
    n = sum(c for _, c in groups)
    return grid, (
        f"the grid shared by {count} of {n} effect maps; give [study] template to set the "
        "grid explicitly"
    )


def _group_contrasts(
    settings: Settings, design: Design, label: str, problems: list[str]
) -> tuple[list[tuple[str, np.ndarray]], dict[str, str]]:
    """The study's [[contrast]]s, or the design's default contrasts when it has none."""
    contrasts: list[tuple[str, np.ndarray]] = []
    if settings.user_contrasts:
        for spec in settings.contrasts:
            try:
                contrasts.append(
                    (spec.name, contrast_vector(spec.weights, design.columns, spec.name))
                )
            except UserError as exc:
                # the summary line, then its detail lines, each once
                problems.append(exc.args[0] if exc.args else str(exc))
                problems.extend(exc.problems)
        return contrasts, {}
    if not design.default_contrasts:
        problems.append(
            f"{label}: [model] formula {settings.model.formula!r}: no default contrast can "
            "be named after what it tests ("
            + "; ".join(design.left_out)
            + "); define the contrasts to test as [[contrast]] blocks (name and weights on "
            f"the coefficients {', '.join(design.columns)})"
        )
        return contrasts, {}
    for gc in design.default_contrasts:
        contrasts.append((gc.name, gc.weights))
    return contrasts, {gc.name: gc.meaning for gc in design.default_contrasts}


def group_ftests(
    settings: Settings,
    design: Design,
    contrasts: list[tuple[str, np.ndarray]],
    label: str,
    problems: list[str],
) -> list[GroupFTest]:
    """The design's default F-tests and the study's ``[[ftest]]`` blocks.

    The rows of an ``[[ftest]]`` are named contrasts: the study's ``[[contrast]]`` blocks
    or the design's default contrasts (also when ``[[contrast]]`` blocks replace them as
    the contrasts tested). Unknown names and linearly dependent rows are problems naming
    the block.
    """
    known = {gc.name: gc.weights for gc in design.default_contrasts}
    known.update(dict(contrasts))
    taken = {name.casefold() for name, _ in contrasts}
    out = [f for f in design.default_ftests if f.name.casefold() not in taken]
    declared = {spec.name.casefold() for spec in settings.ftests}
    out = [f for f in out if f.name.casefold() not in declared]
    for i, spec in enumerate(settings.ftests, start=1):
        where = f"[ftest {i}] contrasts"
        if spec.name.casefold() in taken:
            problems.append(
                f"{label}: [ftest {i}] name: {spec.name!r} is the name of a group contrast "
                "tested (names that differ only in case count as one: each names a "
                "folder); choose another"
            )
            continue
        unknown = [n for n in spec.contrasts if n not in known]
        if unknown:
            problems.append(
                f"{label}: {where}: {', '.join(repr(n) for n in unknown)} "
                f"{'is not a contrast' if len(unknown) == 1 else 'are not contrasts'} of "
                f"this design; contrasts: {', '.join(known) or 'none'}"
            )
            continue
        weights = np.vstack([known[n] for n in spec.contrasts])
        rank = contrast_rank(weights)
        if rank < len(spec.contrasts):
            problems.append(
                f"{label}: {where}: the {len(spec.contrasts)} contrasts are linearly "
                f"dependent (rank {rank}): one is a combination of the others, so the "
                f"F-test '{spec.name}' has only {rank} independent row(s); list only "
                "independent contrasts"
            )
            continue
        out.append(
            GroupFTest(
                name=spec.name,
                rows=spec.contrasts,
                weights=weights,
                meaning="any of " + ", ".join(spec.contrasts) + " differs from zero",
                declared=True,
            )
        )
    return out


def _check_questions(settings: Settings, contrast_names: list[str], atlas: Atlas | None):
    """Problems with [questions]: unknown contrasts, regions, or no atlas to ask.

    Every region is checked the way the questions will use it, so that nothing ``run``
    refuses later for a region passes ``check``: a target (with an optional side
    suffix, :mod:`grouplevel.questions.sides`) must exist and have that side; a symmetry
    region must give exactly one left and one right row
    (:func:`grouplevel.questions.symmetry.region_pair`) and be listed once.
    """
    problems = []
    known = [n for n in contrast_names if n]
    for name in settings.questions_by_contrast:
        if name not in known:
            problems.append(
                f"[questions.{name}]: the study has no first-level condition or comparison "
                f"{name!r}"
                + (
                    f"; conditions and comparisons: {', '.join(known)}"
                    if known
                    else " (no 'condition' column)"
                )
            )
    asked = {"questions": settings.questions}
    asked.update({f"questions.{k}": q for k, q in settings.questions_by_contrast.items()})
    regions = sorted({r for q in asked.values() for r in (*q.symmetry, *q.targets)})
    if regions and settings.atlas is None:
        problems.append(
            "[questions] names regions (" + ", ".join(regions) + ") but the study has no "
            "[atlas]; add one (image and labels) to ask about regions"
        )
    elif regions and atlas is not None:
        for where, q in asked.items():
            problems.extend(_check_question_regions(where, q, atlas))
    return list(dict.fromkeys(problems))


def _check_question_regions(where: str, q, atlas: Atlas) -> list[str]:
    """Problems with the targets and symmetry regions of one [questions] table."""
    from grouplevel.questions.sides import asked_region, resolve_side, split_side
    from grouplevel.questions.symmetry import region_pair

    problems = []
    for name in q.targets:
        try:
            asked_region(atlas, name, q.stimulus_side, f"[{where}] targets")
        except UserError as exc:
            problems.append(str(exc))
    pairs: dict[tuple[int, int], str] = {}
    for name in q.symmetry:
        try:
            resolve_side(split_side(name)[1], q.stimulus_side, f"[{where}] symmetry", name)
            pair = region_pair(atlas, name)
        except UserError as exc:
            text = str(exc)
            problems.append(text if text.startswith("[") else f"[{where}] symmetry: {text}")
            continue
        if pair in pairs:
            problems.append(
                f"[{where}] symmetry: {name!r} names the same left/right pair as "
                f"{pairs[pair]!r}; give each region once"
            )
        pairs.setdefault(pair, name)
    return problems


@dataclass(frozen=True)
class RunData:
    """Masked data of one first-level contrast: runs × in-mask voxels.

    Both arrays are float32 (first-level maps are float32 on disk; half the memory of
    float64). :func:`grouplevel.model.fit_reml` converts them to float64 one chunk of
    voxels at a time.
    """

    effect: np.ndarray  # (n_runs, V) float32, NaN where a run has no usable value
    variance: np.ndarray | None  # (n_runs, V) float32 first-level variances, NaN where missing


def load_runs(study: Study, first_level: FirstLevel, *, memory_gb: float | None = None) -> RunData:
    """Read one first-level contrast's maps into masked arrays, one image at a time.

    Only the (runs × in-mask voxels) float32 arrays are held, never a 4-D stack.

    Parameters
    ----------
    study, first_level
        The validated study and one of its first-level contrasts.
    memory_gb
        Memory budget in GiB; default the study's ``[compute] memory_gb``.

    Raises
    ------
    UserError
        Before any map is read, when the runs × voxels arrays alone exceed the budget
        (the message gives the sizes and how to fix it: a larger ``[compute]
        memory_gb`` or a smaller mask).
    """
    from grouplevel.model.memory import GIB, memory_plan

    mask = first_level.mask
    masked = study.user_mask is not None
    n = len(first_level.runs)
    n_vox = int(mask.sum())
    with_variance = first_level.variance_kind != "none"
    budget = study.settings.compute.memory_gb if memory_gb is None else memory_gb
    plan = memory_plan(n, n_vox, with_variance, budget)
    if not plan.arrays_fit:
        maps = "effect and variance maps" if with_variance else "effect maps"
        name = f"first-level contrast '{first_level.name}'" if first_level.name else "the study"
        raise UserError(
            f"{study.settings.source}: [compute] memory_gb = {budget:g} GiB is too small for "
            f"{name}: {n} runs × {n_vox:,} in-mask voxels of {maps} need "
            f"{plan.arrays_bytes / GIB:.2f} GiB as float32 just to hold them (about "
            f"{plan.need_bytes / GIB:.2f} GiB with the fit's own arrays); set [compute] "
            f"memory_gb to at least {math.ceil(1.25 * plan.need_bytes / GIB * 10) / 10:g} "
            "(if the machine has that much memory) or use a smaller [study] mask"
        )
    effect = np.empty((n, n_vox), dtype=np.float32)
    variance = np.empty((n, n_vox), dtype=np.float32) if with_variance else None
    for i, (_, row) in enumerate(first_level.runs.iterrows()):
        e = _read_effect(row)
        v = _read_variance(row, first_level.variance_kind)
        ok = _valid(e, v, masked)[mask]
        effect[i] = np.where(ok, e[mask], np.nan)
        if variance is not None:
            variance[i] = np.nan if v is None else np.where(ok, v[mask], np.nan)
    return RunData(effect=effect, variance=variance)


def load_study(
    path: str | Path, *, permutations: int | None = None, seed: int | None = None
) -> Study:
    """Read a study's TOML file, validate the runs table and every map.

    Parameters
    ----------
    path
        The study's TOML file.
    permutations, seed
        Optional overrides of ``[inference] permutations`` and ``seed``.

    Raises
    ------
    UserError
        With every problem found, each naming its file, table line or key.
    """
    settings = with_overrides(load_settings(path), permutations=permutations, seed=seed)
    with headers_read_once():  # the headers are read, then the maps: parse each once
        return inspect_study(settings)
