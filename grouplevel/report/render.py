"""The HTML report: one self-contained file rendered from a finished output folder.

:func:`render_report` reads ``summary.json``, the result folders' maps and tables and
the template/mask recorded in the settings, draws the figures, and renders
``templates/report.html.j2`` (shipped as package ``grouplevel.templates``) with jinja2.
Nothing is refitted, so ``grouplevel report DIR`` can re-render after a template edit
or with a new title.

The page is organised around the questions a reader asks of each contrast (is there a
response, where, is it bilateral, specific, consistent?), then the study, maps,
tables, figures, cautions and methods. Figures are base64 PNGs and the CSS is inline;
the slice browser (:mod:`grouplevel.report.browser`) adds its own inline data and
script; the page loads nothing from the network (a Content-Security-Policy built from
the hashes of the page's own inline blocks forbids it).
Autoescaping is on: every string from the user's files (titles, animal IDs, region
names) is escaped.
"""

from __future__ import annotations

import base64
import datetime as _dt
import re
import time
from importlib import resources
from pathlib import Path

import jinja2
import nibabel as nib
import numpy as np

from grouplevel.outputs.folder import require_grouplevel_output
from grouplevel.outputs.records import (
    locate_input,
    read_plans,
    read_report_options,
    write_report_options,
)
from grouplevel.outputs.summary import present_files, read_summary, result_names
from grouplevel.planning.plan import design_text
from grouplevel.report import figures
from grouplevel.report.browser import (
    apply_content_security_policy,
    browser_context,
    policy_placeholder,
)
from grouplevel.report.methods import header_sentence, methods_text
from grouplevel.report.tables import (
    STAT,
    P,
    TableView,
    format_value,
    read_tsv,
    result_table_views,
)
from grouplevel.report.words import count, mean_count, place

#: Maps whose surviving voxels define the overlay, per ``[clusters] method``.
_METHOD_MAP = {
    "tfce": "p_fwe_tfce",
    "voxel": "p_fwe_voxel",
    "cluster_extent": "p_fwe_cluster",
    "cluster_mass": "p_fwe_cluster_mass",
    "fdr": "q",
}
_METHOD_LABEL = {
    "tfce": "TFCE, FWE p ≤ {a}",
    "voxel": "voxel-wise FWE p ≤ {a}",
    "cluster_extent": "cluster extent, FWE p ≤ {a}",
    "cluster_mass": "cluster mass, FWE p ≤ {a}",
    "fdr": "FDR q ≤ {a}",
}
#: Tables shown in the report (the per-animal region table is in tables/ only: it has a
#: row per animal and region).
REPORT_TABLES = ("clusters", "regions", "symmetry", "specificity", "consistency", "run_quality")
MAX_WHERE = 3  # clusters named in the short answer


def _environment() -> jinja2.Environment:
    loader = jinja2.FunctionLoader(
        lambda name: (
            resources.files("grouplevel.templates").joinpath(name).read_text(encoding="utf-8")
        )
    )
    # autoescape=True for every template: select_autoescape would not match "*.html.j2".
    env = jinja2.Environment(
        loader=loader,
        autoescape=True,
        trim_blocks=True,
        lstrip_blocks=True,
        undefined=jinja2.StrictUndefined,
    )
    env.filters["stat"] = lambda v: format_value(v, STAT)
    env.filters["pval"] = lambda v: format_value(v, P)
    env.globals["zip"] = zip
    return env


def _data_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _figure(key: str, title: str, png: bytes, alt: str, caption: str) -> dict:
    return {"key": key, "title": title, "src": _data_uri(png), "alt": alt, "caption": caption}


def _method(summary: dict, result: dict) -> str:
    if result.get("clusters") and result["clusters"].get("method"):
        return str(result["clusters"]["method"])
    settings = summary.get("settings") or {}
    chosen = (settings.get("clusters") or {}).get("method")
    if chosen:
        return str(chosen)
    inf = settings.get("inference") or {}
    if not inf.get("permutations"):
        return "fdr"
    return "tfce" if inf.get("tfce", True) else "cluster_mass"


def _load(
    path: Path, header_to_true: np.ndarray | None = None
) -> nib.spatialimages.SpatialImage | None:
    """A map of the folder, placed in true mm when the headers were declared scaled or
    their axes exchanged (``header_to_true``, from summary.json's grid)."""
    if not path.is_file():
        return None
    img = nib.load(str(path))
    if header_to_true is None or np.array_equal(header_to_true, np.eye(4)):
        return img
    return nib.Nifti1Image(np.asanyarray(img.dataobj), header_to_true @ img.affine)


def _header_to_true(summary: dict) -> np.ndarray:
    """The headers → true mm matrix of a finished folder (identity for true headers)."""
    matrix = (summary.get("grid") or {}).get("header_to_true")
    return np.eye(4) if matrix is None else np.asarray(matrix, dtype=float)


def _surviving_count(result: dict, method: str) -> int | None:
    inf = result.get("inference") or {}
    if method == "fdr":
        return (inf.get("fdr") or {}).get("surviving_voxels")
    surviving = (inf.get("permutation") or {}).get("surviving") or {}
    value = surviving.get(method)
    if isinstance(value, dict):
        return value.get("voxels")
    return value


