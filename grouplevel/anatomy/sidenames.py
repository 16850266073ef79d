"""The hemisphere written into a region name: ``Left X``, ``X (L)``, ``X_R``, ``lh.X``...

Published label tables and lab tables often carry the side in the name rather than in a
column of its own. :func:`split_hemisphere` reads the usual spellings (common practice)
and returns the name without the side and the side as ``"left"`` or ``"right"``. The
atlas table reader (:mod:`grouplevel.anatomy.labels`) uses it on the table's names, and
the questions (:mod:`grouplevel.questions.sides`) on the names a study file gives, so a
region can be named as the atlas table wrote it.

Pure: text in, text out.
"""

from __future__ import annotations

import re

#: Hemisphere words a table may use, and the word the atlas builder reads.
HEMISPHERE_SPELLINGS = {
    "l": "left",
    "lh": "left",
    "left": "left",
    "left hemisphere": "left",
    "r": "right",
    "rh": "right",
    "right": "right",
    "right hemisphere": "right",
    "b": "both",
    "both": "both",
    "bilateral": "both",
}

# Hemisphere written in a name (common practice in published label tables). Each pattern
# has a group "base" (the name without the side) and a group "side".
_SIDE = r"(?P<side>left|right|lh|rh|l|r)"
# Only spaces separate a side word (a tab or line break in a name is an error that the
# table checks report, so it must not be eaten here).
_NAME_SIDE_PATTERNS = (
    re.compile(r"^(?P<side>left|right)[ _\-]+(?P<base>\S.*)$", re.IGNORECASE),
    re.compile(r"^(?P<side>lh|rh)[ _.\-]+(?P<base>\S.*)$", re.IGNORECASE),
    re.compile(rf"^(?P<base>.*\S) *\( *{_SIDE}(?: +hemisphere)? *\)$", re.IGNORECASE),
    re.compile(rf"^(?P<base>.*[^ _])_{_SIDE}$", re.IGNORECASE),
    re.compile(r"^(?P<base>.*[^ ,])[ ,]+(?P<side>left|right)(?: +hemisphere)?$", re.IGNORECASE),
)


def split_hemisphere(name: str) -> tuple[str, str]:
    """``"Left auditory cortex"`` → ``("auditory cortex", "left")``; no side → ``(name, "")``.

    Spellings read: a leading ``Left``/``Right`` or ``lh``/``rh`` (with a space, ``_``,
    ``-`` or ``.``), a trailing ``(L)``/``(R)``/``(left)``/``(lh)``..., ``_L``/``_R``/
    ``_left``..., or a trailing word ``left``/``right``; case does not matter. A name
    that would be empty without the side is kept as it is.
    """
    text = str(name).strip()
    for pattern in _NAME_SIDE_PATTERNS:
        match = pattern.match(text)
        if match:
            base = match["base"].strip()
            if base:
                return base, HEMISPHERE_SPELLINGS[match["side"].casefold()]
    return text, ""
