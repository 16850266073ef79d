"""The runs table and its maps: validation and masked loading.

A study is one runs table (TSV or CSV, one row per run and first-level contrast) plus
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
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from grouplevel.atlas import Atlas, read_atlas
from grouplevel.config import Settings, load_settings, with_overrides
from grouplevel.design import (
    Design,
    RandomEffects,
    build_design,
    contrast_vector,
    formula_variables,
    missing_variables,
    model_problems,
)
from grouplevel.errors import UserError
from grouplevel.images import Grid, grid_mismatch, read_header_grid, read_volume

TRUE_WORDS = {"true", "yes", "1", "y", "t", "x"}
FALSE_WORDS = {"false", "no", "0", "n", "f", ""}
# A mouse brain is about 10 mm and a rat brain about 20 mm long (common practice); a
# mask extent above this along any axis suggests the ×10 header scaling that some labs
# apply to rodent images so that human-brain software accepts them.
MAX_PLAUSIBLE_BRAIN_EXTENT_MM = 40.0
MIN_ANIMALS = 2


@dataclass(frozen=True)
class FirstLevel:
    """The included runs of one first-level contrast and their group design."""

    name: str | None  # the table's ``contrast`` value, None without that column
    runs: pd.DataFrame  # included rows, with absolute paths and a ``line`` column
    excluded: pd.DataFrame  # excluded rows with their reasons
    design: Design
    contrasts: tuple[tuple[str, np.ndarray], ...]  # (group contrast name, weights)
    mask: np.ndarray  # analysis mask (3-D bool)
    coverage_runs: np.ndarray  # (3-D int) runs with data per voxel
    coverage_animals: np.ndarray  # (3-D int) animals with data per voxel
    variance_kind: str  # "variance", "se" or "none"
    random: RandomEffects = field(default_factory=RandomEffects)  # slopes, sessions, groups

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
    """Read the runs table (TSV, or CSV by extension) as text, with a ``line`` column."""
    if not path.is_file():
        raise UserError(f"{path}: runs table not found ([study] table)")
    sep = "," if path.suffix.lower() == ".csv" else "\t"
    try:
        table = pd.read_csv(path, sep=sep, dtype=str, keep_default_na=False)
    except Exception as exc:
        raise UserError(f"{path}: cannot read the runs table: {exc}") from None
    table.columns = [str(c).strip() for c in table.columns]
    if table.empty:
        raise UserError(f"{path}: the runs table has no rows")
    if len(table.columns) == 1 and sep == "\t" and "," in table.columns[0]:
        raise UserError(f"{path}: looks comma-separated; name it .csv or use tabs")
    table = table.apply(lambda col: col.str.strip())
    table.insert(0, "line", np.arange(len(table)) + 2)  # header is line 1
    return table


def _where(path: Path, row: pd.Series) -> str:
    animal = row.get("animal", "")
    extra = f" (animal {animal})" if animal else ""
    return f"{path.name} line {row['line']}{extra}"


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
    if "contrast" not in table.columns:
        table["contrast"] = ""
    if not problems and "run" in table.columns:
        key = ["contrast", "animal", "session", "run"]
        keyed = table[table["run"] != ""]
        dup = keyed[keyed.duplicated(key, keep=False)]
        for _, group in dup.groupby(key, sort=False):
            lines = ", ".join(str(v) for v in group["line"])
            row = group.iloc[0]
            what = f"animal {row['animal']}, session {row['session'] or '-'}, run {row['run']}"
            if row["contrast"]:
                what += f", contrast {row['contrast']}"
            problems.append(f"{path.name} lines {lines}: duplicate run ({what})")
    return table


def _covariates(
    path: Path, runs: pd.DataFrame, variables: list[str], problems: list[str]
) -> pd.DataFrame:
    """Convert the formula's covariates: numeric when every value parses, else text."""
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
    if kind == "none" or not row.get(kind, ""):
        return None
    data = read_volume(Path(row[kind]))
    return data**2 if kind == "se" else data


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
    table = _check_rows(path, read_table(path), problems)
    if problems:
        raise UserError(f"{path}: {len(problems)} problem(s) in the runs table", problems)

    # -- grids (headers only) --
    reference_path = settings.study.template or settings.study.mask or Path(table["effect"][0])
    grid: Grid | None = None
    try:
        grid = read_header_grid(reference_path)
    except UserError as exc:
        problems.append(str(exc))
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
    included = table[~table["exclude"]]
    for _, row in included.iterrows():
        for col in ("effect", "variance", "se"):
            if col in table.columns and row[col]:
                files.setdefault(row[col], f"{_where(path, row)} '{col}'")
    bad_files: set[str] = set()
    for p, where in files.items():
        try:
            g = read_header_grid(Path(p))
        except UserError as exc:
            problems.append(f"{where}: {exc}")
            bad_files.add(p)
            continue
        if grid is not None:
            why = grid_mismatch(grid, g)
            if why:
                problems.append(f"{where}: {p}: {why}")
                bad_files.add(p)
    if grid is None or problems:
        raise UserError(f"{path}: {len(problems)} problem(s) in the study's files", problems)

    user_mask = None
    if settings.study.mask is not None:
        user_mask = read_volume(settings.study.mask)
        if not np.all(np.isfinite(user_mask)):
            problems.append(f"[study] mask {settings.study.mask}: contains NaN or infinite values")
        user_mask = np.nan_to_num(user_mask) > 0
        if not user_mask.any():
            problems.append(f"[study] mask {settings.study.mask}: the mask is empty")

    # -- design per first-level contrast --
    variables: list[str] = []
    missing = missing_variables(
        settings.model.formula, [c for c in table.columns if c not in ("line", "exclude")]
    )
    if missing:
        problems.extend(missing)
    else:
        variables = formula_variables(settings.model.formula)

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

    first_levels: list[FirstLevel] = []
    names = list(dict.fromkeys(table["contrast"]))
    for name in names:
        label = f"contrast '{name}'" if name else "the study"
        rows = table[table["contrast"] == name]
        inc = rows[~rows["exclude"]]
        excl = rows[rows["exclude"]]
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
            continue
        covariate_problems: list[str] = []
        inc = _covariates(path, inc, variables, covariate_problems)
        problems.extend(covariate_problems)
        if missing or covariate_problems:
            continue
        try:
            design = build_design(inc, settings.model.formula)
        except UserError as exc:
            problems.append(f"{label}: {exc}")
            continue
        contrasts = []
        for spec in settings.contrasts:
            try:
                contrasts.append(
                    (spec.name, contrast_vector(spec.weights, design.columns, spec.name))
                )
            except UserError as exc:
                problems.append(str(exc))
                problems.extend(exc.problems)
        random = RandomEffects()
        try:
            random, model_notes, model_warnings = model_problems(
                design,
                inc,
                contrasts,
                settings.model,
                settings.inference.permutations,
                full_coverage=settings.study.min_coverage >= 1.0,
            )
        except UserError as exc:
            problems.append(f"{label}: {exc}")
        else:
            problems.extend(f"{label}: {p}" for p in model_notes)
            warnings.extend(f"{label}: {w}" for w in model_warnings)
        # -- data pass over this contrast's maps --
        cov_runs = np.zeros(grid.shape, dtype=np.int32)
        animal_seen = np.zeros((design.n_animals, *grid.shape), dtype=bool)
        readable = True
        for i, (_, row) in enumerate(inc.iterrows()):
            if row["effect"] in bad_files or (
                variance_kind != "none" and row[variance_kind] in bad_files
            ):
                readable = False
                continue
            try:
                effect = read_volume(Path(row["effect"]))
                variance = _read_variance(row, variance_kind)
            except UserError as exc:
                problems.append(f"{_where(path, row)}: {exc}")
                readable = False
                continue
            where = f"{_where(path, row)}: {Path(row['effect']).name}"
            if np.isinf(effect).any():
                problems.append(f"{where}: {int(np.isinf(effect).sum())} infinite value(s)")
            if variance is not None and np.isinf(variance).any():
                problems.append(
                    f"{_where(path, row)}: {Path(row[variance_kind]).name}: "
                    f"{int(np.isinf(variance).sum())} infinite value(s)"
                )
            if user_mask is not None:
                nan_in = int((np.isnan(effect) & user_mask).sum())
                if nan_in and settings.study.min_coverage >= 1.0:
                    problems.append(
                        f"{where}: {nan_in} voxel(s) inside the mask have no value (NaN); "
                        "to fit those voxels with the runs that do have data, set "
                        "[study] min_coverage below 1 (e.g. 0.8)"
                    )
                if variance is not None:
                    finite = np.isfinite(effect) & np.isfinite(variance) & user_mask
                    bad = int((variance[finite] <= 0).sum())
                    if bad:
                        problems.append(
                            f"{_where(path, row)}: {Path(row[variance_kind]).name}: {bad} "
                            f"voxel(s) inside the mask have zero or negative {variance_kind}"
                        )
            ok = _valid(effect, variance, user_mask is not None)
            cov_runs += ok
            animal_seen[design.animal[i]] |= ok
        if not readable:
            continue
        cov_animals = animal_seen.sum(axis=0).astype(np.int32)
        n_runs = len(inc)
        need_runs = math.ceil(settings.study.min_coverage * n_runs - 1e-9)
        mask = (cov_runs >= need_runs) & (cov_animals >= MIN_ANIMALS)
        if user_mask is not None:
            mask &= user_mask
        if not mask.any():
            problems.append(
                f"{label}: no voxel has data in at least {need_runs} of {n_runs} runs "
                f"([study] min_coverage = {settings.study.min_coverage}) and 2 animals"
            )
            continue
        if user_mask is not None and settings.study.min_coverage < 1.0:
            dropped = int((user_mask & ~mask).sum())
            if dropped:
                warnings.append(
                    f"{label}: {dropped} mask voxel(s) left out for too little coverage "
                    f"(fewer than {need_runs} of {n_runs} runs or 2 animals with data)"
                )
        first_levels.append(
            FirstLevel(
                name=name or None,
                runs=inc.reset_index(drop=True),
                excluded=excl.reset_index(drop=True),
                design=design,
                contrasts=tuple(contrasts),
                mask=mask,
                coverage_runs=cov_runs,
                coverage_animals=cov_animals,
                variance_kind=variance_kind,
                random=random,
            )
        )

    extent = _mask_extent_mm(
        user_mask if user_mask is not None else (first_levels[0].mask if first_levels else None),
        grid,
    )
    if extent is not None and extent.max() > MAX_PLAUSIBLE_BRAIN_EXTENT_MM:
        warnings.append(
            f"the brain spans {extent.round(1).tolist()} mm along the grid axes (voxel size "
            f"{grid.voxel_size.round(3).tolist()} mm), far more than a rodent brain: the "
            "header may carry the ×10 scaling some labs use for rodent images. Volumes and "
            "coordinates in the outputs will be in the header's units."
        )
    atlas = None
    if settings.atlas is not None and first_levels and not problems:
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
            problems.append(str(exc))
            problems.extend(exc.problems)
        else:
            warnings.extend(atlas.warnings)
    problems.extend(_check_questions(settings, names, atlas))
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


