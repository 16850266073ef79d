"""The figures of one result folder: which to draw, from which files, and their words.

:func:`result_figures` reads a result folder of a finished output (maps, TSV tables,
its summary.json entry) and returns the report's figures of that result as
:class:`~grouplevel.report.figure_files.DrawnFigure` objects, in the order the report
shows them; :mod:`grouplevel.report.render` writes them (``figures/``) and embeds them.
Every caption is written from the numbers it describes, so that it cannot say what the
data do not show.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd

from grouplevel.outputs.records import locate_input
from grouplevel.report import figures
from grouplevel.report.figure_files import DrawnFigure

#: Figures shown in the report's map section (the others go to its figure section).
MAP_FIGURES = ("montage", "projections", "asymmetry_surviving", "asymmetry")
#: Where on the grid the maps' labels are (``targets.nii.gz``, written with an atlas
#: and ``[questions] targets``).
TARGETS_MAP = "targets.nii.gz"
#: Share τ²/(τ² + σ²) above which the between-animal variance "dominates" (half of the
#: variance; our own wording rule for the caption).
DOMINANT_SHARE = 0.5
Z_UNITS = "z (standard normal units)"
#: The run-quality threshold when the summary does not give one (the default of
#: ``[questions] outlier_z``).
DEFAULT_OUTLIER_Z = 3.5


@dataclass(frozen=True)
class Place:
    """What every map figure of one result is drawn on."""

    background: figures.Volume
    background_words: str
    mask: np.ndarray  # RAS+ bool
    origin: np.ndarray
    origin_name: str
    connectivity: int
    outlines: tuple[tuple[str, np.ndarray], ...]  # (name, RAS+ bool)
    fix: np.ndarray  # headers → true mm (identity for true headers; summary.json's grid)


@dataclass(frozen=True)
class Threshold:
    """The correction a map is thresholded by: its summary.json name, its words, alpha."""

    method: str
    stem: str  # the p-type map whose values ≤ alpha survive
    words: str
    alpha: float


def _load(path: Path, header_to_true: np.ndarray) -> nib.spatialimages.SpatialImage | None:
    """A map of the folder, placed in true mm when the headers were declared scaled or
    their axes exchanged (``header_to_true``, from summary.json's grid)."""
    if not path.is_file():
        return None
    img = nib.load(str(path))
    if np.array_equal(header_to_true, np.eye(4)):
        return img
    return nib.Nifti1Image(np.asanyarray(img.dataobj), header_to_true @ img.affine)


def header_to_true(summary: dict) -> np.ndarray:
    """The headers → true mm matrix of a finished folder (identity for true headers)."""
    matrix = (summary.get("grid") or {}).get("header_to_true")
    return np.eye(4) if matrix is None else np.asarray(matrix, dtype=float)


def _template_path(summary: dict, folder: Path) -> Path | None:
    """The study template where the run read it, or where it would be had the study
    and its outputs moved together (:func:`grouplevel.outputs.records.locate_input`)."""
    template = ((summary.get("settings") or {}).get("study") or {}).get("template")
    return locate_input(template, summary, folder.parent)


def result_figures(
    out_dir: Path, name: str, result: dict, summary: dict, frames: dict, threshold: Threshold
) -> list[DrawnFigure]:
    """Every figure of one result folder, in the order the report shows them."""
    folder = Path(out_dir) / name
    figs: list[DrawnFigure] = []
    place = _place(summary, folder, result)
    if place is not None:
        figs += _map_figures(folder, name, place, threshold)
        figs += _asymmetry_figures(folder, name, place, threshold)
    figs += _symmetry_figures(name, frames)
    forest = _forest(name, result, frames)
    if forest is not None:
        figs.append(forest)
    figs += _variance_figures(folder, name, result, header_to_true(summary))
    figs += _run_quality_figures(name, result, frames)
    return figs


def _place(summary: dict, folder: Path, result: dict) -> Place | None:
    """Background, mask, origin and outlines of the result's maps (None without a mask)."""
    fix = header_to_true(summary)
    mask_img = _load(folder / "mask.nii.gz", fix)
    if mask_img is None:
        return None
    mask = figures.canonical(mask_img).data > 0
    settings = summary.get("settings") or {}
    template = _template_path(summary, folder)
    if template is not None:
        background = figures.canonical(_load(template, fix))
        words = "the study template"
    else:
        background = figures.canonical(mask_img)
        words = "the analysis mask (the template file was not found)"
    if background.data.shape != mask.shape:
        return None
    space = settings.get("space") or {}
    return Place(
        background=background,
        background_words=words,
        mask=mask,
        origin=np.asarray(space.get("origin_mm", [0.0, 0.0, 0.0]), dtype=float),
        origin_name=str(space.get("origin_name", "origin")),
        connectivity=int((settings.get("inference") or {}).get("connectivity", 26)),
        outlines=_outlines(folder, result, mask.shape, fix),
        fix=fix,
    )


def _outlines(folder: Path, result: dict, shape, fix) -> tuple[tuple[str, np.ndarray], ...]:
    """The targets of ``targets.nii.gz`` with their names (summary.json), RAS+ order."""
    img = _load(folder / TARGETS_MAP, fix)
    labels = (result.get("targets_map") or {}).get("labels") or {}
    if img is None or not labels:
        return ()
    values = np.rint(figures.canonical(img).data).astype(int)
    if values.shape != shape:
        return ()
    return tuple((str(n), values == int(k)) for k, n in labels.items() if (values == int(k)).any())


def _surviving(
    folder: Path, stem: str, alpha: float, inside: np.ndarray, fix: np.ndarray
) -> np.ndarray | None:
    img = _load(folder / f"{stem}.nii.gz", fix)
    if img is None:
        return None
    return inside & (figures.canonical(img).data <= alpha)


def _montage(place: Place, overlay: np.ndarray, label: str, *, peaks: bool = True):
    """The montage figure, its peaks and its slices."""
    found = figures.cluster_peaks(overlay, place.connectivity) if peaks else []
    slices = figures.choose_slices(place.mask, found)
    figure = figures.coronal_montage(
        place.background,
        overlay,
        place.mask,
        place.origin,
        slices,
        label=label,
        origin_name=place.origin_name,
        outlines=place.outlines,
    )
    return figure, found, slices


def _slice_words(found, slices, place: Place) -> str:
    """The caption's account of the slices and the outlines."""
    through = sum(1 for s in slices if s.peaks)
    overview = len(slices) - through
    if found:
        more = len(found) - figures.MAX_PEAK_SLICES
        words = (
            f"{len(found)} connected part{'s' if len(found) != 1 else ''} of the shown "
            f"voxels, numbered by size (1 = largest; positive and negative apart; not the "
            "cluster numbers of clusters.tsv); a slice passes through the peak of "
            + ("each" if more <= 0 else f"the {figures.MAX_PEAK_SLICES} largest")
            + " (ring), labelled 'peak n'"
        )
        words += (
            f", with {overview} evenly spaced slice{'s' if overview != 1 else ''} for an overview"
        )
    else:
        words = f"{overview} evenly spaced slices"
    words += (
        f"; each slice is labelled with its anterior–posterior position in mm from "
        f"{place.origin_name}; left hemisphere on the left."
    )
    if place.outlines:
        words += " White outlines: " + ", ".join(n for n, _ in place.outlines) + " (targets)."
    return words


def _colour_words(low: float, high: float) -> str:
    return (
        f" Colour: orange positive, blue negative, lighter for larger |z| "
        f"(|z| from {low:.2f} to {high:.2f} shown)."
    )


def _map_figures(folder: Path, name: str, place: Place, threshold: Threshold) -> list[DrawnFigure]:
    """Coronal montage and dorsal/lateral projections of the thresholded z map."""
    z_img = _load(folder / "z.nii.gz", place.fix)
    if z_img is None:
        return []
    z = figures.canonical(z_img).data
    used = threshold
    keep = _surviving(folder, threshold.stem, threshold.alpha, place.mask, place.fix)
    fallback = ""
    if keep is None:
        keep = _surviving(folder, "q", threshold.alpha, place.mask, place.fix)
        used = Threshold("fdr", "q", f"FDR q ≤ {threshold.alpha:g}", threshold.alpha)
        fallback = f" ({threshold.words} maps are not in the folder; FDR is shown instead.)"
    overlay = np.where(keep, z, 0.0) if keep is not None else np.zeros_like(z)
    shown = int((overlay != 0).sum())
    nothing = "" if shown else " No voxel survives, so nothing is overlaid."
    low, high = figures.shown_range(overlay)
    colours = _colour_words(low, high) if shown else ""
    label = f"{Z_UNITS}, where {used.words}"
    figure, found, slices = _montage(place, overlay, label)
    out = [
        DrawnFigure(
            name,
            "montage",
            "Coronal slices through every cluster's peak",
            f"Coronal slices of {place.background_words} for {name}, with z shown where "
            f"{used.words} ({shown} voxels), through the peak of each connected part.",
            f"z where {used.words} ({shown} voxels), over {place.background_words}: "
            + _slice_words(found, slices, place)
            + colours
            + nothing
            + fallback,
            figure,
        )
    ]
    axes_mm = tuple(place.background.axis_mm(a) - place.origin[a] for a in range(3))
    out.append(
        DrawnFigure(
            name,
            "projections",
            "Dorsal and lateral views",
            f"Maximum-intensity views of the thresholded z map of {name}, seen from above "
            "and from the right, inside the outline of the analysis mask.",
            "The value of largest magnitude along each line of sight, over the brain's "
            f"silhouette (the mask's own projection); z where {used.words}." + colours + nothing,
            figures.projection_views(
                overlay,
                place.mask,
                place.background.step_mm,
                axes_mm,
                label=label,
                origin_name=place.origin_name,
            ),
        )
    )
    return out


def _asymmetry_figures(
    folder: Path, name: str, place: Place, threshold: Threshold
) -> list[DrawnFigure]:
    """The asymmetry test's surviving voxels (when any), and its unthresholded t map."""
    out: list[DrawnFigure] = []
    alpha = threshold.alpha
    tested = ""
    for stem, words in (
        ("asymmetry_p_fwe_tfce", f"TFCE, FWE p ≤ {alpha:g}"),
        ("asymmetry_p_fwe_voxel", f"voxel-wise FWE p ≤ {alpha:g}"),
    ):
        keep = _surviving(folder, stem, alpha, place.mask, place.fix)
        z_img = _load(folder / "asymmetry_z.nii.gz", place.fix)
        if keep is None or z_img is None:
            continue
        z = figures.canonical(z_img).data
        keep &= z != 0
        tested = words
        if keep.any():
            overlay = np.where(keep, z, 0.0)
            figure, found, slices = _montage(place, overlay, f"{Z_UNITS} of left − mirrored right")
            out.append(
                DrawnFigure(
                    name,
                    "asymmetry_surviving",
                    "Left–right asymmetry: voxels surviving the test",
                    f"Coronal slices of the voxels of {name} where left and mirrored right "
                    f"differ ({words}; {int(keep.sum())} voxels).",
                    f"z of each run's left minus its mirrored right side through the group "
                    f"model, where {words} ({int(keep.sum())} voxels); drawn on the left "
                    "half: orange where the left is larger, blue where the right is larger. "
                    + _slice_words(found, slices, place),
                    figure,
                )
            )
        break
    asym = _load(folder / "asymmetry_t.nii.gz", place.fix)
    if asym is not None:
        values = figures.canonical(asym).data
        if values.shape == place.mask.shape:
            overlay = np.where(place.mask, values, 0.0)
            figure, _found, slices = _montage(
                place, overlay, "t of left − mirrored right (unthresholded)", peaks=False
            )
            verdict = (
                ""
                if not tested
                else f" No voxel survives the asymmetry test ({tested})."
                if not out
                else f" The voxels surviving the test ({tested}) are in the figure above."
            )
            out.append(
                DrawnFigure(
                    name,
                    "asymmetry",
                    "Left–right asymmetry (unthresholded)",
                    f"Coronal slices of the unthresholded left-minus-right t map of {name}.",
                    "t of the left-minus-mirrored-right difference at each voxel of the left "
                    "half, unthresholded: exploratory, not a test at any voxel; orange where "
                    "the left is larger." + verdict,
                    figure,
                )
            )
    return out


def _symmetry_figures(name: str, frames: dict) -> list[DrawnFigure]:
    """Laterality indices and laterality against threshold."""
    out: list[DrawnFigure] = []
    sym = frames.get("symmetry")
    if sym is not None and "region" in sym:
        same = "li_extent_shortcut" in sym
        out.append(
            DrawnFigure(
                name,
                "laterality",
                "Laterality indices",
                f"Laterality index with its interval for each region of {name}.",
                "LI = (L − R)/(L + R) by extent (circles: voxels above the extent threshold) "
                "and by effect (diamonds: summed positive effect); 0 is perfect symmetry "
                "(symmetry.tsv). "
                + (
                    "Filled marker and bar: the bootstrap's estimate on the original animals "
                    "(li_*_shortcut, a group map of the animals' precision-weighted means) and "
                    "the 95% percentile interval of its replicates, one estimator for both. "
                    "Open marker: the LI of the fitted mixed-model maps (li_extent, li_effect), "
                    "which weighs animals by the fitted variances and so can differ; it is "
                    "not what the interval is about." + _outside_words(sym)
                    if same
                    else "Open markers: the LI of the fitted group maps; the bars are the "
                    "bootstrap intervals of a simpler group map (this folder predates the "
                    "column that gives that map's own LI), so a marker can lie outside its bar."
                ),
                figures.laterality_plot(sym),
            )
        )
    curves = frames.get("li_curves")
    if curves is not None and {"region", "threshold", "li"} <= set(curves):
        out.append(
            DrawnFigure(
                name,
                "li_curves",
                "Laterality against threshold",
                f"Laterality index as a function of the z threshold for each region of {name}.",
                "A laterality index that changes sign or size with the threshold is not a "
                "stable property of the map (li_curves.tsv).",
                figures.li_curve_plot(curves),
            )
        )
    return out


def _outside_words(sym) -> str:
    """The caption's warning for each bootstrap estimate outside its own interval."""
    outside = []
    for column, words, _marker in figures.LI_KINDS:
        point = f"{column}_shortcut"
        if not {point, f"{column}_low", f"{column}_high"} <= set(sym):
            continue
        for _, row in sym.iterrows():
            value, low, high = (
                float(pd.to_numeric(row[k], errors="coerce"))
                for k in (point, f"{column}_low", f"{column}_high")
            )
            if np.isfinite(value) and np.isfinite(low) and (value < low or value > high):
                outside.append(
                    f"{row['region']} ({words}: {value:.2f} outside {low:.2f} to {high:.2f})"
                )
    if not outside:
        return ""
    return (
        " The bootstrap estimate lies outside its own interval for "
        + "; ".join(outside)
        + ": its replicates are shifted away from it (an LI is bounded at ±1 and, by extent, "
        "counts voxels over a threshold, so near ±1 resampled animals pull it towards 0); "
        "that interval is biased and says little about the uncertainty."
    )


def _variance_caption(var_animal: np.ndarray, var_run: np.ndarray, name: str) -> str:
    """The variance figure's caption: only what the medians and shares support."""
    share = figures.variance_share(var_animal, var_run)
    tau2, sigma2 = float(np.median(var_animal)), float(np.median(var_run))
    words = (
        f"τ (between animals) and σ (between runs beyond first-level noise) of {name} over "
        f"the {var_animal.size:,} analysed voxels; medians τ² = {tau2:.3g}, σ² = {sigma2:.3g}."
    )
    zero = float(np.mean(var_animal <= 0)) if var_animal.size else 0.0
    if zero >= 0.5:
        return words + (
            f" τ² is estimated at 0 at {zero:.0%} of the voxels: there the animals differ "
            "no more than their runs lead one to expect, which with few animals does not "
            "show that they do not differ."
        )
    median_share = float(np.median(share)) if share.size else float("nan")
    if median_share > DOMINANT_SHARE:
        return words + (
            f" τ² is the larger part at most voxels (median share {median_share:.2f}): "
            "there more animals reduce the group's error more than more runs per animal."
        )
    if np.isfinite(median_share):
        return words + (
            f" σ² is the larger part at most voxels (median τ² share {median_share:.2f}): "
            "there more runs per animal help nearly as much as more animals."
        )
    return words


def more_levels_text(components: dict) -> str:
    """Plain words on the variance levels fitted beyond τ² and σ² (session level, random
    slopes, per-group animal variances), with their medians over voxels; "" when none."""
    parts = []
    for name, info in components.items():
        median = (info or {}).get("median")
        value = "n/a" if median is None else f"{median:.3g}"
        slope = re.fullmatch(r"slope\[(.+?)\](?:\[(.+)\])?", name)
        group = re.fullmatch(r"animal\[(.+)\]", name)
        if name == "session":
            parts.append(
                f"ω² (between sessions of one animal: how much the response changes from "
                f"one imaging day to the next beyond run-to-run noise) median {value}; "
                "where it is large, more sessions per animal help more than more runs in "
                "the same session"
            )
        elif slope:
            where = f" in group {slope.group(2)}" if slope.group(2) else ""
            parts.append(
                f"variance of the {slope.group(1)} slope{where} (how much the animals' own "
                f"{slope.group(1)} effects differ from one animal to the next; a "
                f"within-animal effect is judged against it) median {value}"
            )
        elif group:
            parts.append(f"τ² of group {group.group(1)} median {value}")
    if not parts:
        return ""
    return " Also fitted: " + "; ".join(parts) + "."


def _variance_figures(folder: Path, name: str, result: dict, fix: np.ndarray) -> list[DrawnFigure]:
    """Histograms of the variance components over the analysed voxels."""
    mask_img = _load(folder / "mask.nii.gz", fix)
    var_animal = _load(folder / "var_animal.nii.gz", fix)
    var_run = _load(folder / "var_run.nii.gz", fix)
    if mask_img is None or var_animal is None or var_run is None:
        return []
    m = np.asarray(mask_img.dataobj) > 0
    tau2 = np.asarray(var_animal.dataobj, dtype=float)[m]
    sigma2 = np.asarray(var_run.dataobj, dtype=float)[m]
    return [
        DrawnFigure(
            name,
            "variance",
            "Variance components",
            f"Histograms over voxels of the between-animal and between-run standard "
            f"deviations of {name}, and of the between-animal share of variance.",
            _variance_caption(tau2, sigma2, name)
            + more_levels_text(result.get("variance_components") or {}),
            figures.variance_plot(tau2, sigma2, unit="map units"),
        )
    ]


def _run_quality_figures(name: str, result: dict, frames: dict) -> list[DrawnFigure]:
    """Each run's robust z on the three quality numbers."""
    quality = frames.get("run_quality")
    if quality is None or not {"z_correlation", "z_variance"} <= set(quality):
        return []
    summary = ((result.get("questions") or {}).get("run_quality")) or {}
    threshold = float(summary.get("threshold", DEFAULT_OUTLIER_Z))
    where = summary.get("correlation_where")
    if where is None and "correlation_where" in quality and len(quality):
        where = str(quality["correlation_where"].iloc[0])
    where_words = (
        f"measured {where}"
        if where
        else "measured over the whole analysed brain (this folder predates the choice of voxels)"
    )
    flagged = int(
        quality["flagged"].astype(str).str.lower().isin(["true", "1", "yes"]).sum()
        if "flagged" in quality
        else 0
    )
    return [
        DrawnFigure(
            name,
            "run_quality",
            "Run quality",
            f"Strips of each run's robust z for agreement with the group map, mean variance "
            f"and edge-rim score for {name}; {flagged} flagged runs are numbered crosses.",
            "Robust z across runs (median and scaled MAD) of three numbers per run "
            "(run_quality.tsv): the agreement is the correlation of the run's effect map "
            f"with the group map fitted without its animal, {where_words}; the mean "
            "first-level variance; the edge-rim score (mean |effect| in the brain's edge "
            f"shell over that inside). Runs beyond ±{threshold:g} on any number are "
            f"flagged ({flagged}), numbered, and listed at the right.",
            figures.run_quality_plot(quality, threshold),
        )
    ]


def _forest(name: str, result: dict, frames: dict) -> DrawnFigure | None:
    """Per-animal effects in the target (consistency.tsv), else in the peak region."""
    cons = frames.get("consistency")
    questions = result.get("questions") or {}
    if cons is not None and {"animal", "effect", "ci_low", "ci_high"} <= set(cons):
        eff = cons["effect"].astype(float).to_numpy()
        q = questions.get("consistency") or {}
        region = q.get("region")
        group = None
        if all(k in q for k in ("effect", "ci_low", "ci_high")):
            group = (float(q["effect"]), float(q["ci_low"]), float(q["ci_high"]))
        what = f"in {region}" if region else "in the target"
        return DrawnFigure(
            name,
            "forest",
            "Per-animal effect",
            f"Forest plot of each animal's effect {what} for {name}, with intervals.",
            f"Each animal's effect {what} with its interval (consistency.tsv)"
            + ("; the diamond is the group estimate." if group else "."),
            figures.forest_plot(
                cons["animal"].astype(str).tolist(),
                eff,
                cons["ci_low"].astype(float).to_numpy(),
                cons["ci_high"].astype(float).to_numpy(),
                group=group,
                xlabel="effect (map units)",
            ),
        )
    return _forest_from_regions(name, frames)


def _forest_from_regions(name: str, frames: dict) -> DrawnFigure | None:
    """Per-animal effects in the peak region of the largest cluster (animals.tsv)."""
    animals, clusters, regions = (frames.get(k) for k in ("animals", "clusters", "regions"))
    if animals is None or clusters is None or regions is None or not len(clusters):
        return None
    top = clusters.iloc[0]
    region, hemi = top.get("peak_region"), top.get("peak_region_hemisphere")
    if not isinstance(region, str):
        return None
    sel = animals[(animals["name"] == region) & (animals["hemisphere"] == hemi)]
    reg = regions[(regions["name"] == region) & (regions["hemisphere"] == hemi)]
    if not len(sel):
        return None
    eff = sel["effect"].astype(float).to_numpy()
    se = sel["se"].astype(float).to_numpy()
    group = None
    if len(reg):
        r = reg.iloc[0]
        group = (float(r["effect"]), float(r["ci_low"]), float(r["ci_high"]))
    return DrawnFigure(
        name,
        "forest",
        "Per-animal effect",
        f"Forest plot of each animal's effect in {region} ({hemi}), the peak region of the "
        f"largest cluster of {name}.",
        f"Each animal's precision-weighted effect in {region} ({hemi}), the peak region of "
        "the largest cluster, ± 1.96 SE (animals.tsv); the diamond is the group effect "
        "with its 95% CI from the region model (regions.tsv).",
        figures.forest_plot(
            sel["animal"].astype(str).tolist(),
            eff,
            eff - 1.96 * se,
            eff + 1.96 * se,
            group=group,
            xlabel=f"effect in {region} ({hemi}), map units",
        ),
    )
