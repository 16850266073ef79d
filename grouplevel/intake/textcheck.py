"""Text tables that users write: read them strictly, and find control characters.

A tab, newline or other control character inside an animal name, a contrast name, a
covariate value or an atlas label breaks the rows of every tab-separated table written
from it, so intake refuses such text with a message that names the character. The
tables themselves (the runs table, the atlas label table) are read so that nothing is
merged or renamed silently: a quote left open, which makes a CSV reader join lines into
one row (RFC 4180, section 2), and a column name given twice, which pandas would rename,
are refused with the line named.
"""

from __future__ import annotations

import io
import unicodedata
from pathlib import Path

import pandas as pd

from grouplevel.errors import UserError

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

#: Column separators recognised when a table reads as a single column, with their names.
_SEPARATOR_NAMES = {
    ";": "semicolon(s) (;)",
    ",": "comma(s) (,)",
    "\t": "tab(s)",
    "|": "vertical bar(s) (|)",
}
_OTHER_SEPARATORS = tuple(_SEPARATOR_NAMES)


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


def read_text_table(path: Path, what: str, columns_hint: str) -> pd.DataFrame:
    """Read a TSV (or, by extension, CSV) table as text, with a ``line`` column.

    ``line`` is the physical line of each row in the file (the header is line 1; blank
    lines count). A UTF-8 byte-order mark and Windows line endings are accepted. Values
    are returned as written (not stripped).

    Parameters
    ----------
    path
        The table file (it must exist).
    what, columns_hint
        How messages name the table (``"runs table"``) and its first columns.

    Raises
    ------
    UserError
        When the file is not UTF-8, empty, cannot be parsed, separated by another
        character (a header line without the expected separator but with a semicolon,
        comma, tab or vertical bar; the message names it), repeats a column name, or has
        rows merged by an unbalanced quote.
    """
    sep = "," if path.suffix.lower() == ".csv" else "\t"
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise UserError(
            f"{path}: the {what} is not UTF-8 text (byte {exc.start}); save it as UTF-8"
        ) from None
    if not text.strip():
        raise UserError(
            f"{path}: the {what} is empty; write a header line ({columns_hint}) and one "
            "line per row"
        )
    wrong = separator_problem(path, what, text, sep)
    if wrong:
        raise UserError(wrong)
    try:
        raw = pd.read_csv(io.StringIO(text), sep=sep, dtype=str, keep_default_na=False, header=None)
    except Exception as exc:  # pandas raises several types for malformed text
        raise UserError(f"{path}: cannot read the {what}: {exc}{_quote_hint(text)}") from None
    header = [str(c).strip() for c in raw.iloc[0]]
    _check_header(path, header)
    lines = _row_lines(path, text, sep, len(raw))
    table = raw.iloc[1:].reset_index(drop=True)
    table.columns = header
    table.insert(0, "line", lines)
    return table


def separator_problem(
    path: Path, what: str, text: str, sep: str, *, renamable: bool = True
) -> str | None:
    """The message for a table whose header line would read as one column although it
    holds another separator (a semicolon, as spreadsheets write in locales with a
    decimal comma); None when the header holds ``sep`` or no other separator.

    Parameters
    ----------
    path, what
        The file and how messages name it (``"runs table"``).
    text
        The file's text.
    sep
        The separator the file is read with.
    renamable
        Whether renaming the file (``.csv`` ↔ ``.tsv``) is a fix to suggest; not for files
        whose name a standard fixes (a BIDS ``participants.tsv``).
    """
    header_line = next((s for s in _physical_lines(text) if s.strip()), "")
    if sep in header_line:
        return None
    counts = {d: header_line.count(d) for d in _OTHER_SEPARATORS if d != sep}
    found = max(counts, key=lambda d: counts[d])
    if not counts[found]:
        return None
    expected = "commas (,)" if sep == "," else "tabs"
    if found == "," and sep == "\t" and renamable:
        fix = "name the file .csv, or save it with tabs between the columns"
    elif found == "\t" and sep == "," and renamable:
        fix = "name the file .tsv, or save it with commas between the columns"
    elif sep == ",":
        fix = (
            "save it with commas between the columns (a spreadsheet set to a decimal comma "
            "writes semicolons: export tab-separated text instead and name it .tsv)"
        )
    else:
        fix = "save it with tabs between the columns (in a spreadsheet: tab-separated text)"
    return (
        f"{path}: the {what} reads as a single column, but its header line holds "
        f"{counts[found]} {_SEPARATOR_NAMES[found]}: grouplevel reads {expected} between "
        f"the columns of a {path.suffix or 'table'} file; {fix}"
    )


def _check_header(path: Path, header: list[str]) -> None:
    repeated = sorted({c for c in header if header.count(c) > 1})
    if repeated:
        raise UserError(
            f"{path} line 1: column name(s) {', '.join(map(repr, repeated))} appear more "
            "than once in the header; give every column its own name"
        )
    if "line" in header:
        raise UserError(
            f"{path} line 1: 'line' is a column name grouplevel uses for the table's line "
            "numbers; rename that column"
        )
    for col in header:
        bad = control_characters(col)
        if bad:
            raise UserError(f"{path} line 1: column name {col!r} holds {', '.join(bad)}; remove it")


def _physical_lines(text: str) -> list[str]:
    return text.replace("\r\n", "\n").replace("\r", "\n").split("\n")


def _row_lines(path: Path, text: str, sep: str, n_rows: int) -> list[int]:
    """Physical line numbers of the rows (header excluded); refuse rows merged by quotes."""
    # the parser skips a line that is empty or holds only spaces (no separator)
    filled = [i + 1 for i, s in enumerate(_physical_lines(text)) if s.strip() or sep in s]
    if len(filled) != n_rows:
        raise UserError(
            f"{path}: {len(filled) - 1} line(s) hold rows but {n_rows - 1} row(s) were "
            f"read{_quote_hint(text)}; a quoted value must open and close on one line"
        )
    return filled[1:]


def _quote_hint(text: str) -> str:
    """Name the lines with an odd number of double quotes (a quote left open)."""
    odd = [str(i + 1) for i, s in enumerate(_physical_lines(text)) if s.count('"') % 2]
    if not odd:
        return ""
    return (
        f'; line(s) {", ".join(odd)} hold an unbalanced double quote ("), which makes the '
        "reader join the following lines into one row: remove the quote or close it"
    )
