"""Where grouplevel may write: the checks made before any computation, and at writing.

An output folder is written into a hidden sibling and moved into place at the end
(:func:`grouplevel.pipeline.write_outputs`). Before anything is fitted,
:func:`check_output_folder` refuses, with one clear message:

* an empty ``--out``, the file system root, the home folder, the current working
  folder, and any folder that contains one of them;
* a path that exists and is not a folder, or that lies below a file;
* an existing folder without ``--force``;
* a folder that holds any input of the study (study file, runs table, maps, mask,
  template, atlas) — with or without ``--force``;
* with ``--force``, a folder grouplevel did not write (see :func:`foreign_reason`);
* a location where no file can be created (a probe file is created and removed).

:func:`child_path` is the second line of defence for names that come from the data:
the path it returns always lies directly inside the given folder.
"""

from __future__ import annotations

import json
import os
import tempfile
from collections.abc import Iterable
from pathlib import Path

from grouplevel.errors import UserError
from grouplevel.outputs.names import NAME_RULE, RESERVED_OUTPUT_NAMES, name_problem

#: The tool name recorded in summary.json["tool"]["name"]: how an output folder of
#: grouplevel is recognised.
TOOL_NAME = "grouplevel"
# Files an operating system's file browser adds by itself (macOS Finder, Windows
# Explorer; common practice): they do not make a folder someone else's.
OS_METADATA = frozenset({".DS_Store", "Thumbs.db", "desktop.ini"})
_SHOW = 3  # foreign entries named in a message


def check_output_folder(
    out_dir: str | Path,
    force: bool,
    *,
    inputs: Iterable[tuple[str, Path]] = (),
    ownership: bool = True,
) -> Path:
    """Refuse an output location that could lose data; return it resolved.

    Parameters
    ----------
    out_dir
        The requested output folder (``--out``).
    force
        Whether an existing output folder of grouplevel may be replaced.
    inputs
        ``(role, path)`` of every input file of the study; a folder holding one of them
        is never written.
    ownership
        Whether to check that an existing folder is grouplevel's (false for an early
        check made before the inputs are known, so that a folder holding inputs is
        named as such by the full check).

    Raises
    ------
    UserError
        Naming the folder and why it is refused.
    """
    if isinstance(out_dir, str) and not out_dir.strip():
        raise UserError("--out is empty; give the path of a new output folder")
    given = Path(out_dir).expanduser()
    out = given.resolve()
    plain = Path(os.path.abspath(given))
    _refuse_shared_places(out, plain)
    if out.exists() and not out.is_dir():
        raise UserError(f"{out}: exists and is not a folder; choose a new folder name for --out")
    for role, path in inputs:
        _refuse_holding(out, plain, role, Path(path))
    if out.exists():
        if not force:
            raise UserError(f"{out}: output folder exists; choose another or add --force")
        why = foreign_reason(out) if ownership else None
        if why:
            raise UserError(
                f"{out}: --force replaces only an output folder written by grouplevel, and "
                f"{why}; choose a new folder for --out"
            )
    _probe_writable(out)
    return out


def _inside(path: Path, folder: Path) -> bool:
    return path == folder or folder in path.parents


def _shared_places() -> list[tuple[str, Path]]:
    places = []
    for what, where in (("the current working folder", Path.cwd), ("the home folder", Path.home)):
        try:
            places.append((what, where()))
        except (OSError, RuntimeError):  # a deleted working folder, or no home known
            continue
    return places


def _refuse_shared_places(out: Path, plain: Path) -> None:
    for what, place in _shared_places():
        for p in {place, place.resolve()}:
            if _inside(p, out) or _inside(p, plain):
                kind = "is" if p in (out, plain) else "contains"
                raise UserError(
                    f"{out}: {kind} {what}; give --out a new folder of its own (e.g. results/)"
                )


def _refuse_holding(out: Path, plain: Path, role: str, path: Path) -> None:
    for p in {Path(os.path.abspath(path)), path.resolve()}:
        if _inside(p, out) or _inside(p, plain):
            raise UserError(
                f"{out}: holds an input of the study ({role} {p}); outputs are never "
                "written over inputs: give --out a new folder"
            )


