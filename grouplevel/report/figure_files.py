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
import os
import signal
import sys
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.backends.backend_pdf import FigureCanvasPdf
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from matplotlib.transforms import Bbox
from PIL import Image

from grouplevel.errors import UserError
from grouplevel.machine import available_cores
from grouplevel.outputs.files import atomic_write
from grouplevel.outputs.names import NAME_RULE, name_problem

FIGURES_FOLDER = "figures"
PNG_DPI = 300  # common practice: journals ask for 300 dpi at print size
SUFFIXES = (".png", ".pdf", ".txt")
# the space left around the drawn content when figures are cut to it (inches)
PAD_INCHES = 0.06
# content this close to an edge is inside it: axes that fill the figure end at its
# edge up to rounding (far below a pixel at PNG_DPI)
EDGE_TOLERANCE_INCHES = 1e-6
# zlib level of the PNG files: 1, the fastest, writes a figure in a fraction of the
# time of the default 6 for files a little larger; the pixels are the same (PNG is
# lossless, PNG specification, W3C 2003)
PNG_COMPRESS_LEVEL = 1
# the PDFs are drawn in a forked child beside the PNGs where that pays (FigureWriter)
FORK_PDFS = True


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


def png_and_box(figure: Figure, dpi: int = PNG_DPI) -> tuple[bytes, Bbox]:
    """The figure as PNG bytes at ``dpi``, cut to its drawn content, and that content's
    box in inches (padded by :data:`PAD_INCHES`), from one draw.

    The figure is rasterised once on its own canvas and its content's box measured on
    that drawing. The padding may reach past the figure's edges (content up to an
    edge): it is the figure's background colour, as a canvas the size of the box would
    draw it. Only when the content itself reaches beyond the edges (a long label) is
    the figure drawn again, on a canvas that holds all of it, so nothing is cut off.
    """
    canvas = FigureCanvasAgg(figure)
    figure.set_dpi(dpi)
    canvas.draw()
    content = figure.get_tightbbox(canvas.get_renderer())
    box = content.padded(PAD_INCHES)
    width, height = figure.get_size_inches()
    edge = EDGE_TOLERANCE_INCHES
    beyond = (content.x0 < -edge, content.y0 < -edge)
    beyond += (content.x1 > width + edge, content.y1 > height + edge)
    if any(beyond):
        return figure_bytes(figure, "png", dpi=dpi, box=box), box
    pixels = np.asarray(canvas.buffer_rgba())
    rows, columns = pixels.shape[:2]
    left, right = int(np.floor(box.x0 * dpi)), int(np.ceil(box.x1 * dpi))
    top, bottom = int(np.floor(rows - box.y1 * dpi)), int(np.ceil(rows - box.y0 * dpi))
    if left >= 0 and top >= 0 and right <= columns and bottom <= rows:
        cut = np.ascontiguousarray(pixels[top:bottom, left:right])
    else:  # the padding reaches past an edge: the background colour there
        background = np.round(np.asarray(to_rgba(figure.get_facecolor())) * 255)
        cut = np.empty((bottom - top, right - left, 4), dtype=np.uint8)
        cut[...] = background.astype(np.uint8)
        inside = pixels[max(top, 0) : min(bottom, rows), max(left, 0) : min(right, columns)]
        row, column = max(-top, 0), max(-left, 0)
        cut[row : row + inside.shape[0], column : column + inside.shape[1]] = inside
    return _png(cut, dpi), box


def _png(pixels: np.ndarray, dpi: int) -> bytes:
    """RGBA pixels as PNG bytes with their resolution, compressed fast
    (:data:`PNG_COMPRESS_LEVEL`)."""
    buffer = io.BytesIO()
    Image.fromarray(pixels).save(
        buffer, format="PNG", dpi=(dpi, dpi), compress_level=PNG_COMPRESS_LEVEL
    )
    return buffer.getvalue()


def figure_bytes(figure: Figure, kind: str, dpi: int = PNG_DPI, box: Bbox | None = None) -> bytes:
    """The figure as PNG (at ``dpi``) or PDF bytes, cut to ``box`` (inches; default: its
    drawn content, padded).

    PDF files carry no creation date, so the same figure gives the same bytes.
    """
    buffer = io.BytesIO()
    options = {
        "bbox_inches": "tight" if box is None else box,
        "pad_inches": PAD_INCHES,
        "facecolor": figure.get_facecolor(),
    }
    if kind == "png":
        FigureCanvasAgg(figure).print_figure(
            buffer,
            format="png",
            dpi=dpi,
            pil_kwargs={"compress_level": PNG_COMPRESS_LEVEL},
            **options,
        )
    elif kind == "pdf":
        FigureCanvasPdf(figure).print_figure(
            buffer, format="pdf", dpi=dpi, metadata={"CreationDate": None}, **options
        )
    else:
        raise ValueError(f"kind must be 'png' or 'pdf', got {kind!r}")
    return buffer.getvalue()


