"""Figures of the report, drawn with matplotlib and returned as PNG bytes.

Every function takes arrays or DataFrames and returns the PNG of one figure; nothing is
read from or written to disk here. Figures are drawn on a bare
:class:`matplotlib.figure.Figure` with the Agg canvas (no pyplot state), so rendering
is safe in any process and without a display.

Volumes are expected in the closest canonical (RAS+) array order: axis 0 left→right,
axis 1 posterior→anterior, axis 2 ventral→dorsal; :func:`canonical` gives that order
from a NIfTI image, whatever the order on disk.

Colours: statistics are drawn with a perceptually uniform diverging colormap
(matplotlib's ``vanimo``: one hue for negative, another for positive values, dark at
zero), the template in greys.
"""

from __future__ import annotations

import io
from dataclasses import dataclass

import nibabel as nib
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import Normalize
from matplotlib.figure import Figure

#: Perceptually uniform diverging colormap for signed statistics (matplotlib ≥ 3.10;
#: "vanimo", designed by F. Crameri's scientific colour maps project).
STAT_CMAP = "vanimo"
#: Sequential perceptually uniform colormap for one-signed quantities.
SEQ_CMAP = "cividis"
TEMPLATE_CMAP = "gray"
DPI = 110  # screen resolution of the embedded PNGs; sharp on print at page width
MONTAGE_SLICES = 12  # coronal slices from anterior to posterior (two rows of six)
MONTAGE_COLUMNS = 6
# Narrowest share of the figure's width a projection panel gets (our own choice: a
# panel of a one-voxel-thin grid stays readable next to a long one).
MIN_PANEL_SHARE = 0.2
END_TRIM = 0.06  # share of the brain's AP extent skipped at each end of the montage
OUTLINE_COLOUR = "0.35"
ACCENT = "#3a6ea5"  # points and bars of the plots (one calm colour)
FLAG_COLOUR = "#b5432f"


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


def png(fig: Figure) -> bytes:
    """The figure as PNG bytes."""
    canvas = FigureCanvasAgg(fig)
    buffer = io.BytesIO()
    canvas.print_png(buffer)
    return buffer.getvalue()


def _extent(vol: Volume, horizontal: int, vertical: int, origin_mm: np.ndarray) -> list[float]:
    """imshow extent (origin-relative mm) of a plane spanned by two axes."""
    h = vol.axis_mm(horizontal) - origin_mm[horizontal]
    v = vol.axis_mm(vertical) - origin_mm[vertical]
    dh, dv = abs(vol.step_mm[horizontal]) / 2, abs(vol.step_mm[vertical]) / 2
    return [h[0] - dh, h[-1] + dh, v[0] - dv, v[-1] + dv]


def _stat_limit(overlay: np.ndarray) -> float:
    shown = np.abs(overlay[np.isfinite(overlay) & (overlay != 0)])
    return float(shown.max()) if shown.size else 1.0


def montage_slices(mask: np.ndarray, n: int = MONTAGE_SLICES) -> np.ndarray:
    """Indices along axis 1 (posterior→anterior) of ``n`` slices through the mask,
    ordered from anterior to posterior."""
    present = np.flatnonzero(mask.any(axis=(0, 2)))
    if present.size == 0:
        return np.zeros(0, dtype=int)
    # leave out the thin caps at both ends (END_TRIM of the extent each)
    trim = END_TRIM * (present[-1] - present[0])
    picks = np.linspace(present[-1] - trim, present[0] + trim, min(n, present.size))
    return np.unique(np.round(picks).astype(int))[::-1]


def _bounding_box(mask: np.ndarray, margin: int = 2) -> tuple[slice, slice, slice]:
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


