"""Manuscript tables: the result folders' TSV tables, rounded, with units in the headers.

Each table of a finished output folder (``clusters.tsv``, ``regions.tsv``,
``symmetry.tsv``, ``specificity.tsv``, ``consistency.tsv``, ``animals.tsv``) becomes a
:class:`TableView`: chosen columns, headers that carry their units, and every value
rounded by what it is:

* statistics (effect, z, t, laterality indices ...): 2 decimals;
* p- and q-values: 3 decimals, or scientific notation with 3 significant digits below
  0.001 (so a small p never prints as 0.000);
* coordinates: 0.01 mm; volumes: 0.001 mm³ (one 0.2 mm voxel is 0.008 mm³);
* variance components (τ², σ²): 3 significant digits (they are often far below 0.01).

A view is written in four forms for a manuscript: TSV, CSV, LaTeX (booktabs rules,
LaTeX special characters escaped) and Markdown (a pipe table). The same views feed the
HTML report, so the report and the files always agree.
"""

from __future__ import annotations

import math
import re
import unicodedata
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from grouplevel.outputs.folder import child_path, require_grouplevel_output
from grouplevel.outputs.summary import read_summary, result_names

# Rounding rules (our choice, following the usual reporting of the trade; common practice).
STAT_DECIMALS = 2
P_DECIMALS = 3
P_SCIENTIFIC_BELOW = 0.001
COORD_DECIMALS = 2  # 0.01 mm
VOLUME_DECIMALS = 3  # 0.001 mm³
VARIANCE_DIGITS = 3  # significant digits
MISSING = "n/a"

# kinds of column: how a value is printed
TEXT, INT, STAT, P, COORD, VOLUME, VARIANCE, PERCENT, BOOL = (
    "text",
    "int",
    "stat",
    "p",
    "coord",
    "volume",
    "variance",
    "percent",
    "bool",
)


@dataclass(frozen=True)
class Column:
    """One column of a manuscript table: source column, printed header, kind."""

    source: str
    header: str
    kind: str


@dataclass(frozen=True)
class TableView:
    """A table ready to print: headers with units and values as rounded strings."""

    key: str  # clusters, regions, symmetry, specificity, consistency, animals, run_quality
    caption: str
    columns: tuple[Column, ...]
    rows: tuple[tuple[str, ...], ...]
    source: str  # the TSV it came from, relative to the output folder

    @property
    def headers(self) -> list[str]:
        return [c.header for c in self.columns]

    def numeric(self) -> list[bool]:
        """Which columns are numbers (right-aligned)."""
        return [c.kind not in (TEXT, BOOL) for c in self.columns]

    def frame(self) -> pd.DataFrame:
        return pd.DataFrame(list(self.rows), columns=self.headers, dtype=object)


def _c(source: str, header: str, kind: str) -> Column:
    return Column(source, header, kind)