def foreign_reason(folder: Path) -> str | None:
    """Why ``folder`` is not an output folder of grouplevel, or None when it is one.

    A folder is grouplevel's when it is empty, or when its summary.json names
    grouplevel as the tool and every entry at its top is one grouplevel writes (its
    own files, the result folders listed in summary.json, and file-browser metadata).
    """
    entries = [p.name for p in folder.iterdir()]
    if not entries:
        return None
    summary = _summary(folder)
    if summary is None:
        return "it holds no summary.json written by grouplevel"
    ours = (
        set(RESERVED_OUTPUT_NAMES)
        | set(summary["results"])
        | set(summary.get("ftests") or {})
        | OS_METADATA
    )
    foreign = sorted(n for n in entries if n not in ours)
    if foreign:
        more = ", ..." if len(foreign) > _SHOW else ""
        return f"it holds entries grouplevel did not write ({', '.join(foreign[:_SHOW])}{more})"
    return None


def _summary(folder: Path) -> dict | None:
    """summary.json of ``folder`` when grouplevel wrote it, else None."""
    path = folder / "summary.json"
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return None
    tool = data.get("tool") if isinstance(data, dict) else None
    if not isinstance(tool, dict) or tool.get("name") != TOOL_NAME:
        return None
    if not isinstance(data.get("results"), dict):
        return None
    return data


def _probe_writable(out: Path) -> None:
    """Create and remove a probe file where the output folder will be created."""
    base = out.parent
    while not base.exists():
        base = base.parent
    if not base.is_dir():
        raise UserError(
            f"{out}: cannot be created: {base} is a file, not a folder; choose another --out"
        )
    try:
        fd, probe = tempfile.mkstemp(prefix=".grouplevel-probe-", dir=base)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise UserError(
            f"{out}: cannot write in {base} ({exc.strerror or exc}); choose a folder you "
            "can write to for --out"
        ) from None


def study_inputs(study) -> list[tuple[str, Path]]:
    """``(role, path)`` of every input file a study names (excluded runs included)."""
    s = study.settings
    items: list[tuple[str, Path]] = [("study file", s.source), ("runs table", s.study.table)]
    for role, path in (("template", s.study.template), ("mask", s.study.mask)):
        if path is not None:
            items.append((role, path))
    if s.atlas is not None:
        items += [("atlas image", s.atlas.image), ("atlas labels", s.atlas.labels)]
    for col in ("effect", "variance", "se"):
        if col in study.table.columns:
            items += [(f"{col} map", Path(v)) for v in study.table[col] if v]
    return items


def child_path(folder: Path, name: str) -> Path:
    """``folder / name``, refused unless ``name`` is a safe name and stays in ``folder``.

    Raises
    ------
    UserError
        When ``name`` breaks the name rule (:mod:`grouplevel.outputs.names`) or the path would
        resolve outside ``folder`` (e.g. through a symbolic link).
    """
    why = name_problem(name)
    if why:
        raise UserError(f"{name!r} {why}; not written inside {folder}: {NAME_RULE}")
    path = Path(folder) / name
    if path.resolve().parent != Path(folder).resolve():
        raise UserError(f"{path}: resolves outside {folder}; not written")
    return path


def require_grouplevel_output(folder: str | Path) -> dict:
    """The summary of an output folder grouplevel wrote; refuse any other folder.

    ``grouplevel report`` and ``grouplevel plan`` (re)write files inside an output
    folder; they do so only in a folder whose summary.json grouplevel wrote and whose
    result names follow the name rule.
    """
    folder = Path(folder)
    if not (folder / "summary.json").is_file():
        from grouplevel.outputs.summary import read_summary

        read_summary(folder)  # the one message for a folder without summary.json
    summary = _summary(folder)
    if summary is None:
        raise UserError(
            f"{folder / 'summary.json'}: missing, unreadable or not written by grouplevel; "
            "give the output folder of a finished 'grouplevel run'"
        )
    for name in [*summary["results"], *(summary.get("ftests") or {})]:
        why = name_problem(name)
        if why:
            raise UserError(
                f"{folder / 'summary.json'}: result name {name!r} {why}; not an output "
                "folder grouplevel wrote"
            )
    return summary
