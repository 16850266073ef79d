"""The report's figures as files for a manuscript: ``OUT/figures/``.

Each figure of the report is written three times, under the name
``<result>_<figure>``:

* ``.pdf`` — vector (text, lines and axes stay sharp); map slices drawn voxel for voxel
  (:func:`figure_bytes`) are embedded at the maps' own resolution, one image pixel
  per voxel, each layer (template, overlay) its own image, not resampled to a dpi;
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
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.backends.backend_pdf import FigureCanvasPdf
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from matplotlib.transforms import Bbox
from PIL import Image

from grouplevel.errors import UserError
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
    image, box = _pixels_and_box(figure, dpi)
    return (image if isinstance(image, bytes) else _png(image, dpi)), box


def _pixels_and_box(figure: Figure, dpi: int) -> tuple[np.ndarray | bytes, Bbox]:
    """As :func:`png_and_box`, with the cut pixels (a copy of their own, RGBA) still to
    be encoded; PNG bytes already when the figure had to be drawn again."""
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
        cut = pixels[top:bottom, left:right].copy()  # not a view of the canvas's buffer
    else:  # the padding reaches past an edge: the background colour there
        background = np.round(np.asarray(to_rgba(figure.get_facecolor())) * 255)
        cut = np.empty((bottom - top, right - left, 4), dtype=np.uint8)
        cut[...] = background.astype(np.uint8)
        inside = pixels[max(top, 0) : min(bottom, rows), max(left, 0) : min(right, columns)]
        row, column = max(-top, 0), max(-left, 0)
        cut[row : row + inside.shape[0], column : column + inside.shape[1]] = inside
    return cut, box


def _png(pixels: np.ndarray, dpi: int) -> bytes:
    """RGBA pixels as PNG bytes with their resolution, compressed fast
    (:data:`PNG_COMPRESS_LEVEL`); as RGB when every pixel is opaque (the same image,
    a quarter fewer bytes to compress)."""
    if pixels.shape[-1] == 4 and bool((pixels[..., 3] == 255).all()):
        pixels = np.ascontiguousarray(pixels[..., :3])
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
        with _voxel_images(figure):
            FigureCanvasPdf(figure).print_figure(
                buffer, format="pdf", dpi=dpi, metadata={"CreationDate": None}, **options
            )
    else:
        raise ValueError(f"kind must be 'png' or 'pdf', got {kind!r}")
    return buffer.getvalue()


@contextmanager
def _voxel_images(figure: Figure):
    """While a vector file is written: images drawn voxel for voxel (interpolation
    "nearest") embedded unsampled, one image pixel per voxel, each image on its own.

    Matplotlib embeds an image with interpolation "none" in a vector file without
    resampling it, but only when images are not composited into one; "nearest" (what
    the PNG is drawn with) would first resample every layer to the file's dpi. The
    PDF then shows the same voxels as the PNG, scales without resampling, and is
    written in a fraction of the time. Other images are left as they are.
    """
    images = [
        image
        for ax in figure.axes
        for image in ax.get_images()
        if image.get_interpolation() == "nearest"
    ]
    try:
        for image in images:
            image.set_interpolation("none")
        with matplotlib.rc_context({"image.composite_image": False}):
            yield
    finally:
        for image in images:
            image.set_interpolation("nearest")


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
    # each PNG is compressed on a second thread while the figure's PDF is drawn (zlib
    # runs without Python's lock, so the two share the cores)
    with ThreadPoolExecutor(max_workers=1) as encoder:
        for fig in drawn:
            image, box = _pixels_and_box(fig.figure, PNG_DPI)  # one box for both files
            encoded = None if isinstance(image, bytes) else encoder.submit(_png, image, PNG_DPI)
            pdf = figure_bytes(fig.figure, "pdf", box=box)
            data = image if encoded is None else encoded.result()
            atomic_write(_file(folder, fig, ".png"), data)
            atomic_write(_file(folder, fig, ".pdf"), pdf)
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
