"""The columns of the result tables (``clusters.tsv``, ``regions.tsv`` ...): one catalogue.

For every table a result folder may hold, the catalogue names each column the writers
put in the TSV, the header it gets in print (with its unit) and its kind, which decides
how a value is printed (:mod:`grouplevel.report.tables`). The study file's ``[tables]``
section chooses manuscript columns by these names, so the names are checked here too.

Besides the TSV columns, the clusters table knows one derived column, ``p_corrected``:
the FWE (or FDR) p of the method that decided significance (``[clusters] method``).
"""

from __future__ import annotations

from dataclasses import dataclass

# kinds of column: how a value is printed
TEXT, INT, STAT, P, COORD, VOLUME, VARIANCE, PERCENT, BOOL, DF = (
    "text",
    "int",
    "stat",
    "p",
    "coord",
    "volume",
    "variance",
    "percent",
    "bool",
    "df",
)

#: The derived column of the clusters table: the p of the method that decided.
P_CORRECTED = "p_corrected"


@dataclass(frozen=True)
class Column:
    """One column of a result table: TSV name, printed header (with unit), kind."""

    source: str
    header: str
    kind: str


def _c(source: str, header: str, kind: str) -> Column:
    return Column(source, header, kind)


_CLUSTERS = (
    _c("cluster", "cluster", INT),
    _c("peak", "peak", INT),
    _c("sign", "sign", INT),
    _c("peak_region", "peak region", TEXT),
    _c("peak_region_abbreviation", "abbr.", TEXT),
    _c("peak_region_hemisphere", "side", TEXT),
    _c("voxels", "voxels", INT),
    _c("volume_mm3", "volume (mm³)", VOLUME),
    _c("peak_AP_mm", "AP (mm)", COORD),
    _c("peak_ML_mm", "ML (mm)", COORD),
    _c("peak_DV_mm", "DV (mm)", COORD),
    _c("z", "z", STAT),
    _c("t", "t", STAT),
    _c("effect", "effect (map units)", STAT),
    _c(P_CORRECTED, "p corrected", P),
    _c("p_fwe_cluster_extent", "p FWE (extent)", P),
    _c("p_fwe_cluster_mass", "p FWE (mass)", P),
    _c("p_fwe_tfce_min", "p FWE (TFCE, min)", P),
    _c("p_fwe_voxel_min", "p FWE (voxel, min)", P),
    _c("q_min", "q FDR (min)", P),
    _c("peak_x_mm", "peak x (mm)", COORD),
    _c("peak_y_mm", "peak y (mm)", COORD),
    _c("peak_z_mm", "peak z (mm)", COORD),
    _c("centre_AP_mm", "centre AP (mm)", COORD),
    _c("centre_ML_mm", "centre ML (mm)", COORD),
    _c("centre_DV_mm", "centre DV (mm)", COORD),
    _c("centre_x_mm", "centre x (mm)", COORD),
    _c("centre_y_mm", "centre y (mm)", COORD),
    _c("centre_z_mm", "centre z (mm)", COORD),
    _c("regions", "regions (% of cluster, % of region)", TEXT),
)
_REGIONS = (
    _c("name", "region", TEXT),
    _c("abbreviation", "abbr.", TEXT),
    _c("hemisphere", "side", TEXT),
    _c("index", "atlas index", INT),
    _c("parent", "parent index", INT),
    _c("depth", "depth", INT),
    _c("volume_mm3", "volume (mm³)", VOLUME),
    _c("effect", "effect (map units)", STAT),
    _c("se", "SE (map units)", STAT),
    _c("ci_low", "95% CI low", STAT),
    _c("ci_high", "95% CI high", STAT),
    _c("t", "t", STAT),
    _c("df", "df", DF),
    _c("p", "p", P),
    _c("q", "q FDR", P),
    _c("fdr_significant", "FDR significant", BOOL),
    _c("var_animal", "τ² (map units²)", VARIANCE),
    _c("var_run", "σ² (map units²)", VARIANCE),
    _c("animals", "animals", INT),
    _c("runs", "runs", INT),
    _c("surviving_fdr", "share surviving FDR", STAT),
    _c("surviving_voxel", "share surviving voxel FWE", STAT),
    _c("surviving_cluster_extent", "share surviving cluster extent", STAT),
    _c("surviving_cluster_mass", "share surviving cluster mass", STAT),
    _c("surviving_tfce", "share surviving TFCE", STAT),
)
_SYMMETRY = (
    _c("region", "region", TEXT),
    _c("verdict", "verdict", TEXT),
    _c("side", "side", TEXT),
    _c("sign", "sign", TEXT),
    _c("li_extent", "LI extent", STAT),
    _c("li_extent_low", "LI extent low", STAT),
    _c("li_extent_high", "LI extent high", STAT),
    _c("li_effect", "LI effect", STAT),
    _c("li_effect_low", "LI effect low", STAT),
    _c("li_effect_high", "LI effect high", STAT),
    _c("li_threshold_free", "LI threshold-free", STAT),
    _c("left_effect", "left effect (map units)", STAT),
    _c("right_effect", "right effect (map units)", STAT),
    _c("difference", "L−R (map units)", STAT),
    _c("se", "SE (map units)", STAT),
    _c("ci_low", "95% CI low", STAT),
    _c("ci_high", "95% CI high", STAT),
    _c("df", "df", DF),
    _c("p", "p", P),
    _c("margin", "margin (map units)", STAT),
    _c("tost_p", "p TOST", P),
    _c("left_active", "left active", BOOL),
    _c("right_active", "right active", BOOL),
    _c("reasons", "why", TEXT),
)
_SPECIFICITY = (
    _c("kind", "kind", TEXT),
    _c("name", "region", TEXT),
    _c("hemisphere", "side", TEXT),
    _c("index", "atlas index", INT),
    _c("volume_mm3", "volume (mm³)", VOLUME),
    _c("mean_effect", "mean effect (map units)", STAT),
    _c("mean_z", "mean z", STAT),
    _c("surviving_voxels", "surviving voxels", INT),
    _c("surviving_share", "share of region surviving", STAT),
    _c("activation_share", "share of activation", STAT),
    _c("artefact_label", "artefact label", BOOL),
    _c("rank_effect", "rank (effect)", INT),
    _c("rank_extent", "rank (extent)", INT),
)
_CONSISTENCY = (
    _c("animal", "animal", TEXT),
    _c("runs", "runs", INT),
    _c("effect", "effect (map units)", STAT),
    _c("se", "SE (map units)", STAT),
    _c("ci_low", "95% CI low", STAT),
    _c("ci_high", "95% CI high", STAT),
    _c("positive", "positive", BOOL),
    _c("ci_above_zero", "CI above 0", BOOL),
    _c("loo_effect", "group effect without animal", STAT),
    _c("loo_t", "t without animal", STAT),
    _c("loo_change", "change without animal", STAT),
)
_ANIMALS = (
    _c("animal", "animal", TEXT),
    _c("name", "region", TEXT),
    _c("hemisphere", "side", TEXT),
    _c("index", "atlas index", INT),
    _c("effect", "effect (map units)", STAT),
    _c("se", "SE (map units)", STAT),
    _c("runs", "runs", INT),
)
_RUN_QUALITY = (
    _c("animal", "animal", TEXT),
    _c("session", "session", TEXT),
    _c("run", "run", TEXT),
    _c("flagged", "flagged", BOOL),
    _c("why", "why", TEXT),
    _c("correlation", "correlation with group", STAT),
    _c("mean_variance", "mean variance (map units²)", VARIANCE),
    _c("z_correlation", "z (correlation)", STAT),
    _c("z_variance", "z (variance)", STAT),
    _c("edge_score", "edge score", STAT),
    _c("z_edge", "z (edge score)", STAT),
)