def _stereotaxic(mm: list[float], origin: list[float]) -> tuple[float, float, float]:
    """AP, ML, DV from world mm (RAS+) and the origin."""
    return (mm[1] - origin[1], mm[0] - origin[0], mm[2] - origin[2])


def _reasons(value) -> str:
    if value is None:
        return ""
    if isinstance(value, list | tuple):
        return "; ".join(str(v).strip().rstrip(".") for v in value if str(v).strip())
    return str(value).strip().rstrip(".")


def _answer(name: str, result: dict, summary: dict, views: dict[str, TableView], frames) -> dict:
    """The short answer for one contrast: a list of (question, answer) pairs."""
    settings = summary.get("settings") or {}
    alpha = (settings.get("inference") or {}).get("alpha", 0.05)
    space = settings.get("space") or {}
    origin = space.get("origin_mm", [0.0, 0.0, 0.0])
    origin_name = space.get("origin_name", "origin")
    method = _method(summary, result)
    method_words = _METHOD_LABEL[method].format(a=alpha) if method in _METHOD_LABEL else method
    items: list[tuple] = []  # (question, verdict in bold, the numbers[, more reasons])
    n_voxels = _surviving_count(result, method)
    peak = result.get("peak") or {}
    peak_text = ""
    if peak:
        ap, ml, dv = _stereotaxic(peak["mm"], origin)
        peak_text = (
            f"strongest voxel t = {peak['t']:.2f} (effect {peak['effect']:.2f}) at "
            f"AP {ap:+.2f}, ML {ml:+.2f}, DV {dv:+.2f} mm from {origin_name}"
        )
    items.append(_present_item(result, n_voxels, method_words, peak_text))
    items += _where_items(frames.get("clusters"), n_voxels, peak, peak_text)
    questions = result.get("questions") or {}
    items += _bilateral_items(questions, views, frames)
    items += _question_items(questions, frames)
    unasked = _unasked(result, questions, frames)
    # every item as (question, verdict, text, further reasons shown folded)
    items = [(*item, []) if len(item) == 3 else item for item in items]
    label = result.get("first_level_contrast") or name
    group = result.get("group_contrast", "mean")
    return {
        "name": name,
        "heading": f"{label}" + (f" — {group}" if group and group != "mean" else ""),
        "items": items,
        "unasked": unasked,
        "animals": result.get("animals"),
        "runs": result.get("runs"),
        "method": method_words,
    }


def _present_item(result: dict, n_voxels, method_words: str, peak_text: str) -> tuple:
    """Present? — how many voxels and clusters survive, and the strongest voxel."""
    n_clusters = (result.get("clusters") or {}).get("significant_clusters")
    if n_voxels:
        count = f"{n_voxels:,} voxels survive {method_words}"
        if n_clusters is not None:
            count += f", in {n_clusters} significant cluster{'s' if n_clusters != 1 else ''}"
        return ("Present?", "Yes", "; ".join(t for t in (count, peak_text) if t) + ".")
    detail = "; ".join(t for t in (f"no voxel survives {method_words}", peak_text) if t)
    return ("Present?", "No", detail + ".")


def _where_items(clusters, n_voxels, peak: dict, peak_text: str) -> list[tuple]:
    """Where? — the largest clusters by their peak region, else the strongest voxel."""
    items: list[tuple[str, str, str]] = []
    if clusters is not None and len(clusters):
        mains = clusters[clusters["peak"].astype(str) == "1"].head(MAX_WHERE)
        places = []
        for _, row in mains.iterrows():
            where = place(row.get("peak_region"), row.get("peak_region_hemisphere"))
            n_vox = int(float(row["voxels"]))
            places.append(
                f"{where}, {count(n_vox, 'voxel')}, "
                f"peak z = {float(row['z']):.2f} at AP {float(row['peak_AP_mm']):+.2f} mm"
            )
        more = len(clusters[clusters["peak"].astype(str) == "1"]) - len(mains)
        text = "; ".join(places) + (f"; and {more} more" if more > 0 else "")
        items.append(("Where?", "", text + "."))
    elif n_voxels and peak:
        items.append(("Where?", "", f"around the strongest voxel ({peak_text.split(' at ')[-1]})."))
    return items


def _bilateral_items(questions: dict, views: dict[str, TableView], frames) -> list[tuple]:
    """Bilateral? — each region pair's symmetry verdict with its reasons."""
    items: list[tuple[str, str, str]] = []
    symmetry = questions.get("symmetry")
    if isinstance(symmetry, dict) and symmetry:
        parts, more = [], []
        for region, v in symmetry.items():
            if isinstance(v, dict):
                reasons = _reasons(v.get("reasons"))
                side = f", {v['side']}" if v.get("side") else ""
                parts.append(f"{region}: {v.get('verdict', 'no verdict')}{side}")
                if reasons:
                    more.append(f"{region}: {reasons}.")
        difference = questions.get("contrast_kind") == "difference"
        question = "Lateralisation differs?" if difference else "Bilateral?"
        items.append((question, "", "; ".join(parts) + ".", more))
    elif "symmetry" in views:
        sym = frames["symmetry"]
        if "verdict" in sym:
            parts = [f"{r['region']}: {r['verdict']}" for _, r in sym.iterrows()]
            items.append(("Bilateral?", "", "; ".join(parts) + "."))
    return items


