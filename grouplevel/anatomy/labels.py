"""Atlas label tables in the forms labs and published atlases use, read into one shape.

An atlas label table says which integer of the label image is which structure. Labs
write it in several ways, and this module reads each of them into the one table that
:func:`grouplevel.anatomy.atlas.build_atlas` checks and uses, with the columns
``index``, ``name``, ``abbreviation``, ``hemisphere``, ``parent``, ``color`` and
``line`` (where the row is in the file, for messages):

* a tab-separated table in the style of a BIDS ``dseg.tsv`` (``index``, ``name``, ...);
* a tab- or comma-separated table (``.tsv``, ``.txt``, ``.csv``) whose columns carry
  other usual names: see :data:`COLUMN_ALIASES`. A column named ``label`` is ambiguous in
  practice (some tables hold the integer in it, others the name): it is the index when
  every filled cell is a whole number, else the name;
* a JSON file: a list of regions, or a nested tree of regions in which each region
  lists its sub-regions under ``children`` (the parent of a child is the region it is
  listed under). The keys of a region take the same names as the columns above. The
  tree is flattened in file order and the parents are kept;
* the hemisphere written into the name instead of a column of its own (``Left X``,
  ``X (L)``, ``X_R``, ``X left``, ``lh.X``, ...): such a name is split into the name
  ``X`` and the hemisphere, and the reader says so and for how many rows
  (:attr:`LabelTable.notes`); a structure named for both sides thus gives one left and
  one right region of the same name, which is what the symmetry question needs.

Anything the reader cannot decide for itself (two columns that could both be the name,
for instance) is refused with a message naming the file and the columns.
"""

from __future__ import annotations

import functools
import json
import re
from bisect import bisect_right
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from grouplevel.anatomy.sidenames import HEMISPHERE_SPELLINGS, split_hemisphere
from grouplevel.errors import UserError
from grouplevel.intake.textcheck import read_text_table

#: The columns the atlas builder reads, in order.
STANDARD_COLUMNS = ("index", "name", "abbreviation", "hemisphere", "parent", "color")

#: Usual column names (after lower-casing and turning spaces and hyphens into "_") for
#: each standard column. Sources: the BIDS ``dseg.tsv`` columns (index, name,
#: abbreviation, color), the column names of widely shared rodent structure tables
#: (id, acronym, structure_name, parent_structure_id, color_hex_triplet; common
#: practice) and plain synonyms.
COLUMN_ALIASES: dict[str, tuple[str, ...]] = {
    "index": ("index", "id", "label_value", "label_id", "label_index", "structure_id", "value"),
    "name": ("name", "structure_name", "label_name", "region_name", "region", "structure"),
    "abbreviation": ("abbreviation", "acronym", "abbr", "short_name"),
    "hemisphere": ("hemisphere", "side", "hemi", "laterality"),
    "parent": (
        "parent",
        "parent_structure_id",
        "parent_id",
        "parent_index",
        "parent_name",
        "parent_structure",
    ),
    "color": ("color", "colour", "color_hex_triplet", "color_hex", "hex", "rgb_hex"),
}

#: The column whose role is decided from its content (see the module docstring).
AMBIGUOUS_LABEL_COLUMN = "label"

#: The key under which a JSON region lists its sub-regions.
CHILDREN_KEYS = ("children", "subregions", "sub_regions")

_MAX_FOUND = 12  # column names listed in a message


@dataclass(frozen=True)
class LabelTable:
    """An atlas label table read into the standard columns.

    Attributes
    ----------
    table
        Text cells in the columns :data:`STANDARD_COLUMNS` (empty where the file had
        none) and ``line`` (the row's physical line in the file; header = line 1).
    notes
        What the reader did beyond reading, in words, for ``check`` to print (columns
        taken under another name, hemispheres read from the names, a tree flattened).
    """

    table: pd.DataFrame
    notes: tuple[str, ...]


