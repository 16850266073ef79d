"""Files added to a finished output folder after the run: ``plan.json`` and ``report.json``.

``summary.json`` records one analysis and is written once, by the run. What later
commands add lives in files of its own, so that neither ``grouplevel plan`` nor
``grouplevel report`` rewrites the record of the analysis:

- ``plan.json``: the plans of ``grouplevel plan``, by result name;
- ``report.json``: choices of ``grouplevel report`` that later renderings keep (the
  title given with ``--title``).

This module also finds an input again when the output folder moved together with the
study (:func:`locate_input`).
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from grouplevel.errors import UserError
from grouplevel.outputs.files import atomic_write

PLAN_NAME = "plan.json"
REPORT_NAME = "report.json"


def _read(path: Path) -> dict[str, Any]:
    if not path.is_file():
        return {}
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(
            f"{path}: not valid JSON ({exc}); delete it and run the command again"
        ) from None
    if not isinstance(value, dict):
        raise UserError(f"{path}: not a JSON object; delete it and run the command again")
    return value


def _write(path: Path, value: dict[str, Any]) -> Path:
    atomic_write(path, (json.dumps(value, indent=2) + "\n").encode("utf-8"))
    return path


def read_plans(out_dir: str | Path, summary: dict[str, Any] | None = None) -> dict[str, Any]:
    """Result name → its plan (``{"regions": [...]}``); ``{}`` before any plan.

    Folders planned by an older version kept the plans in ``summary.json["plan"]``;
    they are read from there when ``plan.json`` is absent.
    """
    plans = _read(Path(out_dir) / PLAN_NAME).get("plans")
    if isinstance(plans, dict):
        return plans
    old = (summary or {}).get("plan")
    return old if isinstance(old, dict) else {}


def write_plans(out_dir: str | Path, plans: dict[str, Any]) -> Path:
    """Write ``out_dir/plan.json`` (atomically)."""
    return _write(Path(out_dir) / PLAN_NAME, {"plans": plans})


def read_report_options(out_dir: str | Path) -> dict[str, Any]:
    """The kept choices of ``grouplevel report`` (e.g. ``{"title": ...}``); ``{}`` if none."""
    return _read(Path(out_dir) / REPORT_NAME)


def write_report_options(out_dir: str | Path, **options: Any) -> Path:
    """Add ``options`` to ``out_dir/report.json`` (atomically), keeping the others."""
    kept = read_report_options(out_dir)
    kept.update(options)
    return _write(Path(out_dir) / REPORT_NAME, kept)


def locate_input(path: str | Path | None, summary: dict[str, Any], out_dir: str | Path):
    """An input file of the analysis, found again after the folders moved; or None.

    The recorded (absolute) path first; else the same path relative to the output
    folder as it was when written (``summary.json["output_folder"]``), applied to where
    the output folder is now — the case of a study folder moved or copied whole.
    """
    if not path:
        return None
    path = Path(path)
    if path.is_file():
        return path
    written_at = summary.get("output_folder")
    if not written_at:
        return None
    here = Path(out_dir).expanduser().resolve()
    moved = Path(os.path.normpath(here / os.path.relpath(path, written_at)))
    return moved if moved.is_file() else None