def _question_items(questions: dict, frames) -> list[tuple]:
    """Specific?, Consistent? and Runs? — the verdicts of the other questions."""
    items: list[tuple] = []
    for key, label in (("specificity", "Specific?"), ("consistency", "Consistent?")):
        q = questions.get(key)
        if isinstance(q, dict) and q.get("verdict") is not None:
            gist, more = _gist(key, q)
            items.append((label, str(q["verdict"]), gist, more))
    if "consistency" in frames and not (
        isinstance(questions.get("consistency"), dict) and questions["consistency"].get("verdict")
    ):
        cons = frames["consistency"]
        if "positive" in cons:
            pos = cons["positive"].astype(str).str.lower().isin(["true", "1", "yes"]).sum()
            items.append(
                ("Consistent?", "", f"{pos} of {len(cons)} animals show a positive effect.")
            )
    quality = questions.get("run_quality")
    if isinstance(quality, dict) and quality.get("verdict") is not None:
        listed = _reason_list(quality.get("reasons"))
        names = ", ".join(r.split(":")[0] for r in listed)
        items.append(("Runs?", str(quality["verdict"]), f"{names}." if listed else "", listed))
    return items


def _reason_list(value) -> list[str]:
    if value is None:
        return []
    if isinstance(value, list | tuple):
        return [str(v).strip().rstrip(".") + "." for v in value if str(v).strip()]
    return [str(value).strip().rstrip(".") + "."]


def _gist(key: str, answer: dict) -> tuple[str, list[str]]:
    """One sentence that carries a verdict, and the rest of its reasons (shown folded).

    Specificity: the first reason (where the surviving activation lies), with the
    artefact flag when there is one. Consistency: how many animals agree and how many
    have a CI clear of zero, from the numbers of summary.json.
    """
    reasons = _reason_list(answer.get("reasons"))
    if key == "consistency" and answer.get("animals_counted"):
        agreeing = answer.get("animals_agreeing", answer.get("animals_positive"))
        clear = answer.get("animals_ci_clear_of_zero")
        sign = answer.get("sign") or "response's"
        total = answer["animals_counted"]
        gist = f"{agreeing} of {total} animals have a target effect of the {sign} sign"
        if clear is not None:
            gist += f"; {clear} of them a 95% CI clear of 0"
        return gist + ".", reasons
    if not reasons:
        return "", []
    gist = reasons[0]
    flag = str(answer.get("flag") or "").strip()
    if flag and flag not in gist:
        gist += " " + flag.rstrip(".") + "."
    return gist, reasons[1:]


#: The questions the short answer lists, as summary.json keys and the report's words.
_QUESTION_WORDS = (
    ("symmetry", "bilateral"),
    ("specificity", "specific"),
    ("consistency", "consistent"),
    ("run_quality", "run quality"),
)


def _unasked(result: dict, questions: dict, frames) -> list[str]:
    """Each question not answered in this result, with the reason summary.json gives."""
    reasons = questions.get("not_assessed") or {}
    out = []
    for key, word in _QUESTION_WORDS:
        if questions.get(key) or key in frames:
            continue
        if key == "run_quality" and not reasons.get(key):
            continue  # older folders did not record run quality for every result
        reason = reasons.get(key) or (
            "no reason recorded (this folder was written by an older version, which asked "
            "the questions only of the mean of an intercept-only design)"
        )
        out.append(f"{word} — {reason}")
    return out


def _overlay(
    folder: Path, method: str, alpha: float, fix: np.ndarray
) -> tuple[np.ndarray | None, str, str]:
    """z inside the voxels surviving ``method`` (FDR q when that map is missing)."""
    z_img = _load(folder / "z.nii.gz", fix)
    if z_img is None:
        return None, method, ""
    z = figures.canonical(z_img).data
    stem = _METHOD_MAP.get(method, "q")
    p_img = _load(folder / f"{stem}.nii.gz", fix)
    used = method
    if p_img is None:
        p_img, used = _load(folder / "q.nii.gz", fix), "fdr"
    mask_img = _load(folder / "mask.nii.gz", fix)
    inside = figures.canonical(mask_img).data > 0 if mask_img is not None else z != 0
    if p_img is None:
        return np.zeros_like(z), used, ""
    p = figures.canonical(p_img).data
    keep = inside & (p <= alpha)
    return np.where(keep, z, 0.0), used, _METHOD_LABEL.get(used, used).format(a=alpha)


def _background(summary: dict, folder: Path) -> tuple[figures.Volume | None, str]:
    template = locate_input(_template_setting(summary), summary, folder.parent)
    fix = _header_to_true(summary)
    if template is not None:
        return figures.canonical(_load(template, fix)), "the study template"
    mask = _load(folder / "mask.nii.gz", fix)
    if mask is None:
        return None, ""
    return figures.canonical(mask), "the analysis mask (the template file was not found)"


def _template_setting(summary: dict) -> str | None:
    return ((summary.get("settings") or {}).get("study") or {}).get("template")


def missing_inputs(out_dir: Path) -> list[str]:
    """What the report of ``out_dir`` cannot find of the study's inputs, in words.

    The template is drawn under the maps; when it is neither where the run read it nor
    where it would be had the study and its outputs moved together, the figures fall
    back to the analysis mask, and ``grouplevel report`` says so.
    """
    summary = read_summary(out_dir)
    template = _template_setting(summary)
    if template and locate_input(template, summary, out_dir) is None:
        return [
            f"the template {template} was not found (did the study folder move without "
            "its output folder?); the maps are drawn on the analysis mask"
        ]
    return []


