"""Figures of the report, drawn with matplotlib and returned as figures.

Every drawing function takes arrays or DataFrames and returns a bare
:class:`matplotlib.figure.Figure` (no pyplot state, so drawing is safe in any process
and without a display); :mod:`grouplevel.report.figure_files` turns each into the PNG
the report embeds and the PDF and PNG files of ``figures/``. Nothing is read from or
written to disk here.

Volumes are expected in the closest canonical (RAS+) array order: axis 0 left→right,
axis 1 posterior→anterior, axis 2 ventral→dorsal; :func:`canonical` gives that order
from a NIfTI image, whatever the order on disk.

Colours: signed statistics use the diverging map of :mod:`grouplevel.report.colours`
(blue for negative, orange for positive, lighter with |value|) over a template drawn in
dark greys, so that every shown voxel is lighter than the brain under it; plots use one
calm accent colour and a contrasting colour for flagged items.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import nibabel as nib
import numpy as np
import pandas as pd
from matplotlib.cm import ScalarMappable
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from scipy import ndimage

from grouplevel.inference.clusters import DEFAULT_CONNECTIVITY, neighbourhood
from grouplevel.report.colours import TEMPLATE_GREY_MAX, signed_colormap, threshold_norm

TEMPLATE_CMAP = "gray"
OVERVIEW_SLICES = 6  # evenly spaced coronal slices added to the peak slices
MAX_PEAK_SLICES = 12  # at most this many clusters get a slice through their peak
MONTAGE_COLUMNS = 6
# An overview slice closer than this many voxels to a peak slice is left out (it would
# show nearly the same section twice; our own choice).
MIN_SLICE_GAP = 2
# Narrowest share of the figure's width a projection panel gets (our own choice: a
# panel of a one-voxel-thin grid stays readable next to a long one).
MIN_PANEL_SHARE = 0.2
END_TRIM = 0.06  # share of the brain's AP extent skipped at each end of the overview
FIGURE_WIDTH_IN = 7.2  # two-column page width of most journals (common practice)
LABEL_STRIP_IN = 0.34  # height under each slice for its labels (they never sit on it)
COLOURBAR_STRIP_IN = 0.95  # height of the colour bar, its label and the key
MAP_BACKGROUND = "black"
MASK_OUTLINE = "0.6"
TARGET_OUTLINE = "white"
TARGET_STYLES = ("solid", (0, (3, 1.5)), (0, (1, 1)), (0, (4, 1, 1, 1)))
ACCENT = "#2f5f8f"  # points and bars of the plots (one calm colour)
FLAG_COLOUR = "#c2571a"  # flagged runs (orange: apart from the accent for colour-blind eyes)
MUTED = "0.45"


@dataclass(frozen=True)
class Volume:
    """A 3-D array in RAS+ array order and the world position of its axes."""

    data: np.ndarray
    origin_mm: np.ndarray  # world mm of voxel (0, 0, 0)
    step_mm: np.ndarray  # signed voxel size along each axis (positive after reorienting)

    def axis_mm(self, axis: int) -> np.ndarray:
        """World mm of every index along an axis."""
        return self.origin_mm[axis] + self.step_mm[axis] * np.arange(self.data.shape[axis])


def canonical(img: nib.spatialimages.SpatialImage) -> Volume:
    """The image's data in the closest canonical (RAS+) order, with its world axes."""
    can = nib.as_closest_canonical(img)
    data = np.asarray(can.dataobj, dtype=float)
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    affine = can.affine
    return Volume(
        data=np.nan_to_num(data),
        origin_mm=np.asarray(affine[:3, 3], dtype=float),
        step_mm=np.diag(affine[:3, :3]).astype(float),
    )


# --- which slices ------------------------------------------------------------------


@dataclass(frozen=True)
class Peak:
    """The strongest voxel of one connected part of a thresholded map.

    ``number`` is the part's rank (1 = most voxels); ``index`` its RAS+ voxel index.
    """

    number: int
    index: tuple[int, int, int]
    value: float
    voxels: int


