"""A runs table from a BIDS-style derivatives folder of first-level maps.

A first level that follows BIDS names its maps with entities, e.g.

    sub-m01/ses-1/sub-m01_ses-1_task-blocks_run-2_contrast-paw_stat-effect_statmap.nii.gz
    sub-m01/ses-1/sub-m01_ses-1_task-blocks_run-2_contrast-paw_stat-variance_statmap.nii.gz

:func:`derivatives_table` finds every ``.nii``/``.nii.gz`` file whose name carries a
``sub-`` and a ``stat-`` entity, pairs each ``stat-effect`` map with the
``stat-variance`` (or ``stat-se``) map that has the same other entities, and builds one
row per effect map: ``animal`` (the ``sub-`` label), ``session`` (``ses-``), ``run``
(``run-``), ``condition`` (``contrast-``; with several tasks, ``<task>-<contrast>``),
``effect`` and ``variance``/``se``. The columns of ``participants.tsv`` (one row per
``participant_id``) and of each animal's ``sub-<label>_sessions.tsv`` (one row per
``session_id``) join as covariates (genotype, sex, age, weight, dose...).

Files whose names carry no ``sub-``/``stat-`` entity, or another ``stat-`` value, are
skipped and listed; effect maps without a variance map while others have one, variance
maps without an effect map, and two maps that would give the same row (they differ only
in an entity that is not a row key, such as ``space-`` or ``desc-``) are refused, naming
the files. ``select`` keeps only the files whose entities have the given values (e.g.
``{"space": "template"}``), which resolves such ambiguities.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from grouplevel.errors import UserError
from grouplevel.intake.textcheck import separator_problem

NIFTI_SUFFIXES = (".nii.gz", ".nii")
# BIDS: an entity is <key>-<label>, labels are alphanumeric (BIDS specification,
# "Entities"); the last underscore-separated part without a dash is the suffix.
_ENTITY = re.compile(r"^([a-zA-Z]+)-([a-zA-Z0-9]+)$")
_SUFFIX = re.compile(r"^[a-zA-Z0-9]+$")
EFFECT_STATS = ("effect",)
VARIANCE_STATS = {"variance": "variance", "se": "se"}
# entities that identify a row of the runs table; any other entity must not vary among
# the maps of one row
ROW_ENTITIES = ("sub", "ses", "run", "task", "contrast")
# columns the runs table reserves; a participants/sessions column may not take them
RESERVED = (
    "line",
    "animal",
    "session",
    "run",
    "condition",
    "effect",
    "variance",
    "se",
    "exclude",
    "reason",
)


@dataclass(frozen=True)
class DerivativesTable:
    """The runs table built from a folder, and what was left out.

    Attributes
    ----------
    table
        One row per effect map; paths absolute.
    skipped
        Files that were not used, each with the reason.
    """

    table: pd.DataFrame
    skipped: tuple[str, ...]


def parse_name(name: str) -> dict[str, str] | None:
    """BIDS entities of a file name (``"suffix"`` holds the suffix), or None.

    >>> parse_name("sub-m01_run-2_contrast-paw_stat-effect_statmap.nii.gz")["contrast"]
    'paw'
    """
    for ext in NIFTI_SUFFIXES:
        if name.endswith(ext):
            stem = name[: -len(ext)]
            break
    else:
        return None
    parts = stem.split("_")
    entities: dict[str, str] = {}
    if len(parts) > 1 and _SUFFIX.match(parts[-1]):
        entities["suffix"] = parts.pop()
    for part in parts:
        m = _ENTITY.match(part)
        if m is None or m.group(1) in entities:
            return None
        entities[m.group(1)] = m.group(2)
    return entities


def derivatives_table(
    folder: str | Path,
    *,
    participants: str | Path | None = None,
    select: Mapping[str, str] | None = None,
) -> DerivativesTable:
    """Build a runs table from a BIDS-style derivatives folder (see the module notes).

    Parameters
    ----------
    folder
        The derivatives folder; searched recursively.
    participants
        The participants table; default ``<folder>/participants.tsv`` when it exists.
    select
        Entity values a file must have to be used, e.g. ``{"space": "template"}``.

    Raises
    ------
    UserError
        With every problem found (each naming its files).
    """
    folder = Path(folder).expanduser().resolve()
    if not folder.is_dir():
        raise UserError(f"{folder}: not a folder (a BIDS-style derivatives folder was expected)")
    found, skipped = _find_maps(folder, dict(select or {}))
    problems: list[str] = []
    rows = _pair_maps(folder, found, problems)
    if not rows and not problems:
        raise UserError(
            f"{folder}: no first-level map found; expected file names with 'sub-<label>' and "
            "'stat-effect' entities, e.g. sub-m01_ses-1_run-1_contrast-paw_stat-effect_"
            "statmap.nii.gz" + (f" ({len(skipped)} file(s) skipped)" if skipped else ""),
            list(skipped),
        )
    table = pd.DataFrame(rows)
    if not problems:
        table = _join_participants(folder, table, participants, problems)
        table = _join_sessions(folder, table, problems)
    if problems:
        raise UserError(f"{folder}: {len(problems)} problem(s) in the derivatives folder", problems)
    return DerivativesTable(table=table, skipped=tuple(skipped))


def _find_maps(
    folder: Path, select: dict[str, str]
) -> tuple[list[tuple[Path, dict[str, str]]], list[str]]:
    found = []
    skipped = []
    for path in sorted(folder.rglob("*")):
        if not path.is_file() or not path.name.endswith(NIFTI_SUFFIXES):
            continue
        rel = path.relative_to(folder)
        entities = parse_name(path.name)
        if entities is None or "sub" not in entities or "stat" not in entities:
            skipped.append(f"{rel}: no 'sub-' and 'stat-' entities in the name")
            continue
        if entities["stat"] not in (*EFFECT_STATS, *VARIANCE_STATS):
            skipped.append(f"{rel}: stat-{entities['stat']} is not effect, variance or se")
            continue
        off = [k for k, v in select.items() if entities.get(k) != v]
        if off:
            skipped.append(f"{rel}: not selected ({', '.join(f'{k}-{select[k]}' for k in off)})")
            continue
        found.append((path, entities))
    return found, skipped


def _pair_maps(
    folder: Path, found: list[tuple[Path, dict[str, str]]], problems: list[str]
) -> list[dict[str, str]]:
    """One row per effect map, with its variance or se map."""

    def key(entities: dict[str, str]) -> tuple:
        return tuple(sorted((k, v) for k, v in entities.items() if k != "stat"))

    effects = {}
    variances: dict[tuple, tuple[Path, str]] = {}
    for path, entities in found:
        k = key(entities)
        store = effects if entities["stat"] in EFFECT_STATS else variances
        if k in store:
            problems.append(
                f"{store[k][0].relative_to(folder)} and {path.relative_to(folder)}: two maps "
                "with the same entities"
            )
            continue
        store[k] = (path, entities) if store is effects else (path, entities["stat"])
    kinds = {stat for _, stat in variances.values()}
    if len(kinds) > 1:
        problems.append(
            f"{folder}: some maps give stat-variance and others stat-se; give every run the "
            "same kind"
        )
    for k, (path, _) in variances.items():
        if k not in effects:
            problems.append(f"{path.relative_to(folder)}: no stat-effect map with its entities")
    tasks = {e.get("task") for _, e in effects.values()}
    rows = []
    by_row: dict[tuple, Path] = {}
    for k, (path, entities) in effects.items():
        condition = entities.get("contrast", "")
        if len(tasks) > 1:
            condition = "-".join(x for x in (entities.get("task", ""), condition) if x)
        row = {
            "animal": entities["sub"],
            "session": entities.get("ses", ""),
            "run": entities.get("run", ""),
            "condition": condition,
            "effect": str(path),
        }
        other = {kk: v for kk, v in entities.items() if kk not in (*ROW_ENTITIES, "stat")}
        ident = (row["animal"], row["session"], row["run"], row["condition"])
        if ident in by_row:
            problems.append(
                f"{by_row[ident].relative_to(folder)} and {path.relative_to(folder)}: both give "
                f"animal {row['animal']}, session {row['session'] or '-'}, run "
                f"{row['run'] or '-'}, condition {row['condition'] or '-'}; they differ in "
                f"{', '.join(f'{kk}-{v}' for kk, v in other.items()) or 'their suffix'} — "
                "keep one with a selection (e.g. --select space=template)"
            )
            continue
        by_row[ident] = path
        if variances:
            if k not in variances:
                problems.append(
                    f"{path.relative_to(folder)}: no stat-variance or stat-se map with its "
                    "entities, while other effect maps have one"
                )
                continue
            vpath, stat = variances[k]
            row[VARIANCE_STATS[stat]] = str(vpath)
        rows.append(row)
    rows.sort(key=lambda r: (r["animal"], r["session"], r["run"], r["condition"]))
    return rows


def _read_tsv(path: Path, problems: list[str]) -> pd.DataFrame | None:
    try:
        wrong = separator_problem(
            path,
            "table",
            path.read_text(encoding="utf-8-sig", errors="replace"),
            "\t",
            renamable=False,
        )
        if wrong:
            problems.append(wrong)
            return None
        return pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)
    except Exception as exc:
        problems.append(f"{path}: cannot be read as a tab-separated table: {exc}")
        return None


def _join(
    table: pd.DataFrame,
    extra: pd.DataFrame,
    on: list[str],
    source: Path,
    problems: list[str],
) -> pd.DataFrame:
    clash = [c for c in extra.columns if c in RESERVED and c not in on]
    if clash:
        problems.append(
            f"{source}: column(s) {', '.join(clash)} would replace runs-table columns; rename them"
        )
        return table
    dup = extra[extra.duplicated(on, keep=False)]
    if len(dup):
        problems.append(f"{source}: {', '.join(on)} repeated: {', '.join(dup[on[-1]].unique())}")
        return table
    return table.merge(extra, on=on, how="left")


def _join_participants(
    folder: Path, table: pd.DataFrame, participants: str | Path | None, problems: list[str]
) -> pd.DataFrame:
    path = Path(participants) if participants is not None else folder / "participants.tsv"
    if not path.is_file():
        if participants is not None:
            problems.append(f"{path}: participants table not found")
        return table
    extra = _read_tsv(path, problems)
    if extra is None:
        return table
    if "participant_id" not in extra.columns:
        problems.append(f"{path}: no 'participant_id' column")
        return table
    extra = extra.assign(animal=extra.pop("participant_id").str.removeprefix("sub-"))
    missing = sorted(set(table["animal"]) - set(extra["animal"]))
    if missing:
        problems.append(
            f"{path}: no row for animal(s) {', '.join('sub-' + a for a in missing)}; "
            "add them (their covariates would be missing)"
        )
        return table
    return _join(table, extra, ["animal"], path, problems)


def _join_sessions(folder: Path, table: pd.DataFrame, problems: list[str]) -> pd.DataFrame:
    frames = []
    for animal in table["animal"].unique():
        path = folder / f"sub-{animal}" / f"sub-{animal}_sessions.tsv"
        if not path.is_file():
            continue
        extra = _read_tsv(path, problems)
        if extra is None:
            continue
        if "session_id" not in extra.columns:
            problems.append(f"{path}: no 'session_id' column")
            continue
        extra = extra.assign(
            session=extra.pop("session_id").str.removeprefix("ses-"), animal=animal
        )
        frames.append(extra)
    if not frames:
        return table
    return _join(
        table, pd.concat(frames, ignore_index=True), ["animal", "session"], folder, problems
    )


def write_table(result: DerivativesTable, path: str | Path) -> Path:
    """Write the table as TSV with map paths relative to its folder where possible."""
    path = Path(path).expanduser().resolve()
    table = result.table.copy()
    for col in ("effect", "variance", "se"):
        if col in table.columns:
            table[col] = [_relative(Path(p), path.parent) for p in table[col]]
    table["exclude"] = "false"
    table["reason"] = ""
    first = [c for c in (*RESERVED[1:],) if c in table.columns]
    table = table[first + [c for c in table.columns if c not in first]]
    path.parent.mkdir(parents=True, exist_ok=True)
    table.to_csv(path, sep="\t", index=False)
    return path


def _relative(p: Path, base: Path) -> str:
    """``p`` relative to ``base`` when it lies below it or one folder up, else absolute."""
    rel = os.path.relpath(p, base)
    return str(p) if rel.startswith(os.pardir + os.sep + os.pardir) else rel
