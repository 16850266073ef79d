"""Region names that name one hemisphere: "forelimb area (right)", "... (contralateral)".

A stimulus on one side of the body drives the opposite hemisphere first. A target named
for both sides dilutes a one-sided response with the unstimulated side, so a target (and
a region to plan for) may name one side by a suffix in parentheses:

* ``"forelimb area (left)"`` / ``"forelimb area (right)"``: that hemisphere;
* ``"forelimb area (contralateral)"`` / ``"forelimb area (ipsilateral)"``: the side
  opposite to / on the side of ``[questions] stimulus_side``.

The side word is matched without regard to case. A name that is itself a region name
or abbreviation of the atlas (an atlas may call a region "auditory cortex (left)") is
taken as it is, before any suffix is read.

Pure: names, an :class:`~grouplevel.atlas.Atlas` and settings values in, rows out.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

from grouplevel.anatomy.sidenames import split_hemisphere
from grouplevel.atlas import Atlas
from grouplevel.errors import UserError
from grouplevel.specificity import leaf_rows

#: Side words understood in a suffix, and what they mean.
SIDE_WORDS = ("left", "right", "contralateral", "ipsilateral")
_SUFFIX = re.compile(r"^(?P<base>.*\S)\s*\(\s*(?P<side>[A-Za-z]+)\s*\)\s*$")
_OPPOSITE = {"left": "right", "right": "left"}


def split_side(text: str) -> tuple[str, str]:
    """``"forelimb area (Right)"`` → ``("forelimb area", "right")``; no suffix → ``(text, "")``.

    The spellings of a hemisphere that atlas tables use in names are read too
    (``"Left forelimb area"``, ``"S1FL_R"``, ``"forelimb area (L)"``, see
    :func:`grouplevel.anatomy.sidenames.split_hemisphere`), so a region can be named as the
    atlas table wrote it. A parenthesised word that is not a side word is part of the
    name.
    """
    text = str(text).strip()
    match = _SUFFIX.match(text)
    if match and match["side"].casefold() in SIDE_WORDS:
        return match["base"].strip(), match["side"].casefold()
    return split_hemisphere(text)


def resolve_side(word: str, stimulus_side: str | None, where: str, name: str) -> str:
    """The hemisphere ("left"/"right") a side word names; "" for no side word.

    Raises
    ------
    UserError
        For "contralateral"/"ipsilateral" without a stimulus side.
    """
    if word in ("", "left", "right"):
        return word
    if stimulus_side not in _OPPOSITE:
        raise UserError(
            f"{where}: {name!r} names the {word} side, which depends on the stimulated side; "
            'set [questions] stimulus_side = "left" or "right", or name the hemisphere '
            '("(left)" or "(right)")'
        )
    return _OPPOSITE[stimulus_side] if word == "contralateral" else stimulus_side


def _literal(atlas: Atlas, text: str) -> list[int] | None:
    try:
        return atlas.region_rows(text)
    except UserError:
        return None


@dataclass(frozen=True)
class AskedRegion:
    """A region as named in [questions], resolved on an atlas.

    Attributes
    ----------
    text
        As written.
    base
        The region name without its side suffix.
    side
        "left", "right" (one hemisphere) or "" (as many sides as the region has).
    rows
        Rows of ``atlas.regions`` it covers.
    """

    text: str
    base: str
    side: str
    rows: tuple[int, ...]


def asked_region(
    atlas: Atlas, text: str, stimulus_side: str | None, where: str = "[questions] targets"
) -> AskedRegion:
    """Resolve a target name, with an optional side suffix, to atlas rows.

    Without a side every row the name matches is used (both hemispheres of a split
    structure). With a side, the matching rows of that hemisphere are used; a name whose
    rows are all bilateral (a parent spanning the midline) gives its leaves on that side.

    Raises
    ------
    UserError
        Unknown name; a side the region does not have; "contralateral"/"ipsilateral"
        without ``stimulus_side``.
    """
    rows = _literal(atlas, text)
    if rows is not None:
        return AskedRegion(str(text), str(text), "", tuple(rows))
    base, word = split_side(text)
    try:
        rows = atlas.region_rows(base)
    except UserError as exc:
        raise UserError(f"{where}: {exc}") from None
    side = resolve_side(word, stimulus_side, where, text)
    if not side:
        return AskedRegion(str(text), base, "", tuple(rows))
    hemi = atlas.regions["hemisphere"].astype(str).to_numpy()
    on_side = [r for r in rows if hemi[r] == side]
    if not on_side:
        on_side = [int(r) for r in leaf_rows(atlas, rows) if hemi[r] == side]
    if not on_side:
        have = sorted({hemi[r] for r in rows})
        raise UserError(
            f"{where}: {text!r}: the atlas has no {side}-hemisphere part of {base!r} (its rows "
            f"are labelled {', '.join(have)}); name it without a side, or check the atlas "
            "table's hemisphere column"
        )
    return AskedRegion(str(text), base, side, tuple(sorted(on_side)))


def asked_rows(
    atlas: Atlas, names: Sequence[str], stimulus_side: str | None, where: str
) -> list[int]:
    """Sorted union of the rows of several target names (see :func:`asked_region`)."""
    rows: set[int] = set()
    for name in names:
        rows.update(asked_region(atlas, name, stimulus_side, where).rows)
    return sorted(rows)