@dataclass(frozen=True)
class SliceChoice:
    """One coronal slice of a montage: its index along axis 1 and the peaks it shows."""

    index: int
    peaks: tuple[Peak, ...] = ()


def cluster_peaks(overlay: np.ndarray, connectivity: int = DEFAULT_CONNECTIVITY) -> list[Peak]:
    """The peak of every connected part of the shown (non-zero) voxels, largest first.

    Positive and negative voxels form separate parts, as in the cluster tables; parts
    are connected through ``connectivity`` neighbours (6, 18 or 26).
    """
    structure = neighbourhood(connectivity)
    found: list[tuple[int, float, tuple[int, int, int]]] = []
    for sign in (1.0, -1.0):
        part = np.sign(overlay) == sign
        labels, n = ndimage.label(part, structure=structure)
        if n == 0:
            continue
        numbers = np.arange(1, n + 1)
        sizes = ndimage.sum_labels(part, labels, numbers)
        where = ndimage.maximum_position(np.abs(overlay) * part, labels, numbers)
        for size, pos in zip(sizes, where, strict=True):
            ijk = tuple(int(v) for v in pos)
            found.append((int(size), float(overlay[ijk]), ijk))  # type: ignore[arg-type]
    found.sort(key=lambda f: (-f[0], -abs(f[1]), f[2]))
    return [Peak(k + 1, ijk, value, size) for k, (size, value, ijk) in enumerate(found)]


def overview_slices(mask: np.ndarray, n: int = OVERVIEW_SLICES) -> np.ndarray:
    """Indices along axis 1 of ``n`` evenly spaced slices through the mask, anterior first."""
    present = np.flatnonzero(mask.any(axis=(0, 2)))
    if present.size == 0 or n <= 0:
        return np.zeros(0, dtype=int)
    trim = END_TRIM * (present[-1] - present[0])  # leave out the thin caps at both ends
    picks = np.linspace(present[-1] - trim, present[0] + trim, min(n, present.size))
    return np.unique(np.round(picks).astype(int))[::-1]


def choose_slices(
    mask: np.ndarray,
    peaks: Sequence[Peak],
    *,
    n_overview: int = OVERVIEW_SLICES,
    max_peaks: int = MAX_PEAK_SLICES,
) -> list[SliceChoice]:
    """A slice through the peak of each of the ``max_peaks`` largest parts, plus an
    overview of evenly spaced slices away from them; ordered anterior to posterior."""
    through: dict[int, list[Peak]] = {}
    for peak in list(peaks)[:max_peaks]:
        through.setdefault(peak.index[1], []).append(peak)
    chosen = {j: SliceChoice(j, tuple(p)) for j, p in through.items()}
    for j in overview_slices(mask, n_overview):
        if all(abs(int(j) - k) >= MIN_SLICE_GAP for k in chosen):
            chosen[int(j)] = SliceChoice(int(j))
    return [chosen[j] for j in sorted(chosen, reverse=True)]


# --- maps --------------------------------------------------------------------------


def _bounding_box(mask: np.ndarray, margin: int = 1) -> tuple[slice, slice, slice]:
    """Index ranges of the mask's bounding box, widened by ``margin`` voxels."""
    if not mask.any():
        return tuple(slice(0, n) for n in mask.shape)  # type: ignore[return-value]
    box = []
    for axis in range(3):
        other = tuple(a for a in range(3) if a != axis)
        present = np.flatnonzero(mask.any(axis=other))
        box.append(
            slice(max(present[0] - margin, 0), min(present[-1] + margin + 1, mask.shape[axis]))
        )
    return tuple(box)  # type: ignore[return-value]


def shown_range(overlay: np.ndarray) -> tuple[float, float]:
    """Smallest and largest |value| shown (the colour scale's two ends)."""
    shown = np.abs(overlay[np.isfinite(overlay) & (overlay != 0)])
    if not shown.size:
        return 0.0, 1.0
    low, high = float(shown.min()), float(shown.max())
    return low, high if high > low else low + 1.0


