"""The HTML report: one self-contained file rendered from a finished output folder.

:func:`render_report` reads ``summary.json``, the result folders' maps and tables and
the template/mask recorded in the settings, draws the figures, and renders
``templates/report.html.j2`` (shipped as package ``grouplevel.templates``) with jinja2.
Nothing is refitted, so ``grouplevel report DIR`` can re-render after a template edit
or with a new title.

The page is organised around the questions a reader asks of each contrast (is there a
response, where, is it bilateral, specific, consistent?), then the study, maps,
tables, figures, cautions and methods. Figures are base64 PNGs and the CSS is inline;
the page loads nothing from the network (a Content-Security-Policy forbids it).
Autoescaping is on: every string from the user's files (titles, animal IDs, region
names) is escaped.
"""

from __future__ import annotations

import base64
import datetime as _dt
import time
from importlib import resources
from pathlib import Path

import jinja2
import nibabel as nib

from grouplevel.outputs.files import atomic_write
from grouplevel.outputs.folder import require_grouplevel_output
from grouplevel.outputs.summary import present_files, read_summary, result_names, write_summary
from grouplevel.report.figure_files import FIGURES_FOLDER, DrawnFigure, write_figures
from grouplevel.report.methods import methods_text
from grouplevel.report.result_figures import MAP_FIGURES, Threshold, result_figures
from grouplevel.report.tables import (
    STAT,
    P,
    TableView,
    format_value,
    read_tsv,
    result_table_views,
)

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
    return {
        "key": key,
        "title": title,
        "src": _data_uri(png),
        "alt": alt,
        "caption": caption,
        "section": "maps" if key in MAP_FIGURES else "figures",
    }


def _threshold(summary: dict, result: dict) -> Threshold:
    """The correction the result's maps are shown at (``_method``), with its map."""
    alpha = ((summary.get("settings") or {}).get("inference") or {}).get("alpha", 0.05)
    method = _method(summary, result)
    words = _METHOD_LABEL[method].format(a=alpha) if method in _METHOD_LABEL else method
    return Threshold(method, _METHOD_MAP.get(method, "q"), words, float(alpha))


def _publish(out_dir: Path, drawn: list[DrawnFigure]) -> tuple[dict[str, list[dict]], list]:
    """Write the figures to ``figures/`` and return the report's figure entries per
    result (each embedding the very PNG file written) and summary.json's entries."""
    png, entries = write_figures(out_dir, drawn)
    by_result: dict[str, list[dict]] = {}
    for fig in drawn:
        by_result.setdefault(fig.result, []).append(
            _figure(fig.key, fig.title, png[fig.stem], fig.alt, fig.caption)
            | {"file": f"{FIGURES_FOLDER}/{fig.stem}.png"}
        )
    return by_result, entries


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


def _load(path: Path) -> nib.spatialimages.SpatialImage | None:
    return nib.load(str(path)) if path.is_file() else None


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
    items: list[tuple[str, str, str]] = []  # (question, verdict in bold, the numbers)
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
    return ("Present?", "Not shown", detail + ".")


def _where_items(clusters, n_voxels, peak: dict, peak_text: str) -> list[tuple]:
    """Where? — the largest clusters by their peak region, else the strongest voxel."""
    items: list[tuple[str, str, str]] = []
    if clusters is not None and len(clusters):
        mains = clusters[clusters["peak"].astype(str) == "1"].head(MAX_WHERE)
        places = []
        for _, row in mains.iterrows():
            region = row.get("peak_region")
            hemi = row.get("peak_region_hemisphere")
            where = (
                f"{region} ({hemi})"
                if isinstance(region, str) and isinstance(hemi, str)
                else str(region)
                if isinstance(region, str)
                else "unlabelled"
            )
            n_vox = int(float(row["voxels"]))
            places.append(
                f"{where}, {n_vox} voxel{'s' if n_vox != 1 else ''}, "
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
        parts = []
        for region, v in symmetry.items():
            if isinstance(v, dict):
                reasons = _reasons(v.get("reasons"))
                side = f", {v['side']}" if v.get("side") else ""
                parts.append(
                    f"{region}: {v.get('verdict', 'no verdict')}{side}"
                    + (f" ({reasons})" if reasons else "")
                )
        difference = questions.get("contrast_kind") == "difference"
        question = "Lateralisation differs?" if difference else "Bilateral?"
        items.append((question, "", "; ".join(parts) + "."))
    elif "symmetry" in views:
        sym = frames["symmetry"]
        if "verdict" in sym:
            parts = [f"{r['region']}: {r['verdict']}" for _, r in sym.iterrows()]
            items.append(("Bilateral?", "", "; ".join(parts) + "."))
    return items


def _question_items(questions: dict, frames) -> list[tuple]:
    """Specific?, Consistent? and Runs? — the verdicts of the other questions."""
    items: list[tuple[str, str, str]] = []
    for key, label in (("specificity", "Specific?"), ("consistency", "Consistent?")):
        q = questions.get(key)
        if isinstance(q, dict) and q.get("verdict") is not None:
            reasons = _reasons(q.get("reasons"))
            items.append((label, str(q["verdict"]), f"{reasons}." if reasons else ""))
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
        reasons = _reasons(quality.get("reasons"))
        items.append(("Runs?", str(quality["verdict"]), f"{reasons}." if reasons else ""))
    return items


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
    uncorrected = result.get("voxels_p_below_0.001_uncorrected")
    if uncorrected is not None:
        out.append(
            f"{uncorrected:,} voxels have uncorrected p < 0.001; a map thresholded without "
            "correction is exploratory and is not shown here as a finding."
        )
    method = _method(summary, result)
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
    if not _surviving_count(result, method):
        out.append(
            f"No voxel survives {method_words}; absence of a significant effect is not "
            "evidence that there is no effect."
        )
    for w in summary.get("warnings") or []:
        if str(w).startswith(f"{name}:"):
            out.append(str(w))
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
        "warnings": [str(w) for w in summary.get("warnings") or []],
        "atlas": summary.get("atlas"),
        "grid": summary.get("grid"),
    }


