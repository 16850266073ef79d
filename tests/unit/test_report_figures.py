"""The report's figures (grouplevel.report.figures) and their files (figure_files).

Outside references:
- connected parts: scipy.ndimage.label with the 6- and 26-neighbour structures
  (``generate_binary_structure(3, 1)`` and ``(3, 3)``), the usual face and
  face-edge-corner neighbourhoods (common practice);
- the PNG's resolution: Pillow reads the pHYs chunk (PNG specification, W3C 2003,
  §11.3.5.3) as ``info["dpi"]``;
- a PDF file starts with ``%PDF-`` (ISO 32000-1:2008, §7.5.2).
"""

from __future__ import annotations

import io
import re

import numpy as np
import pandas as pd
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from PIL import Image
from scipy import ndimage

from grouplevel.report import figures
from grouplevel.report.figure_files import (
    PNG_DPI,
    DrawnFigure,
    figure_bytes,
    png_and_box,
    write_figures,
)


def _blobs() -> np.ndarray:
    z = np.zeros((12, 14, 8))
    z[2:5, 3:6, 2:5] = 3.5  # 27 voxels
    z[3, 4, 3] = 6.0  # its peak
    z[8:10, 9:11, 3:5] = 4.0  # 8 voxels
    z[8, 10, 4] = 5.0
    z[8:10, 11:13, 3:5] = -4.5  # touches the second blob: negative, a part of its own
    z[9, 12, 3] = -7.0
    z[0, 0, 0] = 3.2  # one voxel
    z[1, 1, 1] = 3.3  # touches it by a corner only
    return z


def test_cluster_peaks_match_scipy_labels():
    z = _blobs()
    peaks = figures.cluster_peaks(z, connectivity=26)
    structure = ndimage.generate_binary_structure(3, 3)
    n_pos = ndimage.label(z > 0, structure)[1]
    n_neg = ndimage.label(z < 0, structure)[1]
    assert len(peaks) == n_pos + n_neg == 4
    assert [p.voxels for p in peaks] == [27, 8, 8, 2]
    assert peaks[0].index == (3, 4, 3) and peaks[0].value == 6.0
    assert {peaks[1].value, peaks[2].value} == {5.0, -7.0}
    six = figures.cluster_peaks(z, connectivity=6)
    structure = ndimage.generate_binary_structure(3, 1)
    assert len(six) == ndimage.label(z > 0, structure)[1] + ndimage.label(z < 0, structure)[1]
    assert len(six) == 5  # the corner-touching pair falls apart


def test_slices_pass_through_every_peak_and_keep_apart_from_them():
    z = _blobs()
    mask = np.zeros(z.shape, dtype=bool)
    mask[:, 1:13, :] = True
    peaks = figures.cluster_peaks(z)
    chosen = figures.choose_slices(mask, peaks, n_overview=6)
    indices = [c.index for c in chosen]
    assert indices == sorted(indices, reverse=True)  # anterior first
    for peak in peaks:
        assert any(peak in c.peaks and c.index == peak.index[1] for c in chosen)
    through = {c.index for c in chosen if c.peaks}
    for c in chosen:
        if not c.peaks:
            assert min(abs(c.index - j) for j in through) >= figures.MIN_SLICE_GAP
    limited = figures.choose_slices(mask, peaks, n_overview=0, max_peaks=2)
    assert sum(len(c.peaks) for c in limited) == 2


def _extents(fig):
    FigureCanvasAgg(fig).draw()
    renderer = fig.canvas.get_renderer()
    return renderer