# Column choices per table; a column missing from a file is left out of the view.
_CLUSTER_COLUMNS = (
    _c("cluster", "cluster", INT),
    _c("peak", "peak", INT),
    _c("sign", "sign", INT),
    _c("voxels", "voxels", INT),
    _c("volume_mm3", "volume (mm³)", VOLUME),
    _c("peak_AP_mm", "AP (mm)", COORD),
    _c("peak_ML_mm", "ML (mm)", COORD),
    _c("peak_DV_mm", "DV (mm)", COORD),
    _c("z", "z", STAT),
    _c("t", "t", STAT),
    _c("effect", "effect (map units)", STAT),
    _c("p_fwe_cluster_extent", "p FWE (extent)", P),
    _c("p_fwe_cluster_mass", "p FWE (mass)", P),
    _c("p_fwe_tfce_min", "p FWE (TFCE, min)", P),
    _c("p_fwe_voxel_min", "p FWE (voxel, min)", P),
    _c("q_min", "q FDR (min)", P),
    _c("peak_region", "peak region", TEXT),
    _c("peak_region_abbreviation", "abbr.", TEXT),
    _c("peak_region_hemisphere", "hemisphere", TEXT),
    _c("regions", "regions (% of cluster, % of region)", TEXT),
)
_REGION_COLUMNS = (
    _c("name", "region", TEXT),
    _c("abbreviation", "abbr.", TEXT),
    _c("hemisphere", "hemisphere", TEXT),
    _c("volume_mm3", "volume (mm³)", VOLUME),
    _c("effect", "effect (map units)", STAT),
    _c("se", "SE (map units)", STAT),
    _c("ci_low", "95% CI low", STAT),
    _c("ci_high", "95% CI high", STAT),
    _c("t", "t", STAT),
    _c("df", "df", STAT),
    _c("p", "p", P),
    _c("q", "q FDR", P),
    _c("var_animal", "τ² (map units²)", VARIANCE),
    _c("var_run", "σ² (map units²)", VARIANCE),
    _c("animals", "animals", INT),
    _c("runs", "runs", INT),
)
_SYMMETRY_COLUMNS = (
    _c("region", "region", TEXT),
    _c("li_extent", "LI extent", STAT),
    _c("li_extent_low", "LI extent low", STAT),
    _c("li_extent_high", "LI extent high", STAT),
    _c("li_effect", "LI effect", STAT),
    _c("li_effect_low", "LI effect low", STAT),
    _c("li_effect_high", "LI effect high", STAT),
    _c("li_threshold_free", "LI threshold-free", STAT),
    _c("left_effect", "left effect (map units)", STAT),
    _c("right_effect", "right effect (map units)", STAT),
    _c("difference", "L−R (map units)", STAT),
    _c("se", "SE (map units)", STAT),
    _c("ci_low", "95% CI low", STAT),
    _c("ci_high", "95% CI high", STAT),
    _c("df", "df", STAT),
    _c("p", "p", P),
    _c("margin", "margin (map units)", STAT),
    _c("tost_p", "p TOST", P),
    _c("verdict", "verdict", TEXT),
    _c("side", "side", TEXT),
    _c("reasons", "reasons", TEXT),
)
_CONSISTENCY_COLUMNS = (
    _c("animal", "animal", TEXT),
    _c("effect", "effect (map units)", STAT),
    _c("se", "SE (map units)", STAT),
    _c("ci_low", "95% CI low", STAT),
    _c("ci_high", "95% CI high", STAT),
    _c("positive", "positive", BOOL),
    _c("loo_effect", "group effect without animal", STAT),
    _c("loo_change", "change without animal", STAT),
)
_ANIMAL_COLUMNS = (
    _c("animal", "animal", TEXT),
    _c("name", "region", TEXT),
    _c("hemisphere", "hemisphere", TEXT),
    _c("effect", "effect (map units)", STAT),
    _c("se", "SE (map units)", STAT),
    _c("runs", "runs", INT),
)
_RUN_QUALITY_COLUMNS = (
    _c("animal", "animal", TEXT),
    _c("session", "session", TEXT),
    _c("run", "run", TEXT),
    _c("correlation", "correlation with group", STAT),
    _c("mean_variance", "mean variance (map units²)", VARIANCE),
    _c("z_correlation", "z (correlation)", STAT),
    _c("z_variance", "z (variance)", STAT),
    _c("edge_score", "edge score", STAT),
    _c("flagged", "flagged", BOOL),
    _c("why", "why", TEXT),
)

#: Columns left out of a printed table when no row fills them (an atlas without
#: abbreviations).
_SHOWN_WHEN_FILLED = frozenset({"abbreviation", "peak_region_abbreviation"})

#: table key -> (file name in a result folder, caption, column choices)
TABLE_SPECS: dict[str, tuple[str, str, tuple[Column, ...]]] = {
    "clusters": (
        "clusters.tsv",
        "Significant clusters: peaks and sub-peaks, origin-relative coordinates",
        _CLUSTER_COLUMNS,
    ),
    "regions": (
        "regions.tsv",
        "Region effects (REML on run-wise region averages)",
        _REGION_COLUMNS,
    ),
    "symmetry": ("symmetry.tsv", "Hemispheric symmetry and laterality", _SYMMETRY_COLUMNS),
    "specificity": ("specificity.tsv", "Specificity of the response", ()),
    "consistency": ("consistency.tsv", "Per-animal effect and leave-one-out", _CONSISTENCY_COLUMNS),
    "animals": ("animals.tsv", "Per-animal region effects", _ANIMAL_COLUMNS),
    "run_quality": ("run_quality.tsv", "Run quality", _RUN_QUALITY_COLUMNS),
}

#: tables written to DIR/tables/ for a manuscript
MANUSCRIPT_TABLES = ("clusters", "regions", "symmetry", "specificity", "consistency", "animals")