def _template_limits(template: Volume, mask: np.ndarray) -> tuple[float, float]:
    """imshow limits that draw the template in greys from black to TEMPLATE_GREY_MAX."""
    inside = template.data[mask] if mask.shape == template.data.shape else template.data
    low, high = np.percentile(inside, [2, 98]) if inside.size else (0.0, 1.0)
    high = high if high > low else low + 1.0
    return float(low), float(low + (high - low) / TEMPLATE_GREY_MAX)


def _contour(ax, plane: np.ndarray, extent, **style) -> None:
    """The outline of a 2-D mask (rows = vertical axis), when it has an inside and out."""
    if 0 < plane.sum() < plane.size and min(plane.shape) >= 2:
        ax.contour(plane.astype(float), levels=[0.5], origin="lower", extent=extent, **style)


def coronal_montage(
    template: Volume,
    overlay: np.ndarray,
    mask: np.ndarray,
    origin_mm: np.ndarray,
    slices: Sequence[SliceChoice],
    *,
    label: str,
    origin_name: str,
    outlines: Sequence[tuple[str, np.ndarray]] = (),
) -> Figure:
    """Coronal slices with a signed overlay, region outlines and labels under each slice.

    Parameters
    ----------
    template
        Background (RAS+ order), e.g. the study template; drawn in dark greys.
    overlay
        Signed statistic on the same grid; 0 where nothing is shown.
    mask
        Analysis mask (its outline is drawn; panels are cropped to its bounding box).
    origin_mm
        World mm of the stereotaxic origin; slice labels give AP from it.
    slices
        :func:`choose_slices`: which slices, and the peaks each passes through.
    label
        Colour-bar label, with the statistic's units.
    origin_name
        The origin's name for the slice labels (e.g. "bregma").
    outlines
        ``(name, 3-D bool)`` regions outlined on every slice (e.g. the targets).
    """
    mask = mask > 0
    bx, _by, bz = _bounding_box(mask)
    ml = template.axis_mm(0)[bx] - origin_mm[0]
    dv = template.axis_mm(2)[bz] - origin_mm[2]
    half_x, half_z = abs(template.step_mm[0]) / 2, abs(template.step_mm[2]) / 2
    extent = [ml[0] - half_x, ml[-1] + half_x, dv[0] - half_z, dv[-1] + half_z]
    # as few rows as MONTAGE_COLUMNS allow, filled evenly
    rows = max(1, int(np.ceil(len(slices) / MONTAGE_COLUMNS)))
    columns = max(1, int(np.ceil(len(slices) / rows)))
    panel_w = FIGURE_WIDTH_IN / columns
    panel_h = panel_w * (extent[3] - extent[2]) / (extent[1] - extent[0])
    height = rows * (panel_h + LABEL_STRIP_IN) + COLOURBAR_STRIP_IN
    fig = Figure(figsize=(FIGURE_WIDTH_IN, height), facecolor=MAP_BACKGROUND)
    cmap = signed_colormap()
    norm = threshold_norm(*shown_range(overlay))
    grey_low, grey_high = _template_limits(template, mask)
    y_mm = template.axis_mm(1) - origin_mm[1]
    for n, choice in enumerate(slices):
        r, c = divmod(n, columns)
        bottom = height - (r + 1) * (panel_h + LABEL_STRIP_IN) + LABEL_STRIP_IN
        ax = fig.add_axes(
            [
                c * panel_w / FIGURE_WIDTH_IN,
                bottom / height,
                panel_w / FIGURE_WIDTH_IN,
                panel_h / height,
            ]
        )
        ax.set_axis_off()
        j = choice.index
        common = {"origin": "lower", "extent": extent, "interpolation": "nearest"}
        ax.imshow(
            template.data[bx, j, bz].T, cmap=TEMPLATE_CMAP, vmin=grey_low, vmax=grey_high, **common
        )
        _contour(ax, mask[bx, j, bz].T, extent, colors=MASK_OUTLINE, linewidths=0.5)
        ax.imshow(np.ma.masked_equal(overlay[bx, j, bz].T, 0.0), cmap=cmap, norm=norm, **common)
        for k, (_name, region) in enumerate(outlines):
            _contour(
                ax,
                region[bx, j, bz].T,
                extent,
                colors=TARGET_OUTLINE,
                linewidths=0.9,
                linestyles=[TARGET_STYLES[k % len(TARGET_STYLES)]],
            )
        for peak in choice.peaks:
            ax.plot(
                template.axis_mm(0)[peak.index[0]] - origin_mm[0],
                template.axis_mm(2)[peak.index[2]] - origin_mm[2],
                marker="o",
                markersize=7,
                markerfacecolor="none",
                markeredgecolor="white",
                markeredgewidth=0.8,
            )
        ax.set_xlim(extent[0], extent[1])
        ax.set_ylim(extent[2], extent[3])
        text = f"AP {y_mm[j]:+.2f}"
        if choice.peaks:
            text += "\npeak " + ", ".join(str(p.number) for p in choice.peaks)
        ax.text(
            0.5,
            -0.03,
            text,
            transform=ax.transAxes,
            ha="center",
            va="top",
            fontsize=6.5,
            color="white",
            linespacing=1.1,
        )
    _map_key(
        fig,
        ScalarMappable(norm=norm, cmap=cmap),
        label,
        outlines,
        f"AP: mm from {origin_name}; left hemisphere on the left; ○ cluster peak",
        empty=not np.any(overlay),
    )
    return fig