def _result_figures(out_dir: Path, name: str, result: dict, summary: dict, frames) -> list[dict]:
    """Every figure of one result folder, in the order the report shows them."""
    settings = summary.get("settings") or {}
    alpha = (settings.get("inference") or {}).get("alpha", 0.05)
    space = settings.get("space") or {}
    origin = np.asarray(space.get("origin_mm", [0.0, 0.0, 0.0]), dtype=float)
    origin_name = space.get("origin_name", "origin")
    folder = out_dir / name
    figs: list[dict] = []
    method = _method(summary, result)
    fix = _header_to_true(summary)
    overlay, used, used_words = _overlay(folder, method, alpha, fix)
    background, background_words = _background(summary, folder)
    mask_img = _load(folder / "mask.nii.gz", fix)
    if background is not None and mask_img is not None:
        place = (background, figures.canonical(mask_img).data > 0, origin, origin_name)
        if overlay is not None:
            figs += _map_figures(name, place, overlay, method, used, used_words, background_words)
        figs += _asymmetry_figures(folder, name, place, fix)
    figs += _symmetry_figures(name, frames)
    forest = _forest(name, result, frames)
    if forest is not None:
        figs.append(forest)
    if mask_img is not None:
        figs += _variance_figures(folder, name, result, mask_img)
    figs += _run_quality_figures(name, frames)
    return figs


def _map_figures(name, place, overlay, method, used, used_words, background_words) -> list[dict]:
    """Coronal montage and dorsal/lateral projections of the thresholded z map."""
    background, mask, origin, origin_name = place
    figs: list[dict] = []
    if background.data.shape == mask.shape:
        shown = int((overlay != 0).sum())
        nothing = "" if shown else " No voxel survives, so nothing is overlaid."
        fallback = (
            f" ({method} maps are not in the folder; FDR is shown instead.)"
            if used != method
            else ""
        )
        figs.append(
            _figure(
                "montage",
                "Coronal slices, anterior to posterior",
                figures.coronal_montage(
                    background,
                    overlay,
                    mask,
                    origin,
                    label=f"z ({used_words})",
                    origin_name=origin_name,
                ),
                f"Coronal slices of {background_words} for {name}, from anterior to "
                f"posterior, with z shown where {used_words} ({shown} voxels).",
                f"z where {used_words}, over {background_words}; each slice is labelled "
                f"with its anterior–posterior position in mm from {origin_name}."
                + nothing
                + fallback,
            )
        )
        axes_mm = tuple(background.axis_mm(a) - origin[a] for a in range(3))
        figs.append(
            _figure(
                "projections",
                "Dorsal and lateral views",
                figures.projection_views(
                    overlay,
                    mask,
                    background.step_mm,
                    axes_mm,
                    label=f"z ({used_words})",
                    origin_name=origin_name,
                ),
                f"Maximum-intensity views of the thresholded z map of {name}, seen from "
                "above and from the right, drawn inside the outline of the analysis mask.",
                "The value of largest magnitude along each line of sight, inside the "
                f"brain outline (the mask's own projection); z where {used_words}." + nothing,
            )
        )
    return figs


def _asymmetry_figures(folder: Path, name: str, place, fix: np.ndarray) -> list[dict]:
    """The unthresholded left-minus-right t map, when the folder holds it."""
    background, mask, origin, origin_name = place
    figs: list[dict] = []
    asym = _load(folder / "asymmetry_t.nii.gz", fix)
    if asym is not None:
        values = figures.canonical(asym).data
        if values.shape == mask.shape == background.data.shape:
            figs.append(
                _figure(
                    "asymmetry",
                    "Left–right asymmetry (unthresholded)",
                    figures.coronal_montage(
                        background,
                        np.where(mask, values, 0.0),
                        mask,
                        origin,
                        label="t of left − right (unthresholded)",
                        origin_name=origin_name,
                    ),
                    f"Coronal slices of the unthresholded left-minus-right t map of {name}.",
                    "t of the left-minus-right difference at mirrored voxels, unthresholded: "
                    "exploratory, not a test at any voxel.",
                )
            )
    return figs


def _symmetry_figures(name: str, frames) -> list[dict]:
    """Laterality indices and laterality against threshold."""
    figs: list[dict] = []
    if "symmetry" in frames and "region" in frames["symmetry"]:
        figs.append(
            _figure(
                "laterality",
                "Laterality indices",
                figures.laterality_plot(frames["symmetry"]),
                f"Laterality index with its interval for each region of {name}.",
                "LI = (L − R)/(L + R) by extent (circles) and by effect (diamonds) with their "
                "intervals from symmetry.tsv; 0 is perfect symmetry.",
            )
        )
    if "li_curves" in frames and {"region", "threshold", "li"} <= set(frames["li_curves"]):
        figs.append(
            _figure(
                "li_curves",
                "Laterality against threshold",
                figures.li_curve_plot(frames["li_curves"]),
                f"Laterality index as a function of the threshold for each region of {name}.",
                "A laterality index that changes sign or size with the threshold is not a "
                "stable property of the map (li_curves.tsv).",
            )
        )
    return figs


