"""The report's figures as files for a manuscript: ``OUT/figures/``.

Each figure of the report is written three times, under the name
``<result>_<figure>``:

* ``.pdf`` — vector (text, lines and axes stay sharp; map slices are embedded images
  at the PNG's resolution);
* ``.png`` — :data:`PNG_DPI` dots per inch (the resolution most journals ask of
  figures, common practice), with the resolution stored in the file;
* ``.txt`` — the caption, word for word as the report prints it under the figure.

The report embeds these very PNG files, so the figure in the report and the file on
disk are the same image. Files are written atomically; files of an earlier rendering
that are no longer drawn are removed (``figures/`` holds only what grouplevel writes
there).
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.backends.backend_pdf import FigureCanvasPdf
from matplotlib.figure import Figure

from grouplevel.errors import UserError
from grouplevel.outputs.files import atomic_write
from grouplevel.outputs.names import NAME_RULE, name_problem

FIGURES_FOLDER = "figures"
PNG_DPI = 300  # common practice: journals ask for 300 dpi at print size
SUFFIXES = (".png", ".pdf", ".txt")
# the space left around the drawn content when figures are cut to it (inches)
PAD_INCHES = 0.06


@dataclass(frozen=True)
class DrawnFigure:
    """One figure of the report before it is written: what it shows and its words."""

    result: str  # result folder name
    key: str  # figure kind, e.g. "montage"
    title: str
    alt: str
    caption: str
    figure: Figure

    @property
    def stem(self) -> str:
        """The file name without suffix: ``<result>_<key>``."""
        return f"{self.result}_{self.key}"

    @property
    def caption_text(self) -> str:
        """The caption as the report prints it: title, then the caption."""
        return f"{self.title}. {self.caption}"


def figure_bytes(figure: Figure, kind: str, dpi: int = PNG_DPI) -> bytes:
    """The figure as PNG (at ``dpi``) or PDF bytes, cut to its content.

    PDF files carry no creation date, so the same figure gives the same bytes.
    """
    buffer = io.BytesIO()
    options = {
        "bbox_inches": "tight",
        "pad_inches": PAD_INCHES,
        "facecolor": figure.get_facecolor(),
    }
    if kind == "png":
        FigureCanvasAgg(figure).print_figure(buffer, format="png", dpi=dpi, **options)
    elif kind == "pdf":
        FigureCanvasPdf(figure).print_figure(
            buffer, format="pdf", dpi=dpi, metadata={"CreationDate": None}, **options
        )
    else:
        raise ValueError(f"kind must be 'png' or 'pdf', got {kind!r}")
    return buffer.getvalue()


def write_figures(out_dir: str | Path, drawn: list[DrawnFigure]) -> tuple[dict[str, bytes], list]:
    """Write every figure to ``out_dir/figures/`` and remove stale ones.

    Returns
    -------
    png, entries
        The PNG bytes of each figure by stem (for the report to embed) and one
        summary.json entry per figure (result, figure, title, files, dpi).
    """
    folder = Path(out_dir) / FIGURES_FOLDER
    folder.mkdir(exist_ok=True)
    png: dict[str, bytes] = {}
    entries = []
    for fig in drawn:
        data = figure_bytes(fig.figure, "png")
        atomic_write(_file(folder, fig, ".png"), data)
        atomic_write(_file(folder, fig, ".pdf"), figure_bytes(fig.figure, "pdf"))
        atomic_write(_file(folder, fig, ".txt"), (fig.caption_text + "\n").encode("utf-8"))
        png[fig.stem] = data
        entries.append(
            {
                "result": fig.result,
                "figure": fig.key,
                "title": fig.title,
                "png": f"{FIGURES_FOLDER}/{fig.stem}.png",
                "pdf": f"{FIGURES_FOLDER}/{fig.stem}.pdf",
                "caption": f"{FIGURES_FOLDER}/{fig.stem}.txt",
                "dpi": PNG_DPI,
            }
        )
    keep = {f"{fig.stem}{suffix}" for fig in drawn for suffix in SUFFIXES}
    for path in folder.iterdir():
        if path.is_file() and path.suffix in SUFFIXES and path.name not in keep:
            path.unlink()
    return png, entries


def _file(folder: Path, fig: DrawnFigure, suffix: str) -> Path:
    """``folder/<result>_<key><suffix>``, refused unless the result's name follows the
    name rule and the file stays in ``folder`` (the name may be longer than a result
    name may be: the rule's limit leaves room for these suffixes)."""
    why = name_problem(fig.result)
    if why:
        raise UserError(f"{fig.result!r} {why}; no figure written in {folder}: {NAME_RULE}")
    path = folder / f"{fig.stem}{suffix}"
    if path.resolve().parent != folder.resolve():
        raise UserError(f"{path}: resolves outside {folder}; not written")
    return path