@dataclass(frozen=True)
class TableSpec:
    """One result table: its file in a result folder, caption and known columns."""

    file: str
    caption: str
    columns: tuple[Column, ...]

    def column(self, source: str) -> Column | None:
        return next((c for c in self.columns if c.source == source), None)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(c.source for c in self.columns)


#: table key -> its file, caption and columns (in the order a full table prints them)
TABLES: dict[str, TableSpec] = {
    "clusters": TableSpec(
        "clusters.tsv",
        "Significant clusters: peaks and sub-peaks, origin-relative coordinates",
        _CLUSTERS,
    ),
    "regions": TableSpec(
        "regions.tsv", "Region effects (REML on run-wise region averages)", _REGIONS
    ),
    "symmetry": TableSpec("symmetry.tsv", "Hemispheric symmetry and laterality", _SYMMETRY),
    "specificity": TableSpec(
        "specificity.tsv",
        "Specificity of the response: targets and off-target regions",
        _SPECIFICITY,
    ),
    "consistency": TableSpec(
        "consistency.tsv", "Per-animal effect in the target and leave-one-out", _CONSISTENCY
    ),
    "animals": TableSpec("animals.tsv", "Per-animal region effects", _ANIMALS),
    "run_quality": TableSpec("run_quality.tsv", "Run quality", _RUN_QUALITY),
}

#: tables written to OUT/tables/ for a manuscript (and settable in ``[tables]``)
MANUSCRIPT_TABLES = ("clusters", "regions", "symmetry", "specificity", "consistency", "animals")