class FigureWriter:
    """Writes the figures of one rendering to ``out_dir/figures/`` (use as a ``with``
    block around :meth:`write`).

    The PDF of a figure costs about as much as its PNG (a second full drawing, by
    matplotlib's PDF backend, in Python). On Linux with two or more usable cores and
    two or more figures, entering the block forks a child process that draws the PDFs
    while this process draws the PNGs: the child inherits the figures as they are (no
    copy, no second import) and gets each figure's crop box through a pipe as soon as
    its PNG is drawn, so both files of a figure have the same box. The child draws and
    writes files only (atomically, :func:`~grouplevel.outputs.files.atomic_write`) and
    leaves with ``os._exit``: it runs no exit handler of this process and touches no
    lock another thread could hold (the block is entered before this rendering starts
    any thread). Should the child fail, this process writes every PDF itself (the same
    bytes: the drawing is deterministic), so the folder is complete either way.
    Elsewhere, or for one figure, both files are drawn here, one after the other.
    """

    def __init__(self, out_dir: str | Path, drawn: list[DrawnFigure]) -> None:
        self.folder = Path(out_dir) / FIGURES_FOLDER
        self.drawn = drawn
        self._child: int | None = None
        self._boxes = None  # the pipe to the child, one line per figure

    def __enter__(self) -> FigureWriter:
        self.folder.mkdir(exist_ok=True)
        if _fork_pays(len(self.drawn)):
            self._fork()
        return self

    def __exit__(self, *exc) -> None:
        if self._child is not None:  # write() did not finish: stop the child
            self._close_boxes()
            try:
                os.kill(self._child, signal.SIGKILL)
            except ProcessLookupError:
                pass
            os.waitpid(self._child, 0)
            self._child = None

    def _fork(self) -> None:
        read, write = os.pipe()
        with warnings.catch_warnings():
            # Python 3.12+ warns on fork in a process with threads (here: idle compute
            # pools); the child below uses none of them and no lock they may hold
            warnings.simplefilter("ignore", DeprecationWarning)
            pid = os.fork()
        if pid == 0:  # the child: draw each PDF once its box arrives, then leave
            status = 1
            try:
                os.close(write)
                with os.fdopen(read, "r", encoding="ascii") as boxes:
                    for line in boxes:
                        index, *corners = line.split()
                        x0, y0, x1, y1 = (float(v) for v in corners)
                        self._write_pdf(int(index), Bbox([[x0, y0], [x1, y1]]))
                status = 0
            finally:
                os._exit(status)
        os.close(read)
        self._child = pid
        self._boxes = os.fdopen(write, "w", encoding="ascii")

    def _write_pdf(self, index: int, box: Bbox) -> None:
        fig = self.drawn[index]
        atomic_write(_file(self.folder, fig, ".pdf"), figure_bytes(fig.figure, "pdf", box=box))

    def _close_boxes(self) -> None:
        if self._boxes is not None:
            try:
                self._boxes.close()
            except BrokenPipeError:  # the child has gone: its PDFs are redrawn here
                pass
            self._boxes = None

    def _send_box(self, index: int, box: Bbox) -> None:
        try:
            # repr round-trips a float exactly: the child crops to the very same box
            self._boxes.write(f"{index} {' '.join(repr(float(v)) for v in box.extents)}\n")
            self._boxes.flush()
        except BrokenPipeError:  # the child has gone: its PDFs are redrawn here
            self._boxes = None

    def write(self) -> tuple[dict[str, bytes], list]:
        """Write every figure (PNG, PDF, caption) and remove stale figure files.

        Returns
        -------
        png, entries
            The PNG bytes of each figure by stem (for the report to embed) and one
            summary.json entry per figure (result, figure, title, files, dpi).
        """
        png: dict[str, bytes] = {}
        entries = []
        boxes: list[Bbox] = []
        for index, fig in enumerate(self.drawn):
            data, box = png_and_box(fig.figure)  # one box for both files
            atomic_write(_file(self.folder, fig, ".png"), data)
            if self._boxes is not None:
                self._send_box(index, box)
            elif self._child is None:
                self._write_pdf(index, box)
            boxes.append(box)
            atomic_write(_file(self.folder, fig, ".txt"), (fig.caption_text + "\n").encode("utf-8"))
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
        if self._child is not None:
            self._close_boxes()  # the child reads to the end, writes the last PDF, exits
            _, status = os.waitpid(self._child, 0)
            self._child = None
            if status != 0:  # it failed or was stopped: every PDF is drawn here
                for index, box in enumerate(boxes):
                    self._write_pdf(index, box)
        keep = {f"{fig.stem}{suffix}" for fig in self.drawn for suffix in SUFFIXES}
        for path in self.folder.iterdir():
            if path.is_file() and path.suffix in SUFFIXES and path.name not in keep:
                path.unlink()
        return png, entries


def _fork_pays(figures: int) -> bool:
    """Whether the PDFs are drawn in a forked child (see :class:`FigureWriter`)."""
    return (
        FORK_PDFS
        and figures >= 2
        and sys.platform.startswith("linux")
        and hasattr(os, "fork")
        and available_cores() >= 2
    )


def write_figures(out_dir: str | Path, drawn: list[DrawnFigure]) -> tuple[dict[str, bytes], list]:
    """Write every figure to ``out_dir/figures/`` and remove stale ones
    (:class:`FigureWriter` in one call).

    Returns
    -------
    png, entries
        The PNG bytes of each figure by stem (for the report to embed) and one
        summary.json entry per figure (result, figure, title, files, dpi).
    """
    with FigureWriter(out_dir, drawn) as writer:
        return writer.write()


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
