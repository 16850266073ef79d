"""The methods paragraph, generated from the settings and counts in summary.json.

Every sentence is built from a value the output folder records; a step that was not run
(no permutations, no atlas, no symmetry table) is not mentioned, and its reference is
not listed. The text is Markdown: paragraphs, then a reference list, then the software
versions.

References
----------
Patterson HD, Thompson R (1971). Recovery of inter-block information when block sizes
are unequal. Biometrika 58:545-554.
Benjamini Y, Hochberg Y (1995). Controlling the false discovery rate: a practical and
powerful approach to multiple testing. J R Stat Soc B 57:289-300.
Benjamini Y, Yekutieli D (2001). The control of the false discovery rate in multiple
testing under dependency. Ann Stat 29:1165-1188.
Smith SM, Nichols TE (2009). Threshold-free cluster enhancement. NeuroImage 44:83-98.
Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014). Permutation inference
for the general linear model. NeuroImage 92:381-397.
Eklund A, Nichols TE, Knutsson H (2016). Cluster failure. PNAS 113:7900-7905.
Seghier ML (2008). Laterality index in functional MRI: methodological issues. Magn
Reson Imaging 26:594-601.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib import metadata
from pathlib import Path

from grouplevel.inference.vector_flips import VECTOR_FLIPS_KIND
from grouplevel.outputs.folder import require_grouplevel_output
from grouplevel.outputs.summary import present_files, read_summary

REFERENCES = {
    "reml": "Patterson HD, Thompson R (1971). Recovery of inter-block information when "
    "block sizes are unequal. Biometrika 58:545–554.",
    "pinheiro": "Pinheiro JC, Bates DM (2000). Mixed-Effects Models in S and S-PLUS. "
    "Springer, New York.",
    "bh": "Benjamini Y, Hochberg Y (1995). Controlling the false discovery rate: a "
    "practical and powerful approach to multiple testing. J R Stat Soc B 57:289–300.",
    "by": "Benjamini Y, Yekutieli D (2001). The control of the false discovery rate in "
    "multiple testing under dependency. Ann Stat 29:1165–1188.",
    "tfce": "Smith SM, Nichols TE (2009). Threshold-free cluster enhancement: addressing "
    "problems of smoothing, threshold dependence and localisation in cluster inference. "
    "NeuroImage 44:83–98.",
    "winkler": "Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014). "
    "Permutation inference for the general linear model. NeuroImage 92:381–397.",
    "winkler2015": "Winkler AM, Webster MA, Vidaurre D, Nichols TE, Smith SM (2015). "
    "Multi-level block permutation. NeuroImage 123:253–268.",
    "freedman": "Freedman D, Lane D (1983). A nonstochastic interpretation of reported "
    "significance levels. J Bus Econ Stat 1:292–298.",
    "eklund": "Eklund A, Nichols TE, Knutsson H (2016). Cluster failure: why fMRI "
    "inferences for spatial extent have inflated false-positive rates. PNAS 113:7900–7905.",
    "seghier": "Seghier ML (2008). Laterality index in functional MRI: methodological "
    "issues. Magn Reson Imaging 26:594–601.",
}

#: packages whose versions the methods name
SOFTWARE = ("grouplevel", "numpy", "scipy", "nibabel", "statsmodels")

_CONNECTIVITY_WORDS = {
    6: "6-connected (faces)",
    18: "18-connected (faces and edges)",
    26: "26-connected (faces, edges and corners)",
}
_SIDED_WORDS = {
    "two": "two-sided",
    "positive": "one-sided (positive)",
    "negative": "one-sided (negative)",
}
_METHOD_WORDS = {
    "tfce": "TFCE with family-wise error (FWE) control",
    "cluster_mass": "cluster mass with FWE control",
    "cluster_extent": "cluster extent with FWE control",
    "voxel": "voxel-wise FWE control (maximum statistic)",
    "fdr": "voxel-wise false discovery rate",
}


@dataclass(frozen=True)
class MethodsText:
    """The generated paragraphs, the references they cite, and software versions."""

    paragraphs: tuple[str, ...]
    references: tuple[str, ...]
    versions: tuple[tuple[str, str], ...]
    versions_source: str

    def markdown(self) -> str:
        parts = ["# Methods", ""]
        for p in self.paragraphs:
            parts += [p, ""]
        parts += ["## References", ""]
        parts += [f"- {r}" for r in self.references]
        parts += ["", "## Software", ""]
        parts += [f"- {name} {version}" for name, version in self.versions]
        parts += ["", f"_{self.versions_source}_", ""]
        return "\n".join(parts)


def software_versions(summary: dict) -> tuple[tuple[tuple[str, str], ...], str]:
    """Versions recorded in summary.json (``tool.versions``) when present; otherwise the
    versions installed now, said so."""
    tool = summary.get("tool") or {}
    recorded = tool.get("versions")
    if isinstance(recorded, dict) and recorded:
        items = [(str(k), str(v)) for k, v in recorded.items()]
        if "grouplevel" not in recorded and tool.get("version"):
            items.insert(0, ("grouplevel", str(tool["version"])))
        return tuple(items), "Versions as recorded in summary.json when the analysis ran."
    items = []
    for name in SOFTWARE:
        if name == "grouplevel" and tool.get("version"):
            items.append((name, str(tool["version"])))
            continue
        try:
            items.append((name, metadata.version(name)))
        except metadata.PackageNotFoundError:
            items.append((name, "not installed"))
    return tuple(items), (
        "grouplevel's version is the one recorded in summary.json; the other versions are "
        "those installed when this text was generated (summary.json does not record them)."
    )


def _cite(keys: list[str], key: str) -> str:
    if key not in keys:
        keys.append(key)
    author = {
        "reml": "Patterson & Thompson 1971",
        "pinheiro": "Pinheiro & Bates 2000",
        "bh": "Benjamini & Hochberg 1995",
        "by": "Benjamini & Yekutieli 2001",
        "tfce": "Smith & Nichols 2009",
        "winkler": "Winkler et al. 2014",
        "winkler2015": "Winkler et al. 2015",
        "freedman": "Freedman & Lane 1983",
        "eklund": "Eklund et al. 2016",
        "seghier": "Seghier 2008",
    }[key]
    return author


def _number(x: float) -> str:
    return f"{x:g}"


def _range(values: list[int]) -> str:
    lo, hi = min(values), max(values)
    return f"{lo}" if lo == hi else f"{lo}–{hi}"


def methods_text(summary: dict, present_files: dict[str, set[str]] | None = None) -> MethodsText:
    """Build the methods paragraphs from a loaded summary.json.

    Parameters
    ----------
    summary
        The parsed summary.json of a finished output folder.
    present_files
        Result name → file names in its folder (used to mention the symmetry analysis
        only when ``symmetry.tsv`` exists).
    """
    present_files = present_files or {}
    settings = summary.get("settings") or {}
    inference = settings.get("inference") or {}
    results = summary.get("results") or {}
    cites: list[str] = []  # citation keys in order of first use (the reference list)
    paragraphs = [
        _model_paragraph(summary, settings.get("model") or {}, results, cites),
        _data_paragraph(results, settings.get("study") or {}, settings.get("space") or {}),
        _inference_paragraph(inference, results, cites),
        _atlas_paragraph(summary.get("atlas"), inference, results),
        _symmetry_paragraph(present_files, cites),
    ]
    versions, source = software_versions(summary)
    return MethodsText(
        paragraphs=tuple(p for p in paragraphs if p),
        references=tuple(REFERENCES[k] for k in cites),
        versions=versions,
        versions_source=source,
    )


def _fdr_words(inference: dict) -> tuple[str, str]:
    """Citation key and name of the FDR procedure used."""
    key = "by" if inference.get("fdr") == "by" else "bh"
    return key, "Benjamini–Yekutieli" if key == "by" else "Benjamini–Hochberg"


def _model_paragraph(summary: dict, model: dict, results: dict, cites: list[str]) -> str:
    """The data entered and the mixed model, its estimation and its tests."""
    kinds = {r.get("first_level_variance", "none") for r in results.values()}
    if kinds == {"none"}:
        data_words = "each included run's first-level effect map (no first-level variance)"
    elif kinds == {"se"}:
        data_words = (
            "each included run's first-level effect map and its standard-error map (squared)"
        )
    else:
        data_words = "each included run's first-level effect map and its first-level variance map"
    model_sentences = [
        f"Group analysis used grouplevel {summary.get('tool', {}).get('version', '')}. "
        f"For every first-level contrast, {data_words} entered a linear mixed model with "
        "runs nested in animals: a random intercept per animal (between-animal variance τ²) "
        "and, per run, a residual variance σ² + s²ₖ, where s²ₖ is that run's first-level "
        "variance at the voxel."
    ]
    if model.get("run_variance") == "known":
        model_sentences.append(
            "The between-run variance σ² was fixed at 0, so runs were weighted by their "
            "first-level variance alone."
        )
    else:
        model_sentences.append(
            "The between-run variance σ² was estimated, so run-to-run variability beyond "
            "the first-level noise is part of the model."
        )
    model_sentences.append(
        f"τ² and σ² were estimated at every voxel by restricted maximum likelihood (REML; "
        f"{_cite(cites, 'reml')}) with at most {model.get('max_iter', '?')} Fisher-scoring "
        "iterations, and the fixed effects by generalised least squares; the group-level "
        f'design was the formula "{model.get("formula", "1")}".'
    )
    extended = {
        name: r["random_effects"]
        for name, r in results.items()
        if r.get("random_effects") not in (None, "a random intercept per animal")
    }
    for effects in dict.fromkeys(extended.values()):
        names = ", ".join(f'"{n}"' for n, e in extended.items() if e == effects)
        model_sentences.append(
            f"For {names} the random effects were {effects}; a within-animal effect with "
            "a random slope was judged against the spread of the animals' own effects, "
            "with degrees of freedom from the number of animals."
        )
    if model.get("df") == "satterthwaite":
        df_words = "Satterthwaite degrees of freedom"
    else:
        df_words = (
            "the between-animal degrees of freedom (animals minus the rank of the "
            f"animal-level design; {_cite(cites, 'pinheiro')})"
        )
    model_sentences.append(
        "Each group contrast was tested with t = cᵀβ̂ / SE, the model-based standard "
        f"error at the REML estimates, with {df_words}."
    )
    ftests = summary.get("ftests") or {}
    if ftests:
        names = ", ".join(f'"{n}"' for n in ftests)
        model_sentences.append(
            f"The F-test(s) {names} tested their rows L jointly with the Wald statistic "
            "F = (Lβ̂)ᵀ(L Cov(β̂) Lᵀ)⁻¹(Lβ̂)/q on q and the denominator degrees of freedom "
            "of the level the rows test, upper tail; FDR and permutation inference used "
            "the normal value with the same upper-tail p."
        )
    flipped = [
        n
        for n, f in ftests.items()
        if str(((f.get("inference") or {}).get("permutation") or {}).get("kind", "")).startswith(
            VECTOR_FLIPS_KIND
        )
    ]
    if flipped:
        names = ", ".join(f'"{n}"' for n in flipped)
        model_sentences.append(
            f"For {names}, whose rows are several within-animal effects, each animal's "
            "vector of its own estimates of those effects was sign-flipped as a whole "
            f"({_cite(cites, 'winkler2015')}), assuming that with no effect each vector is "
            "symmetric about zero and independent of the other animals'; the permuted "
            "statistic was the Wald F with the between-animal covariance estimated by "
            "moments with no effect assumed, which no flip changes."
        )
    return " ".join(model_sentences)


def header_sentence(space: dict) -> str | None:
    """How the image headers were read, when they were declared scaled or reordered."""
    units = float(space.get("header_units_per_mm", 1.0))
    axes = list(space.get("header_axes") or ["right", "anterior", "dorsal"])
    parts = []
    if units != 1.0:
        parts.append(f"their lengths were divided by {_number(units)}")
    if axes != ["right", "anterior", "dorsal"]:
        parts.append(
            "their world x, y and z were read as pointing "
            + ", ".join(axes[:2])
            + f" and {axes[2]}"
        )
    if not parts:
        return None
    return (
        "The image headers were declared non-standard: "
        + " and ".join(parts)
        + "; all distances, volumes and coordinates are in true millimetres."
    )


def _data_paragraph(results: dict, study: dict, space: dict | None = None) -> str:
    """Animals, runs, voxels and df of each analysed map."""
    data_sentences = []
    header = header_sentence(space or {})
    if header:
        data_sentences.append(header)
    for name, r in results.items():
        per_animal = list((r.get("runs_per_animal") or {}).values())
        excluded = r.get("excluded_runs") or []
        text = f'Map "{name}": {r.get("animals", "?")} animals, {r.get("runs", "?")} runs' + (
            f" ({_range(per_animal)} per animal)" if per_animal else ""
        )
        if excluded:
            text += f"; {len(excluded)} run(s) excluded before fitting"
        text += f"; {r.get('voxels', 0):,} voxels ({_number(round(r.get('volume_mm3', 0), 1))} mm³)"
        df_range = r.get("df_range")
        if df_range:
            lo, hi = df_range
            text += f", df {_number(round(lo, 2))}" + (
                f"–{_number(round(hi, 2))}" if hi != lo else ""
            )
        data_sentences.append(text + ".")
    if study.get("min_coverage") is not None:
        data_sentences.append(
            f"A voxel was analysed where at least {_number(100 * study['min_coverage'])}% of "
            "the included runs had data."
        )
    return " ".join(data_sentences)


def _inference_paragraph(inference: dict, results: dict, cites: list[str]) -> str:
    """Sides and level, FDR, the permutation scheme, clusters, TFCE and smoothness."""
    alpha = inference.get("alpha", 0.05)
    sided = _SIDED_WORDS.get(inference.get("sided", "two"), inference.get("sided", ""))
    fdr_key, fdr_name = _fdr_words(inference)
    inf_sentences = [
        f"Tests were {sided} at α = {_number(alpha)}. The false discovery rate across voxels "
        f"was controlled with the {fdr_name} procedure ({_cite(cites, fdr_key)}) at "
        f"q ≤ {_number(alpha)}."
    ]
    perms = [
        (name, (r.get("inference") or {}).get("permutation"))
        for name, r in results.items()
        if (r.get("inference") or {}).get("permutation")
    ]
    if perms:
        kinds_perm = {p["kind"] for _, p in perms}
        counts = sorted({int(p["permutations"]) for _, p in perms})
        exhaustive = all(p.get("exhaustive") for _, p in perms)
        smallest = sorted({float(p["smallest_attainable_p"]) for _, p in perms})
        unit = (
            "sign flips of all runs of an animal together"
            if kinds_perm == {"sign flips"}
            else "permutations of whole animals' labels"
            if kinds_perm == {"animal permutations"}
            else "sign flips or permutations of whole animals"
        )
        draw = (
            "every distinct rearrangement was enumerated (an exact test)"
            if exhaustive
            else f"rearrangements were drawn at random (seed {inference.get('seed')})"
        )
        inf_sentences.append(
            f"Family-wise error (FWE) was controlled by permutation: {unit}, the animals "
            f"being the exchangeable units; {'/'.join(str(c) for c in counts)} rearrangements, "
            f"{draw}; the smallest attainable p was "
            f"{'/'.join(f'{s:.3g}' for s in smallest)}."
        )
        inf_sentences.append(
            "FWE p-values came from the permutation distribution of the maximum "
            f"statistic ({_cite(cites, 'winkler')})."
        )
        if _has_nuisance(results):
            inf_sentences.append(
                "Nuisance covariates of the group design were handled by the Freedman–Lane "
                f"procedure ({_cite(cites, 'freedman')})."
            )
        cfp = inference.get("cluster_forming_p")
        cfz = perms[0][1].get("cluster_forming_z")
        conn = _CONNECTIVITY_WORDS.get(inference.get("connectivity"), "")
        inf_sentences.append(
            f"Per rearrangement the maximum z, the largest cluster extent and the largest "
            f"cluster mass at a cluster-forming threshold of p < {_number(cfp)} "
            + (f"(|z| > {cfz:.2f}) " if cfz is not None else "")
            + f"({_cite(cites, 'eklund')}), clusters being {conn} groups of voxels"
            + (
                f", and the maximum TFCE score (E = {_number(inference.get('tfce_e'))}, "
                f"H = {_number(inference.get('tfce_h'))}; {_cite(cites, 'tfce')})"
                if inference.get("tfce")
                else ""
            )
            + " were kept."
        )
    else:
        inf_sentences.append(
            "No permutation test was run, so no family-wise error correction was applied; "
            "maps are thresholded by FDR."
        )
    methods_used = {
        (r.get("clusters") or {}).get("method") for r in results.values() if r.get("clusters")
    }
    methods_used.discard(None)
    if methods_used:
        inf_sentences.append(
            "Clusters were reported as significant by "
            + " / ".join(_METHOD_WORDS.get(m, m) for m in sorted(methods_used))
            + f" at α = {_number(alpha)}."
        )
    smooth = [
        (r.get("inference") or {}).get("smoothness")
        for r in results.values()
        if (r.get("inference") or {}).get("smoothness")
    ]
    if smooth:
        fwhm = smooth[0]["fwhm_mm"]
        inf_sentences.append(
            "The residual smoothness (FWHM) of the first map was "
            + " × ".join(f"{v:.2f}" for v in fwhm)
            + " mm."
        )
    return " ".join(inf_sentences)


def _atlas_paragraph(atlas: dict | None, inference: dict, results: dict) -> str:
    """The atlas on the statistics grid and the region effects."""
    if not atlas:
        return ""
    a_sentences = [
        f"Regions came from the study atlas ({atlas.get('labelled_regions', '?')} labelled "
        f"regions, {atlas.get('regions', '?')} including parents and hemispheres), "
        f"mapped to the statistics grid by: {atlas.get('resampling', 'unknown')}; it "
        f"covered {_number(round(100 * float(atlas.get('coverage_of_mask', 0)), 1))}% of "
        f"the mask. The midline ({atlas.get('midline_source', '')}) was at "
        f"x = {float(atlas.get('midline_mm', 0)):.2f} mm."
    ]
    if any("regions" in r for r in results.values()):
        a_sentences.append(
            "Region effects came from the same REML model fitted to each run's region "
            f"average, with {_fdr_words(inference)[1]} FDR across regions."
        )
    return " ".join(a_sentences)


def _symmetry_paragraph(present_files: dict[str, set[str]], cites: list[str]) -> str:
    """The symmetry analysis, when a result folder holds its table."""
    if not any("symmetry.tsv" in files for files in present_files.values()):
        return ""
    return (
        "Hemispheric symmetry was assessed per region with laterality indices "
        f"LI = (L − R)/(L + R) ({_cite(cites, 'seghier')}) by extent and by effect, and "
        "with a test of the left–right difference of the region effect together with an "
        "equivalence test (two one-sided tests) against the margin stated in the "
        "symmetry table."
    )


def _has_nuisance(results: dict) -> bool:
    for r in results.values():
        columns = r.get("design_columns") or []
        weights = r.get("weights") or {}
        if any(weights.get(c, 0.0) == 0.0 for c in columns):
            return True
    return False


def write_methods(out_dir: Path) -> Path:
    """Write ``out_dir/methods.md`` from the finished output folder's summary.json.

    Returns
    -------
    Path
        The written file.
    """
    out_dir = Path(out_dir)
    require_grouplevel_output(out_dir)  # never write methods.md into a foreign folder
    summary = read_summary(out_dir)
    text = methods_text(summary, present_files(out_dir, summary)).markdown()
    path = out_dir / "methods.md"
    path.write_text(text, encoding="utf-8")
    return path