def test_montage_labels_sit_below_the_slices_and_outlines_are_drawn():
    z = _blobs()
    mask = np.ones(z.shape, dtype=bool)
    template = figures.Volume(
        np.random.default_rng(1).uniform(0, 1, z.shape), np.zeros(3), np.full(3, 0.2)
    )
    target = np.zeros(z.shape, dtype=bool)
    target[1:6, :, 1:6] = True
    slices = figures.choose_slices(mask, figures.cluster_peaks(z))
    fig = figures.coronal_montage(
        template,
        z,
        mask,
        np.zeros(3),
        slices,
        label="z",
        origin_name="bregma",
        outlines=[("auditory cortex", target)],
    )
    renderer = _extents(fig)
    panels = [ax for ax in fig.axes if ax.images]
    assert len(panels) == len(slices)
    for ax in panels:
        box = ax.get_window_extent(renderer)
        (label,) = ax.texts
        assert label.get_window_extent(renderer).y1 <= box.y0 + 0.5  # off the brain
        assert label.get_text().startswith("AP ")
    legend_texts = [t.get_text() for legend in fig.legends for t in legend.get_texts()]
    assert "auditory cortex" in legend_texts
    assert any(ax.collections for ax in panels)  # contour lines of the target


def test_run_quality_labels_do_not_overlap_and_every_score_has_an_axis():
    n = 30
    rng = np.random.default_rng(2)
    quality = pd.DataFrame(
        {
            "animal": [f"m{k // 3:02d}" for k in range(n)],
            "session": ["1"] * n,
            "run": [str(k % 3 + 1) for k in range(n)],
            "z_correlation": rng.normal(0, 1, n),
            "z_variance": np.r_[rng.normal(0, 1, n - 4), [12.0, 12.1, 12.2, 0.1]],
            "z_edge": np.r_[rng.normal(0, 1, n - 4), [0.0, 0.1, 0.2, 15.0]],
            "flagged": [False] * (n - 4) + [True] * 4,
        }
    )
    fig = figures.run_quality_plot(quality, 3.5)
    renderer = _extents(fig)
    ylabels = [ax.get_ylabel() for ax in fig.axes]
    assert ylabels == [
        "agreement with the group map",
        "mean first-level variance",
        "edge-rim score",
    ]
    texts = [t for t in fig.texts if t.get_text()]
    boxes = [t.get_window_extent(renderer) for t in texts]
    for i in range(len(boxes)):
        for j in range(i + 1, len(boxes)):
            assert not boxes[i].overlaps(boxes[j]), (texts[i].get_text(), texts[j].get_text())
    key = "\n".join(t.get_text() for t in texts)
    for k in range(n - 4, n):
        row = quality.iloc[k]
        assert f"{row['animal']} s1 r{row['run']}" in key


def test_li_curve_legend_is_inside_the_figure():
    curves = pd.DataFrame(
        {
            "region": ["a rather long region name of the lab's own atlas"] * 3
            + ["inferior colliculus"] * 3,
            "threshold": [0.0, 1.0, 2.0] * 2,
            "li": [0.1, 0.2, 0.3, -0.1, -0.2, -0.3],
        }
    )
    fig = figures.li_curve_plot(curves)
    renderer = _extents(fig)
    (legend,) = fig.legends
    box = legend.get_window_extent(renderer)
    assert box.x0 >= 0 and box.y0 >= 0
    assert box.x1 <= fig.bbox.x1 and box.y1 <= fig.bbox.y1


def test_laterality_plot_draws_the_bootstrap_point_on_its_interval():
    sym = pd.DataFrame(
        {
            "region": ["forelimb area"],
            "li_extent": [-0.86],
            "li_extent_low": [-0.94],
            "li_extent_high": [-0.25],
            "li_extent_shortcut": [-0.6],
            "li_effect": [-0.36],
            "li_effect_low": [-0.52],
            "li_effect_high": [-0.18],
            "li_effect_shortcut": [-0.34],
        }
    )
    fig = figures.laterality_plot(sym)
    (ax,) = fig.axes
    filled = [
        line for line in ax.lines if line.get_markerfacecolor() != "white" and line.get_marker()
    ]
    xs = sorted(float(line.get_xdata()[0]) for line in filled if line.get_marker() in "oD")
    assert xs == pytest.approx([-0.6, -0.34])