def read_label_table(path: Path) -> LabelTable:
    """Read an atlas label table in any accepted form (see the module docstring).

    Raises
    ------
    UserError
        When the file is missing or unreadable, has no index or name, or leaves the role
        of a column undecided; the message names the file and the columns.
    """
    path = Path(path)
    if not path.is_file():
        raise UserError(f"{path}: atlas label table not found ([atlas] labels)")
    notes: list[str] = []
    if path.suffix.lower() == ".json" or _looks_like_json(path):
        raw = _read_json_regions(path, notes)
    else:
        raw = read_text_table(path, "atlas label table", "index, name, ...")
    table = _standard_columns(raw, path, notes)
    table = _hemispheres_from_names(table, path, notes)
    return LabelTable(table=table, notes=tuple(notes))


# --------------------------------------------------------------------------------------
# Columns
# --------------------------------------------------------------------------------------


@functools.lru_cache(maxsize=1024)
def _key(column: Any) -> str:
    """A column name or JSON key as matched against the aliases (few distinct values,
    asked for once per region of a JSON tree, hence the cache)."""
    return re.sub(r"[\s\-]+", "_", str(column).strip().lower())


def _standard_columns(raw: pd.DataFrame, path: Path, notes: list[str]) -> pd.DataFrame:
    """The table with its columns renamed to the standard ones (text cells)."""
    columns = [c for c in raw.columns if c != "line"]
    keys = {c: _key(c) for c in columns}
    chosen: dict[str, list[str]] = {role: [] for role in STANDARD_COLUMNS}
    for column in columns:
        for role, aliases in COLUMN_ALIASES.items():
            if keys[column] in aliases:
                chosen[role].append(column)
    label = [c for c in columns if keys[c] == AMBIGUOUS_LABEL_COLUMN]
    for column in label:
        role = "index" if _all_whole_numbers(raw[column]) else "name"
        chosen[role].append(column)
        notes.append(
            f"{path}: column {column!r} read as the {role} "
            + (
                "(every value is a whole number)"
                if role == "index"
                else "(it holds text, not whole numbers)"
            )
        )
    for role, found in chosen.items():
        if len(found) > 1:
            raise UserError(
                f"{path}: the atlas label table has {len(found)} columns that could be the "
                f"{role} ({', '.join(repr(c) for c in found)}); keep one of them, or "
                "rename the others"
            )
    missing = [role for role in ("index", "name") if not chosen[role]]
    if missing:
        raise UserError(
            f"{path}: the atlas label table has no {' and no '.join(missing)} column (found "
            f"{_listed(columns)}); name them 'index' and 'name' (as in a BIDS dseg.tsv), "
            f"or use a usual name: {', '.join(COLUMN_ALIASES['index'][:3])} for the "
            f"index, {', '.join(COLUMN_ALIASES['name'][:3])} for the name"
        )
    out = pd.DataFrame({"line": raw["line"].to_numpy()} if "line" in raw else {})
    renamed = []
    for role in STANDARD_COLUMNS:
        if chosen[role]:
            column = chosen[role][0]
            out[role] = [_text(v) for v in raw[column].tolist()]
            if keys[column] != role and column not in label:
                renamed.append(f"{column!r} as the {role}")
        else:
            out[role] = [""] * len(raw)
    out["hemisphere"] = [_hemisphere_word(v) for v in out["hemisphere"]]
    out["color"] = [_colour(v) for v in out["color"]]
    if renamed:
        notes.append(f"{path}: read column {', '.join(renamed)}")
    return out.reset_index(drop=True)


def _listed(columns: list[str]) -> str:
    shown = [repr(str(c)[:40]) for c in columns[:_MAX_FOUND]]
    more = f" and {len(columns) - _MAX_FOUND} more" if len(columns) > _MAX_FOUND else ""
    return (", ".join(shown) + more) or "none"


