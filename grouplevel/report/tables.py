"""Manuscript tables: the result folders' TSV tables, rounded, with units in the headers.

Each table of a finished output folder (``clusters.tsv``, ``regions.tsv``,
``symmetry.tsv``, ``specificity.tsv``, ``consistency.tsv``, ``animals.tsv``) becomes a
:class:`TableView`: chosen columns (the catalogue of :mod:`grouplevel.outputs.columns`),
headers that carry their units, and values rounded by what they are. Two forms:

* **full** (``tables/<result>_<table>.tsv`` and ``.csv``, and the report's "all columns"):
  every column; statistics 2 decimals; p- and q-values 3 decimals, or 3 significant
  digits in scientific notation below 0.001 (a small p never prints as 0.000);
  coordinates 0.01 mm; volumes 0.001 mm³ (one 0.2 mm voxel is 0.008 mm³); variance
  components 3 significant digits; df as an integer when whole; yes/no for booleans.
* **one page** (``.tex`` and ``.md``): the columns of the study file's ``[tables]``
  (defaults in :mod:`grouplevel.intake.settings`), at most ``[tables] max_rows`` rows
  with a note naming the full file; each number column with one number of decimals
  (:func:`column_decimals`) and p below 0.001 as "< 0.001".

In words rather than numbers: a cluster-level FWE p of a peak below the
cluster-forming threshold reads "no cluster at p < 0.001" (no cluster forms there), and
a row that is no atlas region (index -1, e.g. all targets together) has no index.
LaTeX special characters are escaped and the LaTeX compiles with pdflatex without any
package beyond booktabs' three rules.
"""

from __future__ import annotations

import math
import re
import unicodedata
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from grouplevel.outputs.columns import (
    BOOL,
    COORD,
    DF,
    INT,
    MANUSCRIPT_TABLES,
    P_CORRECTED,
    PERCENT,
    STAT,
    TABLES,
    TEXT,
    VARIANCE,
    VOLUME,
    Column,
    P,
)
from grouplevel.outputs.folder import child_path, require_grouplevel_output
from grouplevel.outputs.summary import read_summary, result_names

# Rounding rules (our choice, following the usual reporting of the trade; common practice).
STAT_DECIMALS = 2
P_DECIMALS = 3
P_SCIENTIFIC_BELOW = 0.001
COORD_DECIMALS = 2  # 0.01 mm
VOLUME_DECIMALS = 3  # 0.001 mm³
VARIANCE_DIGITS = 3  # significant digits
# Manuscript form: every number of a column gets the same decimals, enough to give its
# largest value this many significant digits (at least STAT_DECIMALS, at most
# MAX_DECIMALS); p-values below P_SCIENTIFIC_BELOW print as "< 0.001" (APA Publication
# Manual, 7th ed. 2020, §6.36; value from memory).
MANUSCRIPT_DIGITS = 3
MAX_DECIMALS = 6
MISSING = "n/a"
#: atlas indices below 1 mark rows that are no atlas region (e.g. all targets together)
NO_INDEX = ("index", "parent")

#: columns the report shows first, per table (the full table is one click away)
REPORT_COLUMNS: dict[str, tuple[str, ...]] = {
    "clusters": (
        "peak_region",
        "peak_region_hemisphere",
        "voxels",
        "peak_AP_mm",
        "peak_ML_mm",
        "peak_DV_mm",
        "z",
        P_CORRECTED,
    ),
    "regions": ("name", "hemisphere", "effect", "ci_low", "ci_high", "p", "q"),
    "symmetry": ("region", "verdict", "side", "li_effect", "p", "tost_p", "reasons"),
    "specificity": (
        "kind",
        "name",
        "hemisphere",
        "mean_effect",
        "surviving_voxels",
        "activation_share",
    ),
    "consistency": ("animal", "runs", "effect", "ci_low", "ci_high", "positive", "loo_change"),
    "run_quality": ("animal", "session", "run", "flagged", "why", "correlation", "edge_score"),
}