def _bottom_colorbar(fig: Figure, mappable, label: str, height_in: float, note: str) -> None:
    """A horizontal colour bar in the bottom ``height_in`` inches, its label beneath."""
    total = fig.get_figheight()
    cax = fig.add_axes([0.3, 0.5 / total, 0.4, 0.12 / total])
    bar = fig.colorbar(mappable, cax=cax, orientation="horizontal")
    bar.ax.tick_params(labelsize=7, pad=1)
    fig.text(0.5, 0.06 / total, label, ha="center", va="bottom", fontsize=8)
    if note:
        fig.text(0.01, 0.06 / total, note, ha="left", va="bottom", fontsize=7, color="0.3")


def _outline(mask2d: np.ndarray) -> np.ndarray:
    """Boundary voxels of a 2-D mask (inside, with a 4-neighbour outside)."""
    padded = np.pad(mask2d, 1)
    interior = padded[:-2, 1:-1] & padded[2:, 1:-1] & padded[1:-1, :-2] & padded[1:-1, 2:]
    return mask2d & ~interior


def coronal_montage(
    template: Volume,
    overlay: np.ndarray,
    mask: np.ndarray,
    origin_mm: np.ndarray,
    *,
    label: str,
    origin_name: str,
) -> bytes:
    """Coronal slices through the template from anterior to posterior with an overlay.

    The slices are tiled into one mosaic (one image per layer: template, mask outline,
    statistic), which keeps drawing fast.

    Parameters
    ----------
    template
        Background (RAS+ order), e.g. the study template.
    overlay
        Signed statistic on the same grid; 0 where nothing is shown (below threshold).
    mask
        Analysis mask (its outline is drawn; panels are cropped to its bounding box).
    origin_mm
        World mm of the stereotaxic origin; slice labels give AP from it.
    label
        Colour-bar label.
    origin_name
        The origin's name for the slice labels (e.g. "bregma").
    """
    mask = mask > 0
    slices = montage_slices(mask)
    bx, _by, bz = _bounding_box(mask)
    columns = min(MONTAGE_COLUMNS, max(len(slices), 1))
    rows = max(1, int(np.ceil(len(slices) / columns)))
    nx, nz = bx.stop - bx.start, bz.stop - bz.start
    # mosaic in display orientation: rows of the image = DV (top = dorsal), columns = ML
    back = np.full((rows * nz, columns * nx), np.nan)
    stat = np.zeros_like(back)
    edge = np.zeros(back.shape, dtype=bool)
    for n, j in enumerate(slices):
        r, c = divmod(n, columns)
        rs = slice(r * nz, (r + 1) * nz)
        cs = slice(c * nx, (c + 1) * nx)
        back[rs, cs] = template.data[bx, j, bz].T[::-1]
        stat[rs, cs] = overlay[bx, j, bz].T[::-1]
        edge[rs, cs] = _outline(mask[bx, j, bz]).T[::-1]
    aspect = abs(template.step_mm[2] / template.step_mm[0])
    bottom = 0.75  # inches for the colour bar and its label
    width = 7.2
    height = width * rows * nz * aspect / (columns * nx) + bottom
    fig = Figure(figsize=(width, height), dpi=DPI, facecolor="black")
    ax = fig.add_axes([0, bottom / height, 1, 1 - bottom / height])
    ax.set_axis_off()
    inside = template.data[mask]
    low, high = np.percentile(inside, [2, 98]) if inside.size else (0.0, 1.0)
    ax.imshow(
        np.nan_to_num(back, nan=low),
        cmap=TEMPLATE_CMAP,
        vmin=low,
        vmax=high,
        aspect=aspect,
        interpolation="nearest",
    )
    ax.imshow(
        np.ma.masked_where(~edge, np.ones(edge.shape)),
        cmap="gray",
        vmin=0,
        vmax=2,
        alpha=0.6,
        aspect=aspect,
        interpolation="nearest",
    )
    limit = _stat_limit(overlay)
    image = ax.imshow(
        np.ma.masked_equal(stat, 0.0),
        cmap=STAT_CMAP,
        norm=Normalize(-limit, limit),
        aspect=aspect,
        interpolation="nearest",
    )
    y_mm = template.axis_mm(1) - origin_mm[1]
    for n, j in enumerate(slices):
        r, c = divmod(n, columns)
        ax.text(
            (c + 0.5) * nx - 0.5,
            (r + 1) * nz - 1.5,
            f"AP {y_mm[j]:+.2f}",
            ha="center",
            va="bottom",
            fontsize=7,
            color="white",
        )
    _bottom_colorbar(fig, image, label, bottom, f"AP: mm from {origin_name}; left on the left")
    for text in fig.texts:
        text.set_color("white")
    fig.axes[-1].tick_params(colors="white")
    return png(fig)


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
) -> bytes:
    """A dorsal (top-down) and a lateral maximum-intensity view over the brain outline.

    ``axes_mm`` are the origin-relative mm of the three RAS+ axes (ML, AP, DV). The
    outline is the contour of the mask's own projection.
    """
    bottom = 0.75  # inches for the colour bar and its label
    fig = Figure(figsize=(7.2, 3.7), dpi=DPI)
    total_h = fig.get_figheight()
    limit = _stat_limit(overlay)
    norm = Normalize(-limit, limit)
    ml, ap, dv = axes_mm
    half = np.abs(step_mm) / 2

    def extent(h, v, hs, vs):
        return [h[0] - hs, h[-1] + hs, v[0] - vs, v[-1] + vs]

    views = (
        # dorsal: look down along DV; ML horizontal, AP vertical (anterior up)
        ("dorsal view", 2, 0, 1, extent(ml, ap, half[0], half[1]), "ML (mm)", "AP (mm)"),
        # lateral: look from the right along ML; AP horizontal (anterior right), DV up
        (
            "lateral view (from the right)",
            0,
            1,
            2,
            extent(ap, dv, half[1], half[2]),
            "AP (mm)",
            "DV (mm)",
        ),
    )
    # panel widths follow the brain's extent (voxel edges included, so a grid one voxel
    # thin still has a width), each panel keeping at least MIN_PANEL_SHARE of the row
    widths = np.array([ml[-1] - ml[0] + 2 * half[0], ap[-1] - ap[0] + 2 * half[1]])
    left = 0.08
    total = 0.86
    share = np.maximum(widths / widths.sum(), MIN_PANEL_SHARE)
    share = share / share.sum()
    image = None
    for n, (title, along, _h, _v, ext, xlab, ylab) in enumerate(views):
        ax = fig.add_axes(
            [
                left + total * share[:n].sum() + 0.04 * n,
                (bottom + 0.4) / total_h,
                total * share[n] - 0.04,
                (total_h - bottom - 0.7) / total_h,
            ]
        )
        proj = _signed_max_projection(np.where(mask > 0, overlay, 0.0), along)
        outline = mask.any(axis=along)
        if along == 2:
            proj, outline = proj.T, outline.T  # rows = AP
        else:
            proj, outline = proj.T, outline.T  # (AP, DV) -> rows = DV
        ax.imshow(
            np.where(outline, 0.93, 1.0),
            cmap="gray",
            vmin=0,
            vmax=1,
            origin="lower",
            extent=ext,
            interpolation="nearest",
        )
        # a contour needs inside and outside, and at least 2 × 2 points
        if 0 < outline.sum() < outline.size and min(outline.shape) >= 2:
            ax.contour(
                outline.astype(float),
                levels=[0.5],
                colors=OUTLINE_COLOUR,
                linewidths=0.8,
                origin="lower",
                extent=ext,
            )
        image = ax.imshow(
            np.ma.masked_equal(proj, 0.0),
            cmap=STAT_CMAP,
            norm=norm,
            origin="lower",
            extent=ext,
            interpolation="nearest",
        )
        ax.set_title(title, fontsize=9)
        ax.set_xlabel(xlab, fontsize=8)
        ax.set_ylabel(ylab, fontsize=8)
        ax.tick_params(labelsize=7)
        for spine in ax.spines.values():
            spine.set_visible(False)
    if image is not None:
        _bottom_colorbar(fig, image, label, bottom, f"mm from {origin_name}")
    return png(fig)