def _text(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def _all_whole_numbers(column: pd.Series) -> bool:
    values = [_text(v).strip() for v in column.tolist()]
    values = [v for v in values if v]
    return bool(values) and all(re.fullmatch(r"[+]?\d+(\.0*)?", v) for v in values)


def _hemisphere_word(value: str) -> str:
    """A usual hemisphere spelling in the builder's words; other text is left as written
    (the builder reports it)."""
    return HEMISPHERE_SPELLINGS.get(value.strip().casefold(), value)


def _colour(value: str) -> str:
    """Six hex digits without "#" (as some structure tables store them) get the "#"."""
    text = value.strip()
    return f"#{text}" if re.fullmatch(r"[0-9A-Fa-f]{6}", text) else value


# --------------------------------------------------------------------------------------
# Hemisphere in the name
# --------------------------------------------------------------------------------------


def _hemispheres_from_names(table: pd.DataFrame, path: Path, notes: list[str]) -> pd.DataFrame:
    """Split the side out of the names (and abbreviations) of rows that carry one.

    A name is split only where the hemisphere cell is empty or agrees; a parent given by
    a name that was split is replaced by that row's index, so it still points at the
    same row.
    """
    names = [str(v).strip() for v in table["name"]]
    split = [split_hemisphere(n) for n in names]
    changed = [r for r, (_, side) in enumerate(split) if side]
    if not changed:
        return table
    problems = []
    table = table.copy()
    hemisphere = list(table["hemisphere"])
    for r in changed:
        own = str(hemisphere[r]).strip().casefold()
        if own in ("left", "right") and own != split[r][1]:
            problems.append(
                f"{path}, line {table['line'][r]}: the name {names[r]!r} says "
                f"{split[r][1]} but the hemisphere column says {own}; correct one of them"
            )
    if problems:
        raise UserError(f"{path}: the atlas label table has {len(problems)} problem(s)", problems)
    index_of_name = _unique_index_by_name(table, names, changed)
    parents = [str(p).strip() for p in table["parent"]]
    table["parent"] = [index_of_name.get(p.casefold(), p) for p in parents]
    abbreviations = list(table["abbreviation"])
    new_names = list(table["name"])
    for r in changed:
        base, side = split[r]
        new_names[r] = base
        hemisphere[r] = side
        short, short_side = split_hemisphere(str(abbreviations[r]))
        if short_side == side:
            abbreviations[r] = short
    table["name"] = new_names
    table["hemisphere"] = hemisphere
    table["abbreviation"] = abbreviations
    example = f"{names[changed[0]]!r} → {split[changed[0]][0]!r}, {split[changed[0]][1]}"
    notes.append(
        f"{path}: hemisphere read from the region name in {len(changed)} row(s) (e.g. {example})"
    )
    return table


def _unique_index_by_name(
    table: pd.DataFrame, names: list[str], changed: list[int]
) -> dict[str, str]:
    """Full name as written (case-folded) → index, for the split names that one row only
    carries."""
    count: dict[str, int] = {}
    for n in names:
        count[n.casefold()] = count.get(n.casefold(), 0) + 1
    index = table["index"].tolist()
    return {
        names[r].casefold(): str(index[r]).strip()
        for r in changed
        if count[names[r].casefold()] == 1
    }


# --------------------------------------------------------------------------------------
# JSON
# --------------------------------------------------------------------------------------


def _looks_like_json(path: Path) -> bool:
    """A file whose first visible character opens a JSON object or list."""
    with path.open("rb") as handle:
        start = handle.read(4096).decode("utf-8", errors="ignore").lstrip("\ufeff \t\r\n")
    return start[:1] in ("{", "[")


def _read_json_regions(path: Path, notes: list[str]) -> pd.DataFrame:
    """The regions of a JSON list or tree, flattened in file order, with their lines."""
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise UserError(
            f"{path}: the atlas label table is not UTF-8 text (byte {exc.start}); save it as UTF-8"
        ) from None
    try:
        document = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UserError(
            f"{path}, line {exc.lineno}: not valid JSON ({exc.msg}, column {exc.colno})"
        ) from None
    roots = _root_regions(document, path)
    object_lines = _object_lines(text)
    order = _object_order(document)  # id(dict) -> rank among all objects, file order
    rows: list[dict[str, Any]] = []
    depth = 0
    stack: list[tuple[dict, str, int]] = [(node, "", 1) for node in reversed(roots)]
    while stack:
        node, parent, level = stack.pop()
        depth = max(depth, level)
        row = {k: v for k, v in node.items() if _key(k) not in CHILDREN_KEYS}
        row = {k: v for k, v in row.items() if not isinstance(v, dict | list)}
        own_parent = any(_key(k) in COLUMN_ALIASES["parent"] for k in row)
        if not own_parent and parent:
            row["parent"] = parent
        row["line"] = object_lines[order[id(node)]]
        rows.append(row)
        children = _children(node, path, row["line"])
        identifier = _node_identifier(node)
        stack.extend((child, identifier, level + 1) for child in reversed(children))
    if not rows:
        raise UserError(f"{path}: the JSON file lists no regions")
    table = pd.DataFrame(rows).astype(object).where(lambda d: d.notna(), "")
    columns = ["line"] + [c for c in table.columns if c != "line"]
    if depth > 1:
        notes.append(
            f"{path}: a tree of {len(rows)} regions, {depth} levels deep, flattened "
            "(each region's parent is the region it is listed under)"
        )
    return table[columns]


def _root_regions(document: Any, path: Path) -> list[dict]:
    """The top-level regions: the document itself when it is a list, or a region, or the
    one list of regions a wrapping object holds."""
    if isinstance(document, list):
        return _regions_list(document, path, "the top-level list")
    if not isinstance(document, dict):
        raise UserError(f"{path}: a JSON atlas table must be a list or a tree of regions")
    keys = {_key(k) for k in document}
    if keys & set(COLUMN_ALIASES["index"] + COLUMN_ALIASES["name"] + (AMBIGUOUS_LABEL_COLUMN,)):
        return [document]
    lists = [k for k, v in document.items() if isinstance(v, list) and v and isinstance(v[0], dict)]
    if len(lists) != 1:
        raise UserError(
            f"{path}: cannot find the regions in this JSON object (keys "
            f"{_listed(list(document))}); give a list of regions, a region with "
            "'children', or an object holding one list of regions"
        )
    return _regions_list(document[lists[0]], path, f"the list {lists[0]!r}")


def _regions_list(items: list, path: Path, where: str) -> list[dict]:
    bad = [k for k, v in enumerate(items) if not isinstance(v, dict)]
    if bad:
        raise UserError(
            f"{path}: item {bad[0] + 1} of {where} is not a region (a JSON object with an "
            "index and a name)"
        )
    return items


def _children(node: dict, path: Path, line: int) -> list[dict]:
    for key, value in node.items():
        if _key(key) in CHILDREN_KEYS:
            if value is None:
                return []
            if not isinstance(value, list):
                raise UserError(
                    f"{path}, line {line}: {key!r} must be a list of regions, found "
                    f"{type(value).__name__}"
                )
            return _regions_list(value, path, f"{key!r} on line {line}")
    return []


def _node_identifier(node: dict) -> str:
    """How a child names this region as its parent: its index, else its name."""
    for role in ("index", "name"):
        for key, value in node.items():
            if _key(key) in COLUMN_ALIASES[role] and value not in (None, ""):
                return _text(value)
    for key, value in node.items():
        if _key(key) == AMBIGUOUS_LABEL_COLUMN and value not in (None, ""):
            return _text(value)
    return ""


def _object_order(document: Any) -> dict[int, int]:
    """Rank of every JSON object in the order its "{" appears in the file (pre-order,
    keys in file order, which the json module keeps)."""
    order: dict[int, int] = {}
    stack = [document]
    while stack:
        item = stack.pop()
        if isinstance(item, dict):
            order[id(item)] = len(order)
            stack.extend(reversed(list(item.values())))
        elif isinstance(item, list):
            stack.extend(reversed(item))
    return order


def _object_lines(text: str) -> list[int]:
    """Line (1-based) of every "{" outside strings, in file order."""
    newlines = [m.start() for m in re.finditer("\n", text)]
    return [
        bisect_right(newlines, m.start()) + 1
        for m in re.finditer(r'"(?:[^"\\]|\\.)*"|\{', text)
        if m.group() == "{"
    ]