#: ``[clusters] method`` -> the clusters.tsv column holding its p, and that p's header
METHOD_P = {
    "tfce": ("p_fwe_tfce_min", "p FWE (TFCE)"),
    "voxel": ("p_fwe_voxel_min", "p FWE (voxel)"),
    "cluster_extent": ("p_fwe_cluster_extent", "p FWE (cluster extent)"),
    "cluster_mass": ("p_fwe_cluster_mass", "p FWE (cluster mass)"),
    "fdr": ("q_min", "q FDR"),
}
_CLUSTER_P = ("p_fwe_cluster_extent", "p_fwe_cluster_mass")


@dataclass(frozen=True)
class TableContext:
    """What a clusters table needs from summary.json to print its p-values in words."""

    method: str | None = None  # [clusters] method as resolved for this result
    cluster_forming_p: float | None = None
    cluster_forming_z: float | None = None


@dataclass(frozen=True)
class TableView:
    """A table ready to print: headers with units and values as rounded strings."""

    key: str  # clusters, regions, symmetry, specificity, consistency, animals, run_quality
    caption: str
    columns: tuple[Column, ...]
    rows: tuple[tuple[str, ...], ...]
    source: str  # the TSV it came from, relative to the output folder
    total_rows: int = -1  # rows of the source table (when only the first are shown)
    total_columns: int = -1  # columns of the source table

    @property
    def headers(self) -> list[str]:
        return [c.header for c in self.columns]

    def numeric(self) -> list[bool]:
        """Which columns are numbers (right-aligned)."""
        return [c.kind not in (TEXT, BOOL) for c in self.columns]

    def frame(self) -> pd.DataFrame:
        return pd.DataFrame(list(self.rows), columns=self.headers, dtype=object)


def read_tsv(path: Path) -> pd.DataFrame:
    """A result TSV with ``n/a`` as the only missing marker (IDs like "NA" stay text)."""
    return pd.read_csv(path, sep="\t", keep_default_na=False, na_values=[MISSING], dtype=object)


_BOOL_WORDS = {"true", "false"}


def _guess_column(name: str, values: pd.Series) -> Column:
    """Kind of a column the catalogue does not know (a newer writer's extra column)."""
    present = values.dropna().astype(str)
    if len(present) and set(present.str.lower()) <= _BOOL_WORDS:
        return Column(name, name.replace("_", " "), BOOL)
    numbers = pd.to_numeric(values, errors="coerce")
    if values.notna().sum() and numbers.notna().sum() < values.notna().sum():
        return Column(name, name.replace("_", " "), TEXT)
    low = name.lower()
    if low == "p" or low.startswith(("p_", "q")) or low.endswith("_p"):
        kind = P
    elif low.endswith("_mm"):
        kind = COORD
    elif low.endswith("_mm3"):
        kind = VOLUME
    elif low.startswith("var") or "variance" in low:
        kind = VARIANCE
    elif numbers.dropna().apply(lambda v: float(v).is_integer()).all():
        kind = INT
    else:
        kind = STAT
    header = name.replace("_mm3", " (mm³)").replace("_mm", " (mm)").replace("_", " ")
    return Column(name, header, kind)