def read_tsv(path: Path) -> pd.DataFrame:
    """A result TSV with ``n/a`` as the only missing marker (IDs like "NA" stay text)."""
    return pd.read_csv(path, sep="\t", keep_default_na=False, na_values=[MISSING], dtype=object)


def _guess_column(name: str, values: pd.Series) -> Column:
    """Kind of a column not in the fixed choices (e.g. of specificity.tsv)."""
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
    """One value as printed in every manuscript table (see the module notes)."""
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


def table_view(key: str, frame: pd.DataFrame, source: str) -> TableView:
    """The printed form of one result table (chosen columns, rounded values)."""
    _file, caption, choices = TABLE_SPECS[key]
    columns = [
        c
        for c in choices
        if c.source in frame.columns
        and not (c.source in _SHOWN_WHEN_FILLED and _all_empty(frame[c.source]))
    ]
    chosen = {c.source for c in columns}
    if not choices:  # no fixed choice: keep every column, kinds guessed from the values
        columns = [_guess_column(name, frame[name]) for name in frame.columns]
    elif key in ("symmetry", "consistency", "run_quality"):
        # tables still growing: show extra columns too, after the known ones
        columns += [_guess_column(n, frame[n]) for n in frame.columns if n not in chosen]
    rows = tuple(
        tuple(format_value(_cell(row[c.source]), c.kind) for c in columns)
        for _, row in frame.iterrows()
    )
    return TableView(key=key, caption=caption, columns=tuple(columns), rows=rows, source=source)


def _all_empty(values: pd.Series) -> bool:
    return bool(values.isna().all() or (values.astype(str).str.strip() == "").all())


def _cell(value: object) -> object:
    return None if value is None or (isinstance(value, float) and math.isnan(value)) else value


def result_table_views(out_dir: Path, name: str) -> dict[str, TableView]:
    """Every table present in one result folder, as views (missing files are skipped)."""
    views = {}
    for key, (file, _caption, _cols) in TABLE_SPECS.items():
        path = out_dir / name / file
        if path.is_file():
            views[key] = table_view(key, read_tsv(path), f"{name}/{file}")
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


def to_latex(view: TableView) -> str:
    """A booktabs table (``\\toprule``, ``\\midrule``, ``\\bottomrule``)."""
    align = "".join("r" if n else "l" for n in view.numeric())
    lines = [
        "% needs \\usepackage{booktabs}",
        "\\begin{table}",
        "\\centering",
        f"\\caption{{{latex_escape(view.caption)}}}",
        f"\\begin{{tabular}}{{{align}}}",
        "\\toprule",
        " & ".join(latex_escape(h) for h in view.headers) + r" \\",
        "\\midrule",
    ]
    for row in view.rows:
        lines.append(" & ".join(_latex_cell(v) for v in row) + r" \\")
    lines += ["\\bottomrule", "\\end{tabular}", "\\end{table}", ""]
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


def write_view(view: TableView, stem: Path) -> list[Path]:
    """``stem``.tsv / .csv / .tex / .md; returns the four paths.

    The TSV keeps every value exactly; in the CSV, text that a spreadsheet would run as
    a formula is prefixed with a single quote (see :func:`formula_safe`).
    """
    frame = view.frame()
    paths = []
    for suffix, writer in (
        (".tsv", lambda p: frame.to_csv(p, sep="\t", index=False)),
        (".csv", lambda p: _csv_frame(frame).to_csv(p, index=False)),
        (".tex", lambda p: p.write_text(to_latex(view), encoding="utf-8")),
        (".md", lambda p: p.write_text(to_markdown(view), encoding="utf-8")),
    ):
        path = stem.with_name(stem.name + suffix)
        writer(path)
        paths.append(path)
    return paths


def write_manuscript_tables(out_dir: Path) -> list[Path]:
    """Write every manuscript table of a finished output folder into ``out_dir/tables/``.

    One file set per result folder and table, e.g. ``tables/sound_clusters.tex``: the
    clusters, regions, symmetry, specificity and per-animal tables (``consistency.tsv``
    and ``animals.tsv``) that exist, each as TSV, CSV, LaTeX (booktabs) and Markdown.

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
    written: list[Path] = []
    target = out_dir / "tables"
    for name in result_names(summary):
        views = result_table_views(out_dir, name)
        for key in MANUSCRIPT_TABLES:
            if key not in views:
                continue
            target.mkdir(exist_ok=True)
            written += write_view(views[key], child_path(target, f"{name}_{key}"))
    return written
