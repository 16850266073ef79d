"""The rule for names that become file or folder names in an output folder.

First-level contrast names (the runs table's ``contrast`` column) and group contrast
names (``[[contrast]] name``) name the result folders (``OUT/sound/``,
``OUT/sound.drug/``) and the manuscript tables (``OUT/tables/sound_regions.csv``). A
name is allowed when

* it holds only ASCII letters, digits, space and ``- _ . + ( )`` — the POSIX portable
  file name characters (POSIX.1-2017, Base Definitions §3.282: letters, digits,
  ``.``, ``_``, ``-``) plus space, ``+`` and parentheses;
* it is not empty, at most :data:`MAX_NAME_LENGTH` characters long, and does not
  begin with ``-``, ``.`` or a space nor end with ``.`` or a space (POSIX advises
  against a leading hyphen; a leading dot hides a file; Windows drops trailing dots
  and spaces);
* it holds no ``..`` (never a step up a folder);
* it is not a name Windows reserves for devices (``CON``, ``NUL``, ``COM1`` ...);
* and, among the names of one study, no two differ only in upper and lower case
  (``Paw`` and ``paw`` would be one folder on the case-insensitive file systems of
  most laptops).

This module is pure: it checks strings and opens no file.
"""

from __future__ import annotations

import re
from collections.abc import Iterable

# File systems limit one name to 255 bytes (common practice); 100 characters leave room
# for the suffixes added to a name (".group", "_regions.csv") — our own choice.
MAX_NAME_LENGTH = 100
ALLOWED_PUNCTUATION = " -_.+()"
_ALLOWED = re.compile(r"[A-Za-z0-9 \-_.+()]+")
# Device names that Windows refuses as file names, with or without a suffix (common
# practice; Microsoft's "Naming Files, Paths, and Namespaces" lists them; value from
# memory).
_WINDOWS_DEVICES = frozenset(
    {"con", "prn", "aux", "nul"}
    | {f"com{i}" for i in range(1, 10)}
    | {f"lpt{i}" for i in range(1, 10)}
)
#: Entries grouplevel writes at the top of an output folder; a result folder may not
#: take one of these names (compared without case).
RESERVED_OUTPUT_NAMES = frozenset(
    # plan.json and report.json: what `grouplevel plan` and `grouplevel report` add
    {"summary.json", "report.html", "methods.md", "tables", "figures", "plan.json", "report.json"}
)
#: How the rule reads in an error message.
NAME_RULE = (
    "use letters, digits, space and - _ . + ( ) only, at most "
    f"{MAX_NAME_LENGTH} characters, not starting with - . or a space, not ending with . "
    "or a space, and without '..'"
)


def name_problem(name: str) -> str | None:
    """Why ``name`` cannot name a file or folder, or None when it can.

    Parameters
    ----------
    name
        A contrast name as the user wrote it.

    Returns
    -------
    str or None
        A short reason (e.g. ``"holds a path separator '/'"``), or None.
    """
    if not isinstance(name, str):
        return f"is not text ({type(name).__name__})"
    if name == "":
        return "is empty"
    bad = sorted({ch for ch in name if not _ALLOWED.fullmatch(ch)})
    if bad:
        return f"holds {_describe(bad)}"
    if len(name) > MAX_NAME_LENGTH:
        return f"is {len(name)} characters long (at most {MAX_NAME_LENGTH})"
    if ".." in name:
        return "holds '..'"
    if name[0] in "-. ":
        return f"starts with {name[0]!r}"
    if name[-1] in ". ":
        return f"ends with {name[-1]!r}"
    if name.split(".")[0].strip().lower() in _WINDOWS_DEVICES:
        return f"is a device name on Windows ({name.split('.')[0]})"
    return None


def reserved(name: str) -> bool:
    """Whether a result folder called ``name`` would clash with grouplevel's own files."""
    return name.casefold() in RESERVED_OUTPUT_NAMES


def _describe(chars: list[str]) -> str:
    words = []
    for ch in chars:
        if ch in "/\\":
            words.append(f"a path separator {ch!r}")
        elif ord(ch) < 32 or ord(ch) == 127:
            words.append(f"a control character (code {ord(ch)})")
        else:
            words.append(repr(ch))
    return ", ".join(words)


def case_collisions(names: Iterable[str]) -> list[tuple[str, ...]]:
    """Groups of distinct names that are equal when upper and lower case are ignored.

    Examples
    --------
    >>> case_collisions(["Paw", "sound", "paw"])
    [('Paw', 'paw')]
    """
    groups: dict[str, list[str]] = {}
    for name in dict.fromkeys(names):
        groups.setdefault(name.casefold(), []).append(name)
    return [tuple(g) for g in groups.values() if len(g) > 1]