def _interval_axes(n: int, left: float, width: float = 6.4) -> tuple[Figure, object]:
    """A figure for ``n`` rows of intervals; ``left`` is the label margin (fraction)."""
    height = 0.75 + 0.28 * max(n, 4)
    fig = Figure(figsize=(width, height), dpi=DPI)
    ax = fig.add_axes([left, 0.5 / height, 0.95 - left, 1 - 0.8 / height])
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
) -> bytes:
    """Per-animal estimates with intervals; the group estimate as a diamond at the bottom.

    ``group`` is (effect, low, high) of the group estimate, or None.
    """
    rows = list(labels) + (["group"] if group is not None else [])
    fig, ax = _interval_axes(len(rows), left=0.14)
    y = np.arange(len(labels))[::-1] + (1 if group is not None else 0)
    ax.hlines(y, low, high, color=ACCENT, linewidth=1.2)
    ax.plot(effect, y, "s", color=ACCENT, markersize=4)
    if group is not None:
        g, gl, gh = group
        ax.fill([gl, g, gh, g], [0, 0.3, 0, -0.3], color="0.2")
        ax.axvline(g, color="0.6", linewidth=0.6, linestyle=":")
    ax.axvline(0, color="0.3", linewidth=0.8)
    ax.set_yticks(list(y) + ([0] if group is not None else []))
    ax.set_yticklabels(list(labels) + (["group"] if group is not None else []), fontsize=7)
    ax.set_ylim(-0.8, len(rows) - 0.2)
    ax.set_xlabel(xlabel, fontsize=8)
    return png(fig)