def _check_questions(settings: Settings, contrast_names: list[str], atlas: Atlas | None):
    """Problems with [questions]: unknown contrasts, regions, or no atlas to ask."""
    problems = []
    known = [n for n in contrast_names if n]
    for name in settings.questions_by_contrast:
        if name not in known:
            problems.append(
                f"[questions.{name}]: the runs table has no first-level contrast {name!r}"
                + (f"; contrasts: {', '.join(known)}" if known else " (no 'contrast' column)")
            )
    asked = [settings.questions, *settings.questions_by_contrast.values()]
    regions = sorted({r for q in asked for r in (*q.symmetry, *q.targets)})
    if regions and settings.atlas is None:
        problems.append(
            "[questions] names regions (" + ", ".join(regions) + ") but the study has no "
            "[atlas]; add one (image and labels) to ask about regions"
        )
    elif regions and atlas is not None:
        for region in regions:
            try:
                atlas.region_rows(region)
            except UserError as exc:
                problems.append(f"[questions]: {exc}")
    return problems


def _mask_extent_mm(mask: np.ndarray | None, grid: Grid) -> np.ndarray | None:
    if mask is None or not mask.any():
        return None
    idx = np.argwhere(mask)
    return (idx.max(axis=0) - idx.min(axis=0) + 1) * grid.voxel_size


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
    from grouplevel.memory import GIB, memory_plan

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
        e = read_volume(Path(row["effect"]))
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
    return inspect_study(settings)