def _variance_figures(folder: Path, name: str, result: dict, mask_img) -> list[dict]:
    """Histograms of the variance components over the analysed voxels."""
    figs: list[dict] = []
    var_animal = _load(folder / "var_animal.nii.gz")
    var_run = _load(folder / "var_run.nii.gz")
    if var_animal is not None and var_run is not None:
        m = np.asarray(mask_img.dataobj) > 0
        figs.append(
            _figure(
                "variance",
                "Variance components",
                figures.variance_plot(
                    np.asarray(var_animal.dataobj, dtype=float)[m],
                    np.asarray(var_run.dataobj, dtype=float)[m],
                    unit="map units",
                ),
                f"Histograms over voxels of the between-animal and between-run standard "
                f"deviations of {name}, and of the between-animal share of variance.",
                f"τ (between animals) and σ (between runs beyond first-level noise) over the "
                f"{int(m.sum()):,} analysed voxels; medians τ² = "
                f"{result.get('var_animal_median', float('nan')):.3g}, σ² = "
                f"{result.get('var_run_median', float('nan')):.3g}. Many animals are worth "
                "more than many runs where τ² dominates."
                + _more_levels_text(result.get("variance_components") or {}),
            )
        )
    return figs


def _more_levels_text(components: dict) -> str:
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


def _run_quality_figures(name: str, frames) -> list[dict]:
    """Each run's similarity to the group map against its variance."""
    figs: list[dict] = []
    if "run_quality" in frames and {"z_correlation", "z_variance"} <= set(frames["run_quality"]):
        figs.append(
            _figure(
                "run_quality",
                "Run quality",
                figures.run_quality_plot(frames["run_quality"]),
                f"Scatter of each run's similarity to the group map against its variance for "
                f"{name}; flagged runs are marked with crosses and labelled.",
                "Each run's correlation with the group map and its mean first-level variance, "
                "as z across runs (run_quality.tsv).",
            )
        )
    return figs


def _forest(name: str, result: dict, frames) -> dict | None:
    cons = frames.get("consistency")
    questions = result.get("questions") or {}
    if cons is not None and {"animal", "effect", "ci_low", "ci_high"} <= set(cons):
        eff = cons["effect"].astype(float).to_numpy()
        region = (questions.get("consistency") or {}).get("region")
        group = None
        q = questions.get("consistency") or {}
        if all(k in q for k in ("effect", "ci_low", "ci_high")):
            group = (float(q["effect"]), float(q["ci_low"]), float(q["ci_high"]))
        what = f"in {region}" if region else "in the target"
        return _figure(
            "forest",
            "Per-animal effect",
            figures.forest_plot(
                cons["animal"].astype(str).tolist(),
                eff,
                cons["ci_low"].astype(float).to_numpy(),
                cons["ci_high"].astype(float).to_numpy(),
                group=group,
                xlabel="effect (map units)",
            ),
            f"Forest plot of each animal's effect {what} for {name}, with intervals.",
            f"Each animal's effect {what} with its interval (consistency.tsv)"
            + ("; the diamond is the group estimate." if group else "."),
        )
    animals = frames.get("animals")
    clusters = frames.get("clusters")
    regions = frames.get("regions")
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
    return _figure(
        "forest",
        "Per-animal effect",
        figures.forest_plot(
            sel["animal"].astype(str).tolist(),
            eff,
            eff - 1.96 * se,
            eff + 1.96 * se,
            group=group,
            xlabel=f"effect in {region} ({hemi}), map units",
        ),
        f"Forest plot of each animal's effect in {region} ({hemi}), the peak region of the "
        f"largest cluster of {name}.",
        f"Each animal's precision-weighted effect in {region} ({hemi}), the peak region of "
        "the largest cluster, ± 1.96 SE (animals.tsv); the diamond is the group effect "
        "with its 95% CI from the region model (regions.tsv).",
    )