def _map_key(
    fig: Figure, mappable: ScalarMappable, label: str, outlines, note: str, empty: bool = False
) -> None:
    """The colour bar with its units and ticks at the shown range, the outline key and a
    note, in the bottom strip of a map figure (white on the dark background)."""
    total = fig.get_figheight()
    if empty:  # no colour scale for nothing: say so where the bar would be
        fig.text(
            0.5,
            0.58 / total,
            "no voxel shown (none survives)",
            ha="center",
            va="center",
            fontsize=7.5,
            color="white",
        )
    else:
        cax = fig.add_axes([0.34, 0.52 / total, 0.32, 0.13 / total])
        norm = mappable.norm
        low = float(getattr(norm, "threshold", 0.0))
        high = float(norm.vmax)
        bar = fig.colorbar(mappable, cax=cax, orientation="horizontal")
        # both sides of the weakest shown value meet in the middle: one tick, "±low"
        bar.set_ticks([-high, 0.0, high])
        bar.set_ticklabels([f"{-high:.1f}", f"±{low:.1f}", f"{high:.1f}"])
        bar.ax.tick_params(labelsize=6.5, pad=1, colors="white")
        bar.outline.set_edgecolor("0.7")
    fig.text(0.5, 0.28 / total, label, ha="center", va="center", fontsize=7.5, color="white")
    fig.text(0.5, 0.1 / total, note, ha="center", va="center", fontsize=6.5, color="0.8")
    if outlines:
        handles = [
            Line2D(
                [],
                [],
                color=TARGET_OUTLINE,
                linewidth=0.9,
                linestyle=TARGET_STYLES[k % len(TARGET_STYLES)],
            )
            for k in range(len(outlines))
        ]
        legend = fig.legend(
            handles,
            [name for name, _ in outlines],
            loc="lower left",
            bbox_to_anchor=(0.005, 0.38 / total),
            fontsize=6.5,
            frameon=False,
            labelcolor="white",
            title="outlined",
            title_fontsize=6.5,
            handlelength=2.2,
        )
        legend.get_title().set_color("white")


def _signed_max_projection(values: np.ndarray, axis: int) -> np.ndarray:
    """Along ``axis``, the value of largest magnitude (keeping its sign)."""
    idx = np.abs(values).argmax(axis=axis)
    return np.take_along_axis(values, np.expand_dims(idx, axis), axis=axis).squeeze(axis)