def laterality_plot(symmetry: pd.DataFrame) -> bytes:
    """Laterality indices with confidence intervals, one row per region.

    Uses the columns ``li_extent`` / ``li_effect`` with their ``_low`` / ``_high``
    bounds where present. LI = (L − R) / (L + R): +1 all left, −1 all right.
    """
    regions = symmetry["region"].astype(str).tolist()
    fig, ax = _interval_axes(len(regions), left=0.3)
    y = np.arange(len(regions))[::-1].astype(float)
    series = (("li_extent", "by extent", "o", -0.12), ("li_effect", "by effect", "D", 0.12))
    markers = 0
    for col, name, marker, shift in series:
        if col not in symmetry:
            continue
        v = pd.to_numeric(symmetry[col], errors="coerce").to_numpy()
        lo = pd.to_numeric(symmetry.get(f"{col}_low"), errors="coerce")
        hi = pd.to_numeric(symmetry.get(f"{col}_high"), errors="coerce")
        colour = ACCENT if marker == "o" else "0.25"
        if lo is not None and hi is not None:
            ax.hlines(y + shift, np.asarray(lo), np.asarray(hi), color=colour, linewidth=1.1)
        ax.plot(v, y + shift, marker, color=colour, markersize=4, linestyle="none", label=name)
        markers += 1
    ax.axvline(0, color="0.3", linewidth=0.8)
    ax.set_xlim(-1.05, 1.05)
    ax.set_yticks(y)
    ax.set_yticklabels(regions, fontsize=7)
    ax.set_xlabel("laterality index (L − R)/(L + R): −1 right only, +1 left only", fontsize=8)
    if markers:
        ax.legend(fontsize=7, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncols=2, frameon=False)
    return png(fig)


def li_curve_plot(curves: pd.DataFrame) -> bytes:
    """Laterality index against the threshold, one line per region."""
    fig = Figure(figsize=(6.4, 3.0), dpi=DPI)
    ax = fig.add_axes([0.1, 0.17, 0.62, 0.75])
    groups = list(curves.groupby("region", sort=False))
    for n, (region, part) in enumerate(groups):
        part = part.assign(
            threshold=pd.to_numeric(part["threshold"], errors="coerce"),
            li=pd.to_numeric(part["li"], errors="coerce"),
        ).sort_values("threshold")
        colour = _palette(n, len(groups))
        ax.plot(part["threshold"], part["li"], color=colour, linewidth=1.3, label=str(region))
    ax.axhline(0, color="0.3", linewidth=0.8)
    ax.set_ylim(-1.05, 1.05)
    ax.set_xlabel("threshold", fontsize=8)
    ax.set_ylabel("laterality index", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, frameon=False, loc="upper left", bbox_to_anchor=(1.02, 1.0))
    return png(fig)