def _cautions(name: str, result: dict, summary: dict, method_words: str) -> list[str]:
    settings = summary.get("settings") or {}
    inf_settings = settings.get("inference") or {}
    alpha = inf_settings.get("alpha", 0.05)
    out = []
    n_animals, n_runs = result.get("animals"), result.get("runs")
    out.append(
        f"The group estimate rests on {n_animals} animals ({n_runs} runs). Runs of one "
        "animal are not independent replicates: the number of animals is the sample size, "
        "and a result from few animals generalises to the population only loosely."
    )
    inf = result.get("inference") or {}
    perm = inf.get("permutation")
    df_range = result.get("df_range") or []
    df_words = (
        f"df {df_range[0]:g}"
        if df_range and df_range[0] == df_range[1]
        else f"df {df_range[0]:g}–{df_range[1]:g}"
        if df_range
        else "their df"
    )
    if perm:
        smallest = float(perm["smallest_attainable_p"])
        out.append(
            f"The uncorrected p-values are parametric (t with {df_words}); the FWE p-values "
            f"come from {perm['permutations']} {perm['kind']}"
            + (" (all there are)" if perm.get("exhaustive") else " (drawn at random)")
            + f", so no FWE p can be below the smallest attainable p = {smallest:.3g}."
        )
        if smallest > alpha:
            out.append(
                f"The smallest attainable p ({smallest:.3g}) is above α = {alpha:g}: no "
                "voxel or cluster can reach significance by permutation; more animals are "
                "needed."
            )
    else:
        out.append(
            f"No permutation test was run: the map is thresholded by FDR (q ≤ {alpha:g}), "
            "which bounds the expected share of false voxels among those shown, not the "
            "chance of any false voxel; all p-values are parametric "
            f"(t with {df_words})."
        )
    method = _method(summary, result)
    out += _uncorrected_cautions(result, method, method_words)
    if method in ("cluster_extent", "cluster_mass"):
        out.append(
            "A significant cluster says the effect is non-zero somewhere in it, not at each "
            "of its voxels: cluster inference does not localise within a cluster."
        )
    if result.get("not_converged_voxels"):
        out.append(
            f"The REML fit reached its iteration limit at {result['not_converged_voxels']} "
            "voxel(s); their estimates are the last iterate."
        )
    excluded = result.get("excluded_runs") or []
    if excluded:
        out.append(
            f"{len(excluded)} run(s) were excluded before fitting (listed under The study); "
            "the result holds for the runs kept."
        )
    answered = result.get("questions") or {}
    if any(answered.get(k) for k in ("symmetry", "specificity", "consistency")):
        out.append(
            "Each verdict (bilateral, specific, consistent) is a summary by the stated rules "
            "and the numbers beside it, not a separate test: read the reasons with it."
        )
    # what the questions' own answers say they do not show, and which model they used
    consistency = answered.get("consistency")
    if isinstance(consistency, dict) and consistency.get("caution"):
        out.append(str(consistency["caution"]))
    out.extend(str(note) for note in answered.get("notes") or [])
    if not _surviving_count(result, method):
        out.append(
            f"No voxel survives {method_words}; absence of a significant effect is not "
            "evidence that there is no effect."
        )
    for w in summary.get("warnings") or []:
        if str(w).startswith(f"{name}:"):
            out.append(str(w))
    return out


def _uncorrected_cautions(result: dict, method: str, method_words: str) -> list[str]:
    """The count of voxels with uncorrected p < 0.001, and why it may be below the count
    that survives a corrected threshold (TFCE and FDR do not need p < 0.001 at a voxel)."""
    uncorrected = result.get("voxels_p_below_0.001_uncorrected")
    if uncorrected is None:
        return []
    out = [
        f"{count(uncorrected, 'voxel')} {'has' if uncorrected == 1 else 'have'} uncorrected "
        "p < 0.001; a map thresholded without correction is exploratory and is not shown "
        "here as a finding."
    ]
    surviving = _surviving_count(result, method) or 0
    if surviving > uncorrected:
        why = {
            "tfce": "TFCE scores each voxel by the support of the clusters it belongs to at "
            "every height, so a broad, moderate effect survives without any voxel reaching "
            "p < 0.001 on its own",
            "fdr": "FDR adapts its threshold to the p-values of the whole map, and that "
            "threshold lies above 0.001 here",
            "cluster_extent": "cluster inference tests the size of clusters formed at the "
            "cluster-forming threshold, not single voxels",
            "cluster_mass": "cluster inference tests the mass of clusters formed at the "
            "cluster-forming threshold, not single voxels",
        }.get(method)
        if why:
            out.append(
                f"More voxels survive {method_words} ({surviving:,}) than have uncorrected "
                f"p < 0.001 ({uncorrected:,}): this is not a contradiction. {why[0].upper()}"
                f"{why[1:]}."
            )
    return out


def _study_context(summary: dict) -> dict:
    """What the report's study section shows: runs, model, contrasts and inference."""
    settings = summary.get("settings") or {}
    results = summary.get("results") or {}
    inf = settings.get("inference") or {}
    first_levels = _first_level_rows(results)
    contrasts = _contrast_rows(summary, settings)
    inference_rows = _inference_rows(inf)
    per_result = _per_result_rows(summary, results, inf)
    return {
        "first_levels": first_levels,
        "model": _model_rows(settings.get("model") or {}, settings.get("space") or {}),
        "contrasts": contrasts,
        "inference": inference_rows,
        "per_result": per_result,
        "ftests": _ftest_rows(summary),
        "warnings": [str(w) for w in summary.get("warnings") or []],
        "atlas": summary.get("atlas"),
        "grid": summary.get("grid"),
    }


def _ftest_rows(summary: dict) -> list[dict]:
    """One row per F-test: what it tests, its df, what survives, and what it cannot say."""
    rows = []
    for name, f in (summary.get("ftests") or {}).items():
        inf = f.get("inference") or {}
        perm = inf.get("permutation") or {}
        survives = [f"FDR: {(inf.get('fdr') or {}).get('surviving_voxels', 0)} voxel(s)"]
        if perm:
            s = perm.get("surviving") or {}
            survives.append(f"FWE voxel: {s.get('voxel', 0)}")
            if s.get("tfce") is not None:
                survives.append(f"FWE TFCE: {s['tfce']}")
            survives.append(f"smallest attainable p {perm['smallest_attainable_p']:.3g}")
        dfs = f.get("df_denominator_range") or [float("nan")] * 2
        df = f"{dfs[0]:g}" if dfs[0] == dfs[1] else f"{dfs[0]:g}–{dfs[1]:g}"
        peak = f.get("peak")
        rows.append(
            {
                "name": name,
                "text": f"{f.get('meaning', '')}; rows "
                + ", ".join(r["contrast"] for r in f.get("rows") or [])
                + f"; F({f.get('df_numerator')}, {df})"
                + (f", peak F = {peak['f']:.3g}" if peak else "")
                + "; "
                + ", ".join(survives),
                "cautions": list(f.get("cautions") or [])
                + [(f.get("questions") or {}).get("why", "")],
            }
        )
    return rows