def projection_views(
    overlay: np.ndarray,
    mask: np.ndarray,
    step_mm: np.ndarray,
    axes_mm: tuple[np.ndarray, np.ndarray, np.ndarray],
    *,
    label: str,
    origin_name: str,
) -> Figure:
    """A dorsal (top-down) and a lateral maximum-intensity view over the brain's outline.

    ``axes_mm`` are the origin-relative mm of the three RAS+ axes (ML, AP, DV). The
    brain is the mask's own projection, drawn in dark grey.
    """
    height = 3.2 + COLOURBAR_STRIP_IN - 0.75
    fig = Figure(figsize=(FIGURE_WIDTH_IN, height), facecolor=MAP_BACKGROUND)
    cmap = signed_colormap()
    norm = threshold_norm(*shown_range(overlay))
    ml, ap, dv = axes_mm
    half = np.abs(step_mm) / 2

    def extent(h, v, hs, vs):
        return [h[0] - hs, h[-1] + hs, v[0] - vs, v[-1] + vs]

    views = (
        # dorsal: look down along DV; ML horizontal, AP vertical (anterior up)
        ("dorsal view", 2, extent(ml, ap, half[0], half[1]), "ML (mm)", "AP (mm)"),
        # lateral: look from the right along ML; AP horizontal (anterior right), DV up
        (
            "lateral view (from the right)",
            0,
            extent(ap, dv, half[1], half[2]),
            "AP (mm)",
            "DV (mm)",
        ),
    )
    # panel widths follow the brain's extent, each keeping at least MIN_PANEL_SHARE
    widths = np.array([ml[-1] - ml[0] + 2 * half[0], ap[-1] - ap[0] + 2 * half[1]])
    share = np.maximum(widths / widths.sum(), MIN_PANEL_SHARE)
    share = share / share.sum()
    left, total = 0.09, 0.86
    for n, (title, along, ext, xlab, ylab) in enumerate(views):
        ax = fig.add_axes(
            [
                left + total * share[:n].sum() + 0.05 * n,
                (COLOURBAR_STRIP_IN + 0.4) / height,
                total * share[n] - 0.05,
                (height - COLOURBAR_STRIP_IN - 0.7) / height,
            ]
        )
        ax.set_facecolor(MAP_BACKGROUND)
        proj = _signed_max_projection(np.where(mask > 0, overlay, 0.0), along).T
        outline = mask.any(axis=along).T  # rows = AP (dorsal) or DV (lateral)
        ax.imshow(
            np.where(outline, 0.22, 0.0),
            cmap="gray",
            vmin=0,
            vmax=1,
            origin="lower",
            extent=ext,
            interpolation="nearest",
        )
        _contour(ax, outline, ext, colors=MASK_OUTLINE, linewidths=0.7)
        ax.imshow(
            np.ma.masked_equal(proj, 0.0),
            cmap=cmap,
            norm=norm,
            origin="lower",
            extent=ext,
            interpolation="nearest",
        )
        ax.set_title(title, fontsize=8, color="white")
        ax.set_xlabel(xlab, fontsize=7, color="white")
        ax.set_ylabel(ylab, fontsize=7, color="white")
        ax.tick_params(labelsize=6.5, colors="white")
        for spine in ax.spines.values():
            spine.set_visible(False)
    _map_key(
        fig,
        ScalarMappable(norm=norm, cmap=cmap),
        label,
        (),
        f"mm from {origin_name}",
        empty=not np.any(overlay),
    )
    return fig


# --- plots ---------------------------------------------------------------------------


def _interval_axes(n: int, left_in: float, width: float = 6.4) -> tuple[Figure, object]:
    """A figure for ``n`` rows of intervals; ``left_in`` inches are kept for labels."""
    height = 0.9 + 0.26 * max(n, 3)
    fig = Figure(figsize=(width, height))
    ax = fig.add_axes(
        [left_in / width, 0.55 / height, 1 - (left_in + 0.15) / width, 1 - 0.95 / height]
    )
    ax.tick_params(labelsize=7)
    return fig, ax


