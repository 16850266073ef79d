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
import time
from concurrent.futures import ThreadPoolExecutor
from importlib import resources
from pathlib import Path

import jinja2

from grouplevel.outputs.files import atomic_write
from grouplevel.outputs.folder import require_grouplevel_output
from grouplevel.outputs.records import (
    locate_input,
    read_plans,
    read_report_options,
    write_report_options,
)
from grouplevel.outputs.summary import present_files, read_summary, result_names
from grouplevel.planning.plan import design_text
from grouplevel.report.browser import (
    apply_content_security_policy,
    browser_context,
    policy_placeholder,
)
from grouplevel.report.figure_files import FIGURES_FOLDER, DrawnFigure, write_figures
from grouplevel.report.methods import header_sentence, methods_text
from grouplevel.report.result_figures import MAP_FIGURES, Threshold, result_figures
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
    """Everything the template needs (figures drawn, tables formatted).

    The slice browser's data (maps read, packed and deflated: mostly work outside
    Python's global lock) are made on a thread while the figures are drawn.
    """
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
                # each table: the columns a reader needs first, and all of them (folded)
                "tables": [
                    {"brief": brief[k], "full": views[k]} for k in REPORT_TABLES if k in views
                ],
                "cautions": _cautions(name, result, summary, answer["method"]),
                "plan": _plan(out_dir, name, summary),
                "frames": frames,
            }
        )
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="browser") as pool:
        browser = pool.submit(browser_context, out_dir, summary, _browser_layers(summary, results))
        drawn: list[DrawnFigure] = []
        for entry in results:
            result = summary["results"][entry["name"]]
            frames = entry.pop("frames")
            threshold = _threshold(summary, result)
            drawn += result_figures(out_dir, entry["name"], result, summary, frames, threshold)
        # every figure is written to figures/ and the report embeds those very files
        shown, figure_files = _publish(out_dir, drawn)
        browser = browser.result()
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
        "browser": browser,
        "content_security_policy": policy_placeholder(),
        "figure_files": figure_files,
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

    Every figure is also written to ``out_dir/figures/`` (PDF, 300 dpi PNG, caption;
    :mod:`grouplevel.report.figure_files`), the report embeds those PNG files, and
    ``report.json`` lists them under ``figures``.

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
    # the figure files are listed in report.json (summary.json is never rewritten)
    write_report_options(out_dir, figures=context["figure_files"])
    path = out_dir / "report.html"
    atomic_write(path, html.encode("utf-8"))
    return path