def _first_level_rows(results: dict) -> list[dict]:
    """One row per first-level contrast: animals, runs, exclusions, variance, voxels."""
    first_levels: dict[str, dict] = {}
    for _name, r in results.items():
        key = r.get("first_level_contrast") or "runs"
        if key in first_levels:
            continue
        first_levels[key] = {
            "name": key,
            # "runs" stands for the runs of a study without named first-level contrasts
            "named": bool(r.get("first_level_contrast")),
            "animals": r.get("animals"),
            "runs": r.get("runs"),
            "runs_per_animal": list((r.get("runs_per_animal") or {}).items()),
            "excluded": r.get("excluded_runs") or [],
            "variance": r.get("first_level_variance"),
            "voxels": r.get("voxels"),
            "volume_mm3": r.get("volume_mm3"),
        }
    return list(first_levels.values())


def _contrast_rows(summary: dict, settings: dict) -> list[dict]:
    """The group contrasts with their weights in words."""
    # the contrasts actually tested (the design's defaults when the study defines none)
    tested: dict[str, dict] = {}
    for design in (summary.get("design") or {}).values():
        for c in design.get("contrasts") or []:
            tested.setdefault(c.get("name"), c)
    return [
        {
            "name": c.get("name"),
            "weights": ", ".join(f"{k} × {v:g}" for k, v in (c.get("weights") or {}).items())
            + (f" ({c['meaning']})" if c.get("meaning") else ""),
        }
        for c in (tested.values() if tested else settings.get("contrasts") or [])
    ]


def _inference_rows(inf: dict) -> list[tuple[str, str]]:
    """The ``[inference]`` settings as (label, value) rows."""
    inference_rows = [
        (
            "tests",
            {
                "two": "two-sided",
                "positive": "one-sided, positive",
                "negative": "one-sided, negative",
            }.get(inf.get("sided"), str(inf.get("sided"))),
        ),
        ("α", f"{inf.get('alpha', 0.05):g}"),
        ("FDR", "Benjamini–Yekutieli" if inf.get("fdr") == "by" else "Benjamini–Hochberg"),
        ("permutations asked", str(inf.get("permutations"))),
    ]
    if inf.get("permutations"):
        inference_rows += [
            ("cluster-forming p", f"{inf.get('cluster_forming_p'):g}"),
            ("connectivity", f"{inf.get('connectivity')} neighbours"),
            (
                "TFCE",
                f"E = {inf.get('tfce_e'):g}, H = {inf.get('tfce_h'):g}"
                if inf.get("tfce")
                else "off",
            ),
            ("seed", str(inf.get("seed"))),
        ]
    return inference_rows


def _per_result_rows(summary: dict, results: dict, inf: dict) -> list[dict]:
    """One row per result: its correction method, permutations and FDR threshold."""
    per_result = []
    for name, r in results.items():
        perm = (r.get("inference") or {}).get("permutation")
        per_result.append(
            {
                "name": name,
                "method": _METHOD_LABEL.get(_method(summary, r), _method(summary, r)).format(
                    a=inf.get("alpha", 0.05)
                ),
                "perm": None
                if not perm
                else f"{perm['permutations']} {perm['kind']}"
                + (", exhaustive" if perm.get("exhaustive") else ", random")
                + f"; smallest attainable p = {float(perm['smallest_attainable_p']):.3g}",
                "fdr_threshold": ((r.get("inference") or {}).get("fdr") or {}).get("threshold_p"),
            }
        )
    return per_result


def _model_rows(model: dict, space: dict) -> list[tuple[str, str]]:
    """The ``[model]`` settings and the coordinate origin as (label, value) rows."""
    origin = space.get("origin_mm", [0, 0, 0])
    return [
        ("design formula", model.get("formula", "1")),
        ("random effects", "intercept per animal; runs nested in animals"),
        (
            "between-run variance σ²",
            "estimated (REML)"
            if model.get("run_variance") != "known"
            else "fixed at 0 (first-level variance only)",
        ),
        (
            "degrees of freedom",
            "Satterthwaite" if model.get("df") == "satterthwaite" else "between-animal",
        ),
        (
            "origin",
            f"{space.get('origin_name', 'origin')} at ({', '.join(f'{v:g}' for v in origin)}) mm",
        ),
    ] + ([("image headers", header)] if (header := header_sentence(space)) else [])


def _frames(out_dir: Path, name: str) -> dict:
    out = {}
    for stem in (
        "clusters",
        "regions",
        "animals",
        "symmetry",
        "li_curves",
        "specificity",
        "consistency",
        "run_quality",
    ):
        path = out_dir / name / f"{stem}.tsv"
        if path.is_file():
            out[stem] = read_tsv(path)
    return out


def _best_text(best: dict) -> str:
    """The cheapest design of a plan in words; with sessions, what one more session buys
    against adding the same runs to the existing sessions."""
    text = f"{design_text(best)}: power {best['power']:.2f}, cost {best['cost']:g}"
    if "sessions" not in best:
        return text
    if "power_one_more_session" in best:
        text += (
            f"; one more session: {best['power_one_more_session']:.2f}, the same runs in "
            f"the existing sessions: {best['power_same_runs_in_sessions']:.2f}"
        )
    return text