def forest_plot(
    labels: list[str],
    effect: np.ndarray,
    low: np.ndarray,
    high: np.ndarray,
    *,
    group: tuple[float, float, float] | None,
    xlabel: str,
) -> Figure:
    """Per-animal estimates with intervals; the group estimate as a diamond at the bottom.

    ``group`` is (effect, low, high) of the group estimate, or None.
    """
    rows = list(labels) + (["group"] if group is not None else [])
    fig, ax = _interval_axes(len(rows), left_in=0.9)
    y = np.arange(len(labels))[::-1] + (1 if group is not None else 0)
    ax.hlines(y, low, high, color=ACCENT, linewidth=1.2)
    ax.plot(effect, y, "s", color=ACCENT, markersize=4)
    if group is not None:
        g, gl, gh = group
        ax.fill([gl, g, gh, g], [0, 0.3, 0, -0.3], color="0.2")
        ax.axvline(g, color="0.6", linewidth=0.6, linestyle=":")
    ax.axvline(0, color="0.3", linewidth=0.8)
    ax.set_yticks(list(y) + ([0] if group is not None else []))
    ax.set_yticklabels(rows[: len(labels)] + (["group"] if group is not None else []), fontsize=7)
    ax.set_ylim(-0.8, len(rows) - 0.2)
    ax.set_xlabel(xlabel, fontsize=8)
    return fig


#: The two laterality indices of symmetry.tsv: column, words, marker.
LI_KINDS = (("li_extent", "extent", "o"), ("li_effect", "effect", "D"))


def laterality_plot(symmetry: pd.DataFrame) -> Figure:
    """Laterality indices, one row per region and index.

    The filled marker and the bar are the bootstrap's estimator (``li_*_shortcut`` on
    the original animals, and the percentile interval of its replicates); the open
    marker is the LI of the fitted group maps (``li_extent``, ``li_effect``), which the
    interval does not belong to. Tables written before the shortcut column existed
    show the group-map LI only as open markers with their intervals.
    LI = (L − R) / (L + R): +1 all left, −1 all right.
    """
    regions = symmetry["region"].astype(str).tolist()
    kinds = [k for k in LI_KINDS if k[0] in symmetry]
    labels, ys = [], []
    fig, ax = _interval_axes(len(regions) * max(len(kinds), 1), left_in=2.1)
    row = len(regions) * len(kinds) - 1
    for r, region in enumerate(regions):
        for col, words, marker in kinds:
            value = pd.to_numeric(symmetry[col], errors="coerce").to_numpy()[r]
            lo = _number(symmetry, f"{col}_low", r)
            hi = _number(symmetry, f"{col}_high", r)
            point = _number(symmetry, f"{col}_shortcut", r)
            ax.hlines(row, lo, hi, color=ACCENT, linewidth=1.3)
            if np.isfinite(point):
                ax.plot(point, row, marker, color=ACCENT, markersize=4.5)
            ax.plot(
                value,
                row,
                marker,
                markerfacecolor="white",
                markeredgecolor="0.15",
                markersize=5.5,
                markeredgewidth=0.9,
            )
            labels.append(f"{region} — {words}")
            ys.append(row)
            row -= 1
    ax.axvline(0, color="0.3", linewidth=0.8)
    ax.set_xlim(-1.08, 1.08)
    ax.set_ylim(-0.7, len(ys) - 0.3)
    ax.set_yticks(ys)
    ax.set_yticklabels(labels, fontsize=7)
    ax.set_xlabel("laterality index (L − R)/(L + R): −1 right only, +1 left only", fontsize=8)
    own_point = any(f"{col}_shortcut" in symmetry for col, _w, _m in kinds)
    handles = [
        Line2D(
            [],
            [],
            color=ACCENT,
            marker="o" if own_point else "none",
            markersize=4.5,
            linewidth=1.3,
        ),
        Line2D(
            [],
            [],
            linestyle="none",
            marker="o",
            markerfacecolor="white",
            markeredgecolor="0.15",
            markersize=5.5,
        ),
    ]
    fig.legend(
        handles,
        [
            "bootstrap estimate and its interval" if own_point else "bootstrap interval",
            "LI of the fitted group maps",
        ],
        loc="upper center",
        bbox_to_anchor=(0.5, 1.0),
        ncols=2,
        fontsize=7,
        frameon=False,
    )
    return fig