def test_figure_files_are_pdf_png_at_300_dpi_and_the_caption(tmp_path):
    fig = figures.variance_plot(
        np.array([0.0, 0.1, 0.2]), np.array([0.3, 0.2, 0.1]), unit="map units"
    )
    drawn = DrawnFigure("sound", "variance", "Variance components", "alt", "Caption.", fig)
    stale = tmp_path / "figures"
    stale.mkdir()
    (stale / "old_montage.png").write_bytes(b"x")
    png, entries = write_figures(tmp_path, [drawn])
    folder = tmp_path / "figures"
    assert sorted(p.name for p in folder.iterdir()) == [
        "sound_variance.pdf",
        "sound_variance.png",
        "sound_variance.txt",
    ]
    image = Image.open(folder / "sound_variance.png")
    assert image.info["dpi"] == pytest.approx((PNG_DPI, PNG_DPI), abs=0.5)
    assert image.size[0] >= 6 * PNG_DPI  # 6.4 inches wide, cut to its content
    assert png["sound_variance"] == (folder / "sound_variance.png").read_bytes()
    assert (folder / "sound_variance.pdf").read_bytes().startswith(b"%PDF-")
    assert figure_bytes(fig, "pdf") == figure_bytes(fig, "pdf")  # no creation date
    text = (folder / "sound_variance.txt").read_text(encoding="utf-8")
    assert text == "Variance components. Caption.\n"
    assert entries == [
        {
            "result": "sound",
            "figure": "variance",
            "title": "Variance components",
            "png": "figures/sound_variance.png",
            "pdf": "figures/sound_variance.pdf",
            "caption": "figures/sound_variance.txt",
            "dpi": PNG_DPI,
        }
    ]
    assert Image.open(io.BytesIO(png["sound_variance"])).format == "PNG"


def _pdf_image_sizes(data: bytes) -> list[tuple[int, int]]:
    """(width, height) in samples of every image XObject of a PDF (matplotlib writes
    their dictionaries uncompressed; PDF specification ISO 32000-1, 8.9.5, from
    memory: /Width and /Height count the image's samples, not its drawn size)."""
    found = re.findall(rb"/Subtype /Image\s*/Width (\d+)\s*/Height (\d+)", data)
    return [(int(w), int(h)) for w, h in found]


def test_pdf_embeds_voxel_images_unsampled_and_png_keeps_its_pixels():
    # a 7 x 5 slice drawn voxel for voxel is one 7 x 5 image in the PDF (not resampled
    # to 300 dpi), the PNG is drawn as before, and the figure is left as it was
    fig = Figure(figsize=(3.0, 2.0))
    ax = fig.add_axes([0.1, 0.1, 0.8, 0.8])
    voxels = ax.imshow(np.arange(35.0).reshape(5, 7), interpolation="nearest", cmap="gray")
    ax.plot([0, 6], [0, 4], color="white")
    png_before = figure_bytes(fig, "png")
    pdf = figure_bytes(fig, "pdf")
    assert _pdf_image_sizes(pdf) == [(7, 5)]
    assert voxels.get_interpolation() == "nearest"
    assert figure_bytes(fig, "png") == png_before
    # an image drawn smoothly is resampled to the file's resolution as before
    voxels.set_interpolation("bilinear")
    assert all(w > 7 for w, _h in _pdf_image_sizes(figure_bytes(fig, "pdf")))


def test_opaque_png_is_stored_as_rgb_with_the_same_pixels():
    fig = figures.variance_plot(
        np.array([0.0, 0.1, 0.2]), np.array([0.3, 0.2, 0.1]), unit="map units"
    )
    data, box = png_and_box(fig)
    image = Image.open(io.BytesIO(data))
    assert image.mode == "RGB"
    canvas = FigureCanvasAgg(fig)  # png_and_box drew the figure at PNG_DPI
    canvas.draw()
    drawn = np.asarray(canvas.buffer_rgba())
    assert (drawn[..., 3] == 255).all()  # opaque: nothing is lost without alpha
    rows = drawn.shape[0]
    left, top = int(np.floor(box.x0 * PNG_DPI)), int(np.floor(rows - box.y1 * PNG_DPI))
    assert left >= 0 and top >= 0  # the box lies inside this figure
    pixels = np.asarray(image)
    height, width = pixels.shape[:2]
    np.testing.assert_array_equal(pixels, drawn[top : top + height, left : left + width, :3])