def _first_level_rows(results: dict) -> list[dict]:
    """One row per first-level contrast: animals, runs, exclusions, variance, voxels."""
    first_levels: dict[str, dict] = {}
    for _name, r in results.items():
        key = r.get("first_level_contrast") or "runs"
        if key in first_levels:
            continue
        first_levels[key] = {
            "name": key,
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
    ]


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


def _plan(out_dir: Path, name: str, summary: dict) -> dict | None:
    """The planning section of one result (after `grouplevel plan`), or None."""
    plan = ((summary.get("plan") or {}).get(name) or {}).get("regions")
    if not plan:
        return None
    rows = []
    for p in plan:
        inputs = p.get("inputs") or {}
        best = p.get("cheapest")
        effect = inputs.get("effect", float("nan"))
        runs = inputs.get("runs_per_animal", 0.0)
        power = inputs.get("power_of_this_study", float("nan"))
        rows.append(
            {
                "region": f"{p.get('region')} ({p.get('hemisphere')})",
                "effect": f"{effect:.3g} ({inputs.get('effect_source', '')})",
                "now": f"{inputs.get('animals')} animals, {runs:.1f} runs each: power {power:.2f}",
                "best": "none in the grid reaches the target"
                if not best
                else f"{best['animals']} animals × {best['runs']} runs: power "
                f"{best['power']:.2f}, cost {best['cost']:g}",
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
    drawn: list[DrawnFigure] = []
    for name in names:
        result = summary["results"][name]
        frames = _frames(out_dir, name)
        views = result_table_views(out_dir, name)
        answer = _answer(name, result, summary, views, frames)
        drawn += result_figures(out_dir, name, result, summary, frames, _threshold(summary, result))
        results.append(
            {
                "name": name,
                "answer": answer,
                "tables": [views[k] for k in REPORT_TABLES if k in views],
                "cautions": _cautions(name, result, summary, answer["method"]),
                "plan": _plan(out_dir, name, summary),
            }
        )
    # every figure is written to figures/ and the report embeds those very files
    shown, figure_files = _publish(out_dir, drawn)
    for entry in results:
        entry["figures"] = shown.get(entry["name"], [])
    methods = methods_text(summary, files)
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
        "figure_files": figure_files,
    }


def render_report(out_dir: Path, *, title: str | None = None) -> Path:
    """Render ``out_dir/report.html`` from a finished output folder.

    Every figure is also written to ``out_dir/figures/`` (PDF, 300 dpi PNG, caption;
    :mod:`grouplevel.report.figure_files`), the report embeds those PNG files, and
    ``summary.json`` lists them under ``outputs.figures``.

    Parameters
    ----------
    out_dir
        The output folder of a finished run (summary.json, result folders).
    title
        Heading of the report; default: the study's title from summary.json.

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
    context = build_context(out_dir, title=title)
    html = (
        _environment()
        .get_template("report.html.j2")
        .render(**context, render_seconds=f"{time.perf_counter() - start:.1f}")
    )
    _record_outputs(out_dir, context["figure_files"])
    path = out_dir / "report.html"
    atomic_write(path, html.encode("utf-8"))
    return path


def _record_outputs(out_dir: Path, figure_files: list[dict]) -> None:
    """List the figure files in summary.json (``outputs.figures``), keeping the rest."""
    summary = dict(read_summary(out_dir))
    outputs = dict(summary.get("outputs") or {})
    outputs["figures"] = figure_files
    summary["outputs"] = outputs
    write_summary(out_dir, summary)