def _number(frame: pd.DataFrame, column: str, row: int) -> float:
    if column not in frame:
        return float("nan")
    return float(pd.to_numeric(frame[column], errors="coerce").to_numpy()[row])


def li_curve_plot(curves: pd.DataFrame) -> Figure:
    """Laterality index against the threshold, one line per region; the legend below."""
    groups = list(curves.groupby("region", sort=False))
    legend_rows = int(np.ceil(len(groups) / 2))
    height = 2.8 + 0.2 * legend_rows
    fig = Figure(figsize=(6.4, height))
    ax = fig.add_axes(
        [0.1, (0.55 + 0.2 * legend_rows) / height, 0.86, 1 - (0.75 + 0.2 * legend_rows) / height]
    )
    for n, (region, part) in enumerate(groups):
        part = part.assign(
            threshold=pd.to_numeric(part["threshold"], errors="coerce"),
            li=pd.to_numeric(part["li"], errors="coerce"),
        ).sort_values("threshold")
        ax.plot(
            part["threshold"],
            part["li"],
            color=_palette(n, len(groups)),
            linewidth=1.4,
            linestyle=TARGET_STYLES[n % len(TARGET_STYLES)],
            label=str(region),
        )
    ax.axhline(0, color="0.3", linewidth=0.8)
    ax.set_ylim(-1.05, 1.05)
    ax.set_xlabel("z threshold", fontsize=8)
    ax.set_ylabel("laterality index", fontsize=8)
    ax.tick_params(labelsize=7)
    fig.legend(loc="lower center", bbox_to_anchor=(0.5, 0.0), ncols=2, fontsize=7, frameon=False)
    return fig


def _palette(n: int, total: int) -> tuple[float, float, float, float]:
    """Colour ``n`` of ``total`` lines, spread along cividis (its light end left out)."""
    from matplotlib import colormaps

    return colormaps["cividis"](0.8 * n / max(total - 1, 1))


def variance_plot(var_animal: np.ndarray, var_run: np.ndarray, *, unit: str) -> Figure:
    """Distribution over voxels of the between-animal and between-run SDs (τ and σ)."""
    fig = Figure(figsize=(6.4, 2.7))
    tau = np.sqrt(np.clip(var_animal, 0, None))
    sigma = np.sqrt(np.clip(var_run, 0, None))
    top = float(np.percentile(np.concatenate([tau, sigma]), 99.5)) if tau.size else 1.0
    bins = np.linspace(0, max(top, 1e-12), 41)
    ax = fig.add_axes([0.09, 0.2, 0.5, 0.7])
    ax.hist(
        tau, bins=bins, histtype="step", color=ACCENT, linewidth=1.3, label="τ (between animals)"
    )
    ax.hist(
        sigma,
        bins=bins,
        histtype="step",
        color=FLAG_COLOUR,
        linewidth=1.3,
        linestyle="--",
        label="σ (between runs)",
    )
    ax.set_xlabel(f"standard deviation ({unit})", fontsize=8)
    ax.set_ylabel("voxels", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, frameon=False)
    ax2 = fig.add_axes([0.71, 0.2, 0.26, 0.7])
    ax2.hist(
        variance_share(var_animal, var_run), bins=np.linspace(0, 1, 21), color=ACCENT, alpha=0.85
    )
    ax2.set_xlabel("τ² / (τ² + σ²)", fontsize=8)
    ax2.set_ylabel("voxels", fontsize=8)
    ax2.tick_params(labelsize=7)
    return fig