def _palette(n: int, total: int) -> tuple[float, float, float, float]:
    """Colour ``n`` of ``total`` lines, spread along viridis (its light end left out)."""
    from matplotlib import colormaps

    return colormaps["viridis"](0.85 * n / max(total - 1, 1))


def variance_plot(var_animal: np.ndarray, var_run: np.ndarray, *, unit: str) -> bytes:
    """Distribution over voxels of the between-animal and between-run SDs (τ and σ)."""
    fig = Figure(figsize=(6.4, 2.6), dpi=DPI)
    tau = np.sqrt(np.clip(var_animal, 0, None))
    sigma = np.sqrt(np.clip(var_run, 0, None))
    top = float(np.percentile(np.concatenate([tau, sigma]), 99.5)) if tau.size else 1.0
    bins = np.linspace(0, max(top, 1e-12), 41)
    ax = fig.add_axes([0.08, 0.2, 0.5, 0.7])
    ax.hist(
        tau, bins=bins, histtype="step", color=ACCENT, linewidth=1.3, label="τ (between animals)"
    )
    ax.hist(
        sigma, bins=bins, histtype="step", color="0.25", linewidth=1.3, label="σ (between runs)"
    )
    ax.set_xlabel(f"standard deviation ({unit})", fontsize=8)
    ax.set_ylabel("voxels", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, frameon=False)
    ax2 = fig.add_axes([0.7, 0.2, 0.27, 0.7])
    total = var_animal + var_run
    share = np.divide(var_animal, total, out=np.full(total.shape, np.nan), where=total > 0)
    share = share[np.isfinite(share)]
    ax2.hist(share, bins=np.linspace(0, 1, 21), color=ACCENT, alpha=0.8)
    ax2.set_xlabel("τ² / (τ² + σ²)", fontsize=8)
    ax2.set_ylabel("voxels", fontsize=8)
    ax2.tick_params(labelsize=7)
    return png(fig)


def run_quality_plot(quality: pd.DataFrame) -> bytes:
    """Each run's similarity to the group (x) against its variance (y), z-scored;
    flagged runs marked and labelled."""
    fig = Figure(figsize=(6.4, 3.2), dpi=DPI)
    ax = fig.add_axes([0.1, 0.16, 0.86, 0.76])
    x = pd.to_numeric(quality["z_correlation"], errors="coerce").to_numpy()
    y = pd.to_numeric(quality["z_variance"], errors="coerce").to_numpy()
    flagged = (
        quality["flagged"].astype(str).str.lower().isin(["true", "1", "yes"]).to_numpy()
        if "flagged" in quality
        else np.zeros(len(quality), dtype=bool)
    )
    ax.plot(x[~flagged], y[~flagged], "o", color=ACCENT, markersize=4, label="run")
    ax.plot(x[flagged], y[flagged], "X", color=FLAG_COLOUR, markersize=7, label="flagged run")
    for k in np.flatnonzero(flagged):
        row = quality.iloc[k]
        ax.annotate(
            f"{row.get('animal', '')} s{row.get('session', '')} r{row.get('run', '')}",
            (x[k], y[k]),
            xytext=(4, 4),
            textcoords="offset points",
            fontsize=7,
        )
    ax.axvline(0, color="0.7", linewidth=0.6)
    ax.axhline(0, color="0.7", linewidth=0.6)
    ax.set_xlabel("similarity to the group map (z across runs)", fontsize=8)
    ax.set_ylabel("mean first-level variance (z across runs)", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, frameon=False)
    return png(fig)
