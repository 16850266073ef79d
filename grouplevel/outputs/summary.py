"""``summary.json``: the record of one analysis, read and written only here.

The file is a JSON object whose top-level entries are described by :class:`Summary`.
``format`` numbers the layout of those entries: a reader refuses a folder written in a
newer format instead of misreading it. Folders written before the entry existed are
read as format 1 (the layout is the same).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, TypedDict

from grouplevel.errors import UserError
from grouplevel.outputs.files import atomic_write

SUMMARY_NAME = "summary.json"
# Layout version of summary.json: raise it when an entry is renamed, removed or changes
# meaning (adding an entry does not need a new version: readers ignore unknown entries).
SUMMARY_FORMAT = 1


class Summary(TypedDict, total=False):
    """Top-level entries of ``summary.json`` (all JSON values)."""

    format: int  # layout version (SUMMARY_FORMAT when written)
    tool: dict[str, Any]  # name, version, versions of the libraries used
    created: str  # ISO 8601 time, UTC
    title: str
    inputs: list[dict[str, Any]]  # every input file with its sha256
    settings: dict[str, Any]  # the settings with every default filled in
    grid: dict[str, Any]
    atlas: dict[str, Any] | None
    results: dict[str, dict[str, Any]]  # result folder name -> its entry
    ftests: dict[str, dict[str, Any]]  # F-test result folder name -> its entry
    warnings: list[str]
    plan: dict[str, Any]  # written by `grouplevel plan`
    outputs: dict[str, Any]  # files written from the results: "figures" (the report's)


def read_summary(out_dir: str | Path) -> Summary:
    """Read ``out_dir/summary.json`` of a finished output folder.

    Raises
    ------
    UserError
        When the file is missing, is not JSON, has no ``results`` entry, or was written
        in a newer format than this version reads.
    """
    path = Path(out_dir).expanduser() / SUMMARY_NAME
    if not path.is_file():
        raise UserError(f"{path}: not found; give the output folder of a finished 'grouplevel run'")
    try:
        summary = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(f"{path}: not valid JSON ({exc}); run the study again") from None
    if not isinstance(summary, dict) or not isinstance(summary.get("results"), dict):
        raise UserError(f"{path}: has no 'results' entry; run the study again")
    version = summary.get("format", 1)
    if not isinstance(version, int) or version > SUMMARY_FORMAT:
        raise UserError(
            f"{path}: written in summary format {version!r}, newer than this grouplevel "
            f"reads ({SUMMARY_FORMAT}); upgrade grouplevel"
        )
    return summary  # type: ignore[return-value]


def write_summary(folder: str | Path, summary: Summary | dict[str, Any]) -> Path:
    """Write ``folder/summary.json`` atomically, stamped with :data:`SUMMARY_FORMAT`."""
    stamped = {"format": SUMMARY_FORMAT, **{k: v for k, v in summary.items() if k != "format"}}
    path = Path(folder) / SUMMARY_NAME
    atomic_write(path, (json.dumps(stamped, indent=2) + "\n").encode("utf-8"))
    return path


def result_names(summary: Summary | dict[str, Any]) -> list[str]:
    """Result folder names in the order summary.json lists them."""
    return list((summary.get("results") or {}).keys())


def present_files(out_dir: str | Path, summary: Summary | dict[str, Any]) -> dict[str, set[str]]:
    """Result name → names of the files in its folder (empty when the folder is gone)."""
    out = {}
    for name in result_names(summary):
        folder = Path(out_dir) / name
        out[name] = {p.name for p in folder.iterdir()} if folder.is_dir() else set()
    return out