def variance_share(var_animal: np.ndarray, var_run: np.ndarray) -> np.ndarray:
    """τ² / (τ² + σ²) at the voxels where the sum is positive."""
    total = var_animal + var_run
    share = np.divide(var_animal, total, out=np.full(total.shape, np.nan), where=total > 0)
    return share[np.isfinite(share)]


#: The three numbers of run quality: robust-z column, axis label.
QUALITY_MEASURES = (
    ("z_correlation", "agreement with the group map"),
    ("z_variance", "mean first-level variance"),
    ("z_edge", "edge-rim score"),
)


def run_quality_plot(quality: pd.DataFrame, threshold: float) -> Figure:
    """Each run's robust z on each quality number, one strip per number.

    Runs beyond ±``threshold`` on any number are flagged: drawn as numbered crosses on
    every strip, with the key (number → animal, session, run) at the right, so that no
    label sits on another.
    """
    measures = [m for m in QUALITY_MEASURES if m[0] in quality]
    flagged = (
        quality["flagged"].astype(str).str.lower().isin(["true", "1", "yes"]).to_numpy()
        if "flagged" in quality
        else np.zeros(len(quality), dtype=bool)
    )
    strip = 0.62
    height = 0.75 + strip * max(len(measures), 1)
    fig = Figure(figsize=(7.2, height))
    values = {c: pd.to_numeric(quality[c], errors="coerce").to_numpy() for c, _ in measures}
    finite = np.concatenate([v[np.isfinite(v)] for v in values.values()] + [np.zeros(1)])
    reach = max(float(np.abs(finite).max()), threshold) * 1.08
    # the same small vertical offset for a run on every strip (its rank), so that runs
    # with equal z do not hide each other
    offset = ((np.arange(len(quality)) * 7) % 11) / 10.0 - 0.5
    numbers = {k: n + 1 for n, k in enumerate(np.flatnonzero(flagged))}
    for s, (column, words) in enumerate(measures):
        ax = fig.add_axes(
            [0.25, (0.5 + strip * (len(measures) - 1 - s)) / height, 0.47, (strip - 0.12) / height]
        )
        v = values[column]
        ax.axvspan(-threshold, threshold, color="0.93", zorder=0)
        ax.plot(v[~flagged], offset[~flagged], "o", color=ACCENT, markersize=3.2)
        ax.plot(v[flagged], offset[flagged], "X", color=FLAG_COLOUR, markersize=5.5)
        for k, n in numbers.items():
            if np.isfinite(v[k]):
                ax.annotate(
                    str(n),
                    (v[k], offset[k]),
                    xytext=(0, 4),
                    textcoords="offset points",
                    ha="center",
                    fontsize=6,
                    color=FLAG_COLOUR,
                )
        ax.set_xlim(-reach, reach)
        ax.set_ylim(-1.0, 1.0)
        ax.set_yticks([])
        ax.set_ylabel(words, fontsize=7, rotation=0, ha="right", va="center")
        ax.tick_params(labelsize=6.5)
        if s < len(measures) - 1:
            ax.tick_params(labelbottom=False)  # the bottom strip's numbers serve all
    fig.text(
        0.485,
        0.12 / height,
        f"robust z across runs (shaded: within ±{threshold:g}, not flagged)",
        ha="center",
        fontsize=7.5,
    )
    session = quality["session"] if "session" in quality else pd.Series([""] * len(quality))
    key = [
        f"{n}  {quality['animal'].iloc[k]} s{session.iloc[k]} r{quality['run'].iloc[k]}"
        for k, n in numbers.items()
    ]
    fig.text(
        0.75,
        1 - 0.2 / height,
        "flagged runs" if key else "no run flagged",
        fontsize=7,
        va="top",
        fontweight="bold",
    )
    fig.text(
        0.75,
        1 - 0.42 / height,
        "\n".join(key),
        fontsize=6.5,
        va="top",
        color=FLAG_COLOUR,
        linespacing=1.25,
    )
    return fig