def format_value(value: object, kind: str) -> str:
    """One value as printed in the full tables and the report (see the module notes)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return MISSING
    if kind == TEXT:
        return str(value)
    if kind == BOOL:
        text = str(value).strip().lower()
        return {"true": "yes", "1": "yes", "false": "no", "0": "no"}.get(text, str(value))
    try:
        x = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return str(value)
    if math.isnan(x):
        return MISSING
    if kind == INT:
        return str(int(round(x)))
    if kind == DF:
        return str(int(x)) if x.is_integer() else f"{x:.1f}"
    if kind == P:
        if 0 < x < P_SCIENTIFIC_BELOW:
            return f"{x:.2e}"
        return f"{x:.{P_DECIMALS}f}"
    if kind == COORD:
        return _no_negative_zero(f"{x:.{COORD_DECIMALS}f}")
    if kind == VOLUME:
        return f"{x:.{VOLUME_DECIMALS}f}"
    if kind == VARIANCE:
        return f"{x:.{VARIANCE_DIGITS}g}"
    if kind == PERCENT:
        return f"{100 * x:.1f}"
    return _no_negative_zero(f"{x:.{STAT_DECIMALS}f}")


def _no_negative_zero(text: str) -> str:
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def column_decimals(values: list[float], kind: str) -> int:
    """Decimals of a number column in the manuscript form (one for the whole column)."""
    finite = [abs(v) for v in values if math.isfinite(v)]
    if kind in (INT,):
        return 0
    if kind == DF:
        return 0 if all(float(v).is_integer() for v in finite) else 1
    if kind == COORD:
        return COORD_DECIMALS
    if kind == VOLUME:
        return VOLUME_DECIMALS
    if kind == P:
        return P_DECIMALS
    largest = max((v for v in finite if v > 0), default=0.0)
    if largest == 0:
        return STAT_DECIMALS
    wanted = MANUSCRIPT_DIGITS - 1 - math.floor(math.log10(largest))
    return int(min(MAX_DECIMALS, max(STAT_DECIMALS, wanted)))


def _manuscript_column(values: list[object], kind: str, p_bound: bool = True) -> list[str]:
    """A column of the manuscript form: same decimals in every row, "< 0.001" for small p
    (``p_bound``; otherwise p-values as in the full form)."""
    if kind in (TEXT, BOOL) or (kind == P and not p_bound):
        return [format_value(v, kind) for v in values]
    numbers = [_number(v) for v in values]
    decimals = column_decimals([x for x in numbers if x is not None], kind)
    out = []
    for v, x in zip(values, numbers, strict=True):
        if x is None:
            out.append(format_value(v, TEXT) if v is not None else MISSING)
        elif kind == P and 0 <= x < P_SCIENTIFIC_BELOW:
            out.append(f"< {P_SCIENTIFIC_BELOW:g}")
        else:
            out.append(_no_negative_zero(f"{x:.{decimals}f}"))
    return out


def _number(value: object) -> float | None:
    try:
        x = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return None
    return None if math.isnan(x) else x


#: Columns left out of a printed table when no row fills them (an atlas without
#: abbreviations).
_SHOWN_WHEN_FILLED = frozenset({"abbreviation", "peak_region_abbreviation"})


def _all_empty(values: pd.Series) -> bool:
    return bool(values.isna().all() or (values.astype(str).str.strip() == "").all())


def _cell(value: object) -> object:
    return None if value is None or (isinstance(value, float) and math.isnan(value)) else value


def _resolved(key: str, frame: pd.DataFrame, context: TableContext) -> pd.DataFrame:
    """The table with derived columns added and cluster p-values put in words.

    - ``p_corrected`` (clusters): the p of the method that decided significance;
    - a cluster-level FWE p of a peak below the cluster-forming threshold belongs to no
      cluster (the statistic forms none there, and the file holds 1): it reads "no
      cluster at p < 0.001";
    - an atlas index below 1 (a row that is no atlas region) is left empty.
    """
    frame = frame.copy()
    for name in NO_INDEX:
        if name in frame:
            idx = pd.to_numeric(frame[name], errors="coerce")
            frame[name] = frame[name].where(~(idx < 1), "")
    if key != "clusters":
        return frame
    z_cf, p_cf = context.cluster_forming_z, context.cluster_forming_p
    if z_cf is not None and p_cf is not None and "z" in frame:
        below = pd.to_numeric(frame["z"], errors="coerce").abs() < z_cf
        for name in _CLUSTER_P:
            if name in frame:
                frame[name] = (
                    frame[name].astype(object).where(~below, f"no cluster at p < {p_cf:g}")
                )
    if context.method in METHOD_P and METHOD_P[context.method][0] in frame:
        frame[P_CORRECTED] = frame[METHOD_P[context.method][0]]
    return frame


def _chosen_columns(
    key: str, frame: pd.DataFrame, names: Sequence[str] | None, context: TableContext
) -> list[Column]:
    """The columns to print: ``names`` (those present), or every column of the file.

    A column the atlas may leave empty (its abbreviations) is left out when no row
    fills it.
    """
    spec = TABLES[key]
    frame = frame[
        [n for n in frame.columns if not (n in _SHOWN_WHEN_FILLED and _all_empty(frame[n]))]
    ]
    if names is None:
        known = [c for c in spec.columns if c.source in frame.columns and c.source != P_CORRECTED]
        seen = {c.source for c in known}
        extra = [
            _guess_column(n, frame[n]) for n in frame.columns if n not in seen and n != P_CORRECTED
        ]
        return known + extra
    out = []
    for name in names:
        if name not in frame.columns:
            continue
        column = spec.column(name) or _guess_column(name, frame[name])
        if name == P_CORRECTED and context.method in METHOD_P:
            column = Column(name, METHOD_P[context.method][1], P)
        out.append(column)
    return out


def table_view(
    key: str,
    frame: pd.DataFrame,
    source: str,
    *,
    columns: Sequence[str] | None = None,
    context: TableContext | None = None,
    manuscript: bool = False,
    max_rows: int | None = None,
    p_bound: bool = True,
) -> TableView:
    """The printed form of one result table.

    Parameters
    ----------
    key, frame, source
        The table's key in :data:`grouplevel.outputs.columns.TABLES`, its content (as
        read by :func:`read_tsv`) and its path relative to the output folder.
    columns
        TSV column names to print, in order (missing ones are left out); None: every
        column of the file, the catalogue's first.
    context
        The result's method and cluster-forming threshold (clusters table).
    manuscript
        Same decimals throughout each number column and "< 0.001" for small p (the
        one-page form); otherwise each value by the rules of :func:`format_value`.
    max_rows
        Print at most this many rows (``total_rows`` keeps the count of the file).
    p_bound
        In the manuscript form, print p below 0.001 as "< 0.001" (else as in the full
        form, e.g. 6.86e-06: the report keeps the exact order of magnitude).
    """
    context = context or TableContext()
    frame = _resolved(key, frame, context)
    chosen = _chosen_columns(key, frame, columns, context)
    shown = frame if max_rows is None else frame.head(max_rows)
    cells = []
    for c in chosen:
        values = [_cell(v) for v in shown[c.source]]
        if manuscript:
            cells.append(_manuscript_column(values, c.kind, p_bound))
        else:
            cells.append([format_value(v, c.kind) for v in values])
    rows = tuple(zip(*cells, strict=True)) if cells else tuple(() for _ in range(len(shown)))
    return TableView(
        key=key,
        caption=TABLES[key].caption,
        columns=tuple(chosen),
        rows=rows,
        source=source,
        total_rows=len(frame),
        total_columns=len([c for c in frame.columns if c != P_CORRECTED]),
    )


def table_context(summary: dict, name: str) -> TableContext:
    """The :class:`TableContext` of one result of a summary.json."""
    result = (summary.get("results") or {}).get(name) or {}
    settings = summary.get("settings") or {}
    inf = settings.get("inference") or {}
    method = (result.get("clusters") or {}).get("method") or (settings.get("clusters") or {}).get(
        "method"
    )
    if method is None:
        method = (
            ("tfce" if inf.get("tfce", True) else "cluster_mass")
            if inf.get("permutations")
            else "fdr"
        )
    perm = (result.get("inference") or {}).get("permutation") or {}
    return TableContext(
        method=method,
        cluster_forming_p=inf.get("cluster_forming_p"),
        cluster_forming_z=perm.get("cluster_forming_z"),
    )


def result_frames(out_dir: Path, name: str) -> dict[str, pd.DataFrame]:
    """Every result table present in one result folder (missing files are skipped)."""
    frames = {}
    for key, spec in TABLES.items():
        path = out_dir / name / spec.file
        if path.is_file():
            frames[key] = read_tsv(path)
    return frames


def result_table_views(
    out_dir: Path, name: str, summary: dict | None = None, *, brief: bool = False
) -> dict[str, TableView]:
    """Every table present in one result folder, as views (missing files are skipped).

    ``brief``: only the columns the report shows first (:data:`REPORT_COLUMNS`), each
    number column with one number of decimals (p-values as in the full form).
    """
    context = table_context(summary or {}, name)
    views = {}
    for key, frame in result_frames(out_dir, name).items():
        columns = REPORT_COLUMNS.get(key) if brief else None
        views[key] = table_view(
            key,
            frame,
            f"{name}/{TABLES[key].file}",
            columns=columns,
            context=context,
            manuscript=brief,
            p_bound=False,
        )
    return views


# --- writers ---------------------------------------------------------------------------

# Symbols of our own headers written as maths (before the per-character escaping).
_LATEX_MATHS = {"τ²": r"$\tau^{2}$", "σ²": r"$\sigma^{2}$", "mm³": r"mm$^{3}$"}
_LATEX_SPECIALS = {
    "\\": r"\textbackslash{}",
    "|": r"\textbar{}",
    "\t": " ",
    "\n": " ",
    "\r": " ",
    "&": r"\&",
    "%": r"\%",
    "$": r"\$",
    "#": r"\#",
    "_": r"\_",
    "{": r"\{",
    "}": r"\}",
    "~": r"\textasciitilde{}",
    "^": r"\textasciicircum{}",
    "<": r"\textless{}",
    ">": r"\textgreater{}",
    "³": r"\textsuperscript{3}",
    "²": r"\textsuperscript{2}",
    "τ": r"$\tau$",
    "σ": r"$\sigma$",
    "−": "--",
    "–": "--",
    "→": r"$\rightarrow$",
    "≤": r"$\leq$",
    "µ": r"$\mu$",
    "±": r"$\pm$",
    "×": r"$\times$",
    "≥": r"$\geq$",
    "≠": r"$\neq$",
    "≈": r"$\approx$",
    "°": r"\textdegree{}",
    "′": r"$'$",
    "α": r"$\alpha$",
    "β": r"$\beta$",
    "γ": r"$\gamma$",
    "δ": r"$\delta$",
    "Δ": r"$\Delta$",
    "θ": r"$\theta$",
    "λ": r"$\lambda$",
    "μ": r"$\mu$",
    "π": r"$\pi$",
    "ρ": r"$\rho$",
    "φ": r"$\varphi$",
    "χ": r"$\chi$",
    "ω": r"$\omega$",
}
# Characters pdflatex prints with its default font encoding and UTF-8 input (measured
# with TeX Live's pdflatex: ASCII, Latin-1 and Latin Extended-A letters except these,
# which need the T1 encoding, and the typographic quotes).
_LATEX_NEEDS_T1 = frozenset("«»ÐÞðþĄąĐđĘęĦħĮįĸĿŀŉŊŋŦŧŲųſ")
_LATEX_PLAIN_EXTRA = frozenset("‘’“”…•†")


def _latex_char(ch: str) -> str:
    if ch in _LATEX_SPECIALS:
        return _LATEX_SPECIALS[ch]
    code = ord(ch)
    if 32 <= code < 127 or ch in _LATEX_PLAIN_EXTRA:
        return ch
    if 0xA1 <= code < 0x180 and ch not in _LATEX_NEEDS_T1 and ch != "\xad":
        return ch
    # anything else: its plain-letter form when it has one (e.g. Ą -> A), else "?"
    # (a table must compile; the TSV keeps the exact text)
    plain = unicodedata.normalize("NFKD", ch).encode("ascii", "ignore").decode()
    return "".join(_LATEX_SPECIALS.get(c, c) for c in plain if 32 <= ord(c) < 127) or "?"


def latex_escape(text: str) -> str:
    """Escape LaTeX's special characters (and non-ASCII symbols) in plain text.

    The result compiles with pdflatex in a document with no package beyond those a
    table needs (booktabs): every character is either printable as it is, a LaTeX
    command or maths, or replaced by its plain-letter form.
    """
    text = str(text)
    parts = []
    for piece in re.split("(" + "|".join(map(re.escape, _LATEX_MATHS)) + ")", text):
        if piece in _LATEX_MATHS:
            parts.append(_LATEX_MATHS[piece])
        else:
            parts.append("".join(_latex_char(ch) for ch in piece))
    return "".join(parts)


def _latex_cell(text: str) -> str:
    """Scientific p-values as 1.23 \\times 10^{-5}; everything else escaped."""
    mantissa, e, exponent = text.partition("e")
    if e and exponent:
        try:
            float(mantissa)
            power = int(exponent)
        except ValueError:
            return latex_escape(text)
        return f"${mantissa} \\times 10^{{{power}}}$"
    return latex_escape(text)


#: A text column whose longest entry is longer than this wraps in a fixed-width column.
LATEX_WRAP_CHARS = 18
LATEX_WRAP_CM = 2.8  # widest a wrapping column gets


#: A header longer than this is set on two lines (at its unit, else at a middle space).
LATEX_HEADER_CHARS = 8


def _latex_header(text: str) -> str:
    """A header on two lines when it is long: its unit or qualifier in parentheses on
    the second line, else split at the space nearest its middle."""
    head, sep, tail = text.partition(" (")
    if sep:
        tail = "(" + tail
    elif len(text) > LATEX_HEADER_CHARS and " " in text:
        spaces = [i for i, ch in enumerate(text) if ch == " "]
        cut = min(spaces, key=lambda i: abs(i - len(text) / 2))
        head, tail = text[:cut], text[cut + 1 :]
    else:
        return latex_escape(text)
    return (
        "\\begin{tabular}[b]{@{}c@{}}"
        + latex_escape(head)
        + "\\\\"
        + latex_escape(tail)
        + "\\end{tabular}"
    )


#: Text width of the standard article class at 10 pt (345 pt, about 12.1 cm; the same
#: on A4 and letter paper), with a little room to spare.
LATEX_TEXT_WIDTH_CM = 11.8
#: Rough width of one character in the table's type (\\footnotesize, 8 pt: digits are
#: half an em, 4 pt ≈ 0.14 cm) and the gap around a column (2 × 3 pt ≈ 0.21 cm).
LATEX_CHAR_CM = 0.15
LATEX_GAP_CM = 0.21
LATEX_MIN_WRAP_CM = 1.8


def _header_chars(header: str) -> int:
    """Characters of the widest line of a header as :func:`_latex_header` sets it."""
    head, sep, tail = header.partition(" (")
    if sep:
        return max(len(head), len(tail) + 1)
    if len(header) > LATEX_HEADER_CHARS and " " in header:
        spaces = [i for i, ch in enumerate(header) if ch == " "]
        cut = min(spaces, key=lambda i: abs(i - len(header) / 2))
        return max(cut, len(header) - cut - 1)
    return len(header)


def _latex_align(view: TableView) -> str:
    """Column types: numbers right-aligned; long text in wrapping columns whose width
    shares out what the other columns leave of the text width."""
    kinds, fixed_cm = [], 0.0
    for i, (column, numeric) in enumerate(zip(view.columns, view.numeric(), strict=True)):
        longest = max((len(row[i]) for row in view.rows), default=0)
        wraps = not numeric and column.kind == TEXT and longest > LATEX_WRAP_CHARS
        kinds.append("p" if wraps else "r" if numeric else "l")
        if not wraps:
            chars = max(longest, _header_chars(column.header))
            fixed_cm += chars * LATEX_CHAR_CM + LATEX_GAP_CM
    n_wrap = kinds.count("p")
    if n_wrap:
        share = (LATEX_TEXT_WIDTH_CM - fixed_cm) / n_wrap - LATEX_GAP_CM
        width = min(LATEX_WRAP_CM, max(LATEX_MIN_WRAP_CM, share))
        return "".join(f"p{{{width:.2f}cm}}" if k == "p" else k for k in kinds)
    return "".join(kinds)


def table_note(view: TableView, full_file: str) -> str:
    """The note under a one-page table: rows left out and where the full table is."""
    parts = []
    if 0 <= len(view.rows) < view.total_rows:
        parts.append(f"The first {len(view.rows)} of {view.total_rows} rows.")
    if 0 <= len(view.columns) < view.total_columns or parts:
        parts.append(f"All rows and columns: {full_file}.")
    if any(c.kind == P for c in view.columns):
        parts.append("p-values below 0.001 are given as < 0.001.")
    return " ".join(parts)


#: A word longer than this in a wrapping column may break between any two characters
#: (a name without spaces would otherwise run over the column and the page).
LATEX_LONG_WORD = 16


def _latex_wrapping_cell(text: str) -> str:
    """A cell of a wrapping column: long words may break anywhere (``\\allowbreak``)."""
    words = []
    for word in text.split(" "):
        if len(word) > LATEX_LONG_WORD:
            words.append("\\allowbreak{}".join(latex_escape(ch) for ch in word))
        else:
            words.append(_latex_cell(word))
    return " ".join(words)


def to_latex(view: TableView, note: str = "") -> str:
    """A one-page table float with booktabs rules (``\\toprule``, ``\\midrule``, ...).

    Small type, narrow column gaps, headers with units on a second line, long text in
    wrapping columns; ``note`` goes under the table.
    """
    lines = [
        "% needs \\usepackage{booktabs}",
        "\\begin{table}[htbp]",
        "\\centering",
        "\\footnotesize",
        "\\setlength{\\tabcolsep}{3pt}",
        f"\\caption{{{latex_escape(view.caption)}}}",
        f"\\begin{{tabular}}{{{_latex_align(view)}}}",
        "\\toprule",
        " & ".join(_latex_header(h) for h in view.headers) + r" \\",
        "\\midrule",
    ]
    align = _latex_align(view)
    wrapping = [a.startswith("p") for a in re.findall(r"p\{[^}]*\}|[lrc]", align)]
    for row in view.rows:
        cells = (
            _latex_wrapping_cell(v) if wrap else _latex_cell(v)
            for v, wrap in zip(row, wrapping, strict=True)
        )
        lines.append(" & ".join(cells) + r" \\")
    lines += ["\\bottomrule", "\\end{tabular}"]
    if note:
        lines.append(f"\\par\\smallskip{{\\scriptsize {latex_escape(note)}}}")
    lines += ["\\end{table}", ""]
    return "\n".join(lines)


def _md_cell(text: str) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def to_markdown(view: TableView) -> str:
    """A pipe table (GitHub / pandoc flavour)."""
    rule = ["---:" if n else ":---" for n in view.numeric()]
    lines = ["| " + " | ".join(_md_cell(h) for h in view.headers) + " |"]
    lines.append("| " + " | ".join(rule) + " |")
    lines += ["| " + " | ".join(_md_cell(v) for v in row) + " |" for row in view.rows]
    return "\n".join(lines) + "\n"


# A cell starting with one of these is read as a formula by spreadsheet programs; the
# CSV tables (made for spreadsheets) prefix such text cells with a single quote (common
# practice; the OWASP guidance on CSV injection).
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")


def formula_safe(text: str) -> str:
    """A CSV cell that no spreadsheet runs as a formula; numbers stay numbers."""
    text = str(text)
    if text.startswith(FORMULA_STARTS) and not _NUMBER.fullmatch(text):
        return "'" + text
    return text


def _csv_frame(frame: pd.DataFrame) -> pd.DataFrame:
    safe = frame.map(formula_safe)
    safe.columns = [formula_safe(c) for c in frame.columns]
    return safe


def write_full(view: TableView, stem: Path) -> list[Path]:
    """``stem``.tsv and .csv: every column and row (the full form).

    In the CSV, text that a spreadsheet would run as a formula is prefixed with a single
    quote (see :func:`formula_safe`).
    """
    frame = view.frame()
    tsv, csv = stem.with_name(stem.name + ".tsv"), stem.with_name(stem.name + ".csv")
    frame.to_csv(tsv, sep="\t", index=False)
    _csv_frame(frame).to_csv(csv, index=False)
    return [tsv, csv]


def write_one_page(view: TableView, stem: Path, note: str) -> list[Path]:
    """``stem``.tex and .md: the chosen columns and rows (the one-page form)."""
    tex, md = stem.with_name(stem.name + ".tex"), stem.with_name(stem.name + ".md")
    tex.write_text(to_latex(view, note), encoding="utf-8")
    text = to_markdown(view) + (f"\n{note}\n" if note else "")
    md.write_text(text, encoding="utf-8")
    return [tex, md]


def manuscript_settings(summary: dict) -> tuple[dict[str, tuple[str, ...]], int]:
    """The ``[tables]`` columns and row limit saved in summary.json (defaults if absent)."""
    from grouplevel.intake.settings import DEFAULT_MANUSCRIPT_COLUMNS, DEFAULT_MANUSCRIPT_MAX_ROWS

    saved = ((summary.get("settings") or {}).get("tables")) or {}
    columns = dict(DEFAULT_MANUSCRIPT_COLUMNS)
    for key, names in (saved.get("columns") or {}).items():
        if key in columns and isinstance(names, list) and names:
            columns[key] = tuple(str(n) for n in names)
    max_rows = saved.get("max_rows")
    return columns, int(max_rows) if isinstance(max_rows, int) else DEFAULT_MANUSCRIPT_MAX_ROWS


def write_manuscript_tables(out_dir: Path) -> list[Path]:
    """Write every manuscript table of a finished output folder into ``out_dir/tables/``.

    One file set per result folder and table, e.g. ``tables/sound_clusters.tex``: the
    clusters, regions, symmetry, specificity and per-animal tables (``consistency.tsv``
    and ``animals.tsv``) that exist, each as a full TSV and CSV (every column and row,
    rounded) and as a one-page LaTeX and Markdown table (the ``[tables]`` columns, at
    most ``[tables] max_rows`` rows, a note naming the full file).

    Parameters
    ----------
    out_dir
        A finished output folder (with ``summary.json``).

    Returns
    -------
    list of Path
        The files written (empty when no result folder holds a table).
    """
    out_dir = Path(out_dir)
    require_grouplevel_output(out_dir)  # result names checked: tables stay in tables/
    summary = read_summary(out_dir)
    chosen, max_rows = manuscript_settings(summary)
    written: list[Path] = []
    target = out_dir / "tables"
    for name in result_names(summary):
        frames = result_frames(out_dir, name)
        context = table_context(summary, name)
        for key in MANUSCRIPT_TABLES:
            if key not in frames:
                continue
            target.mkdir(exist_ok=True)
            stem = child_path(target, f"{name}_{key}")
            source = f"{name}/{TABLES[key].file}"
            full = table_view(key, frames[key], source, context=context)
            written += write_full(full, stem)
            page = table_view(
                key,
                frames[key],
                source,
                columns=chosen[key],
                context=context,
                manuscript=True,
                max_rows=max_rows,
            )
            written += write_one_page(page, stem, table_note(page, f"{stem.name}.tsv"))
    return written