def test_variance_caption_says_only_what_the_medians_support():
    from grouplevel.report.result_figures import _variance_caption

    rng = np.random.default_rng(4)
    sigma2 = rng.uniform(0.05, 0.1, 1000)
    zero = np.where(rng.uniform(size=1000) < 0.7, 0.0, rng.uniform(0, 0.02, 1000))
    words = _variance_caption(zero, sigma2, "sound")
    assert "median" in words and "τ² = 0 " not in words
    assert f"estimated at 0 at {np.mean(zero <= 0):.0%} of the voxels" in words
    assert "more animals reduce" not in words  # the claim needs τ² to dominate
    big = _variance_caption(sigma2 * 3, sigma2, "sound")
    assert "τ² is the larger part at most voxels (median share 0.75)" in big
    small = _variance_caption(sigma2 / 3, sigma2, "sound")
    assert "σ² is the larger part" in small and "more animals reduce" not in small


def test_content_beyond_the_figure_edge_is_kept():

    from grouplevel.report.figure_files import png_and_box

    inside = Figure(figsize=(2.0, 1.0))
    inside.text(0.5, 0.5, "inside", ha="center")
    png, box = png_and_box(inside, dpi=100)
    assert Image.open(io.BytesIO(png)).size[0] < 200  # cut to the word, not the page
    beyond = Figure(figsize=(2.0, 1.0))
    beyond.text(0.9, 0.5, "a label that runs far past the right edge")
    png, box = png_and_box(beyond, dpi=100)
    assert box.x1 > 2.0
    assert Image.open(io.BytesIO(png)).size[0] == pytest.approx(box.width * 100, abs=2)


def test_crop_box_and_pixels_are_those_of_the_drawn_canvas():
    # the box png_and_box cuts to is matplotlib's own tight box of the fully rasterised
    # figure (FigureCanvasAgg.draw, then Figure.get_tightbbox), and the PNG is that
    # canvas's pixels in the box; where the padding reaches past the figure's edge it
    # is the figure's background colour (white here), as print_figure would fill it
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from grouplevel.report.figure_files import PAD_INCHES, png_and_box

    def figure(x):
        fig = Figure(figsize=(2.0, 1.0))
        fig.add_axes((0.3, 0.3, 0.5, 0.5)).plot([0, 1], [1, 0])
        fig.text(x, 0.1, "label")
        return fig

    for x in (0.2, 0.0):  # inside the edges; touching the left edge (padding outside)
        png, box = png_and_box(figure(x), dpi=100)
        drawn = figure(x)
        canvas = FigureCanvasAgg(drawn)
        drawn.set_dpi(100)
        canvas.draw()
        reference = drawn.get_tightbbox(canvas.get_renderer()).padded(PAD_INCHES)
        np.testing.assert_allclose(box.bounds, reference.bounds, atol=1e-12)
        pixels = np.asarray(canvas.buffer_rgba())
        rows = pixels.shape[0]
        top, bottom = int(np.floor(rows - box.y1 * 100)), int(np.ceil(rows - box.y0 * 100))
        left, right = int(np.floor(box.x0 * 100)), int(np.ceil(box.x1 * 100))
        image = np.asarray(Image.open(io.BytesIO(png)).convert("RGBA"))
        assert image.shape[:2] == (bottom - top, right - left)
        pad = max(-left, 0)  # columns left of the figure's edge
        assert (pad > 0) == (x == 0.0)
        np.testing.assert_array_equal(image[:, :pad], 255)
        np.testing.assert_array_equal(image[:, pad:], pixels[top:bottom, max(left, 0) : right])


def test_a_map_without_surviving_voxels_has_no_colour_scale():
    mask = np.ones((5, 6, 4), dtype=bool)
    template = figures.Volume(np.ones(mask.shape), np.zeros(3), np.full(3, 0.2))
    empty = np.zeros(mask.shape)
    slices = figures.choose_slices(mask, figures.cluster_peaks(empty))
    fig = figures.coronal_montage(
        template, empty, mask, np.zeros(3), slices, label="z", origin_name="bregma"
    )
    assert len(fig.axes) == len(slices)  # the slices only: no colour-bar axes
    assert "no voxel shown (none survives)" in [t.get_text() for t in fig.texts]
