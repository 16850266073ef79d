"""Control characters in text that ends up in tables: find them and name them.

A tab, newline or other control character inside an animal name, a contrast name, a
covariate value or an atlas label breaks the rows of every tab-separated table written
from it, so intake refuses such text with a message that names the character.
"""

from __future__ import annotations

import unicodedata

# Names of the control characters users meet in practice (common practice: the ASCII
# names); any other is named by its code point.
_CHARACTER_NAMES = {
    "\t": "a tab",
    "\n": "a line break",
    "\r": "a carriage return",
    "\x00": "a NUL byte",
    "\x0b": "a vertical tab",
    "\x0c": "a form feed",
    "\x85": "a next-line character",
    "\u2028": "a line separator",
    "\u2029": "a paragraph separator",
}


def control_characters(text: str) -> list[str]:
    """Describe each distinct control or line-separating character in ``text``.

    Unicode categories ``Cc`` (control), ``Zl`` (line separator) and ``Zp`` (paragraph
    separator) count; ordinary spaces do not. Returns an empty list for clean text.
    """
    found: list[str] = []
    for ch in dict.fromkeys(text):
        if unicodedata.category(ch) in ("Cc", "Zl", "Zp"):
            found.append(_CHARACTER_NAMES.get(ch, f"the control character U+{ord(ch):04X}"))
    return found