def _plan(out_dir: Path, name: str, summary: dict) -> dict | None:
    """The planning section of one result (after `grouplevel plan`), or None."""
    plan = (read_plans(out_dir, summary).get(name) or {}).get("regions")
    if not plan:
        return None
    rows = []
    for p in plan:
        inputs = p.get("inputs") or {}
        best = p.get("cheapest")
        effect = inputs.get("effect", float("nan"))
        runs = inputs.get("runs_per_animal", 0.0)
        power = inputs.get("power_of_this_study", float("nan"))
        now = f"{count(inputs.get('animals') or 0, 'animal')}, {mean_count(runs, 'run')}"
        if "sessions_per_animal" in inputs:
            now = (
                f"{count(inputs.get('animals') or 0, 'animal')}, "
                f"{mean_count(inputs['sessions_per_animal'], 'session')} of "
                f"{count(round(inputs['runs_per_session'], 1), 'run')}"
            )
        now += f": power {power:.2f}"
        rows.append(
            {
                "region": place(p.get("region"), p.get("hemisphere")),
                "effect": f"{effect:.3g} ({inputs.get('effect_source', '')})",
                "now": now,
                "best": "none in the grid reaches the target" if not best else _best_text(best),
            }
        )
    figure = None
    png = out_dir / name / "power.png"
    if png.is_file():
        figure = _figure(
            "power",
            "Power of future designs",
            png.read_bytes(),
            f"Heat map of the power to detect the effect in {name}'s target regions for "
            "4 to 24 animals and 1 to 8 runs per animal, with the target-power contour.",
            "Power over animals × runs per animal (power.tsv); the ring marks the cheapest "
            "design reaching the target power.",
        )
    return {"rows": rows, "figure": figure, "caution": plan[0].get("caution", "")}


def build_context(out_dir: Path, *, title: str | None = None) -> dict:
    """Everything the template needs (figures drawn, tables formatted)."""
    out_dir = Path(out_dir)
    summary = read_summary(out_dir)
    names = result_names(summary)
    files = present_files(out_dir, summary)
    results = []
    for name in names:
        result = summary["results"][name]
        frames = _frames(out_dir, name)
        views = result_table_views(out_dir, name, summary)
        brief = result_table_views(out_dir, name, summary, brief=True)
        answer = _answer(name, result, summary, views, frames)
        results.append(
            {
                "name": name,
                "answer": answer,
                "figures": _result_figures(out_dir, name, result, summary, frames),
                # each table: the columns a reader needs first, and all of them (folded)
                "tables": [
                    {"brief": brief[k], "full": views[k]} for k in REPORT_TABLES if k in views
                ],
                "cautions": _cautions(name, result, summary, answer["method"]),
                "plan": _plan(out_dir, name, summary),
            }
        )
    methods = methods_text(summary, files)
    browser = browser_context(out_dir, summary, _browser_layers(summary, results))
    css = resources.files("grouplevel.templates").joinpath("report.css").read_text("utf-8")
    tool = summary.get("tool") or {}
    return {
        "title": title or summary.get("title") or "grouplevel report",
        "created": summary.get("created", ""),
        "rendered": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "tool": f"{tool.get('name', 'grouplevel')} {tool.get('version', '')}".strip(),
        "css": css,  # our own file, marked safe in the template
        "study": _study_context(summary),
        "results": results,
        "methods": methods,
        "inputs": summary.get("inputs") or [],
        "browser": browser,
        "content_security_policy": policy_placeholder(),
    }


def _browser_layers(summary: dict, results: list[dict]) -> list[dict]:
    """What the slice browser shows of each result: its surviving-voxel map, in words."""
    alpha = ((summary.get("settings") or {}).get("inference") or {}).get("alpha", 0.05)
    layers = []
    for r in results:
        method = _method(summary, summary["results"][r["name"]])
        layers.append(
            {
                "name": r["name"],
                "heading": r["answer"]["heading"],
                "stem": _METHOD_MAP.get(method, "q"),
                "words": _METHOD_LABEL.get(method, method).format(a=alpha),
            }
        )
    return layers


def render_report(out_dir: Path, *, title: str | None = None) -> Path:
    """Render ``out_dir/report.html`` from a finished output folder.

    Parameters
    ----------
    out_dir
        The output folder of a finished run (summary.json, result folders).
    title
        Heading of the report. It is kept in ``out_dir/report.json``, so later
        renderings (``grouplevel report`` without ``--title``, ``grouplevel plan``) keep
        it; default: the title kept so, else the study's title from summary.json.

    Returns
    -------
    Path
        The written report (one self-contained HTML file).

    Raises
    ------
    UserError
        When ``out_dir`` has no readable summary.json.
    """
    out_dir = Path(out_dir)
    require_grouplevel_output(out_dir)  # never write report.html into a foreign folder
    start = time.perf_counter()
    if title:
        write_report_options(out_dir, title=title)
    else:
        title = read_report_options(out_dir).get("title")
    context = build_context(out_dir, title=title)
    html = (
        _environment()
        .get_template("report.html.j2")
        .render(**context, render_seconds=f"{time.perf_counter() - start:.1f}")
    )
    html = apply_content_security_policy(html)  # hashes of the finished page's own code
    path = out_dir / "report.html"
    path.write_text(html, encoding="utf-8")
    return path
