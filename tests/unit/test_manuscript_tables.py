"""Manuscript and report tables: chosen columns, per-column decimals, values in words.

Outside references:
- rounding: Python's ``round`` / ``format`` on the same numbers (IEEE 754 round-half-even
  of the decimal representation, as every printed value should agree with it);
- the cluster-forming z of p = 0.001 two-sided: ``scipy.stats.norm.isf(0.0005)``
  (3.2905; the usual two-sided threshold, common practice);
- "p < 0.001" for small p in manuscript tables (APA Publication Manual, 7th ed. 2020,
  §6.36; value from memory); integers printed without decimals and one number of
  decimals per column (common practice in journal tables).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from grouplevel.errors import UserError
from grouplevel.intake.settings import DEFAULT_MANUSCRIPT_COLUMNS, load_settings
from grouplevel.outputs.columns import MANUSCRIPT_TABLES, TABLES
from grouplevel.outputs.records import locate_input
from grouplevel.report.tables import TableContext, column_decimals, table_note, table_view
from grouplevel.report.words import count, mean_count, place
from tests.conftest import write_study

Z_001 = float(stats.norm.isf(0.001 / 2))  # scipy: two-sided p = 0.001 -> |z| = 3.2905


def _clusters_frame() -> pd.DataFrame:
    # two peaks above the cluster-forming threshold, one below (a TFCE-only cluster)
    return pd.DataFrame(
        {
            "cluster": ["1", "2", "3"],
            "peak": ["1", "1", "1"],
            "voxels": ["93", "40", "123"],
            "z": ["4.96", "-3.5", "2.9"],
            "p_fwe_cluster_extent": ["0.002", "0.03", "1"],
            "p_fwe_cluster_mass": ["0.002", "0.02", "1"],
            "p_fwe_tfce_min": ["0.002", "0.01", "0.04"],
            "p_fwe_voxel_min": ["0.002", "0.2", "0.6"],
            "q_min": ["0.0004", "0.01", "0.03"],
            "peak_region": ["primary auditory area", "unlabelled", "thalamus"],
            "peak_region_hemisphere": ["right", "", "left"],
        }
    )


def test_cluster_p_below_the_forming_threshold_reads_in_words():
    assert Z_001 == pytest.approx(3.2905, abs=1e-4)  # scipy reference
    context = TableContext("tfce", 0.001, Z_001)
    view = table_view("clusters", _clusters_frame(), "x/clusters.tsv", context=context)
    col = view.headers.index("p FWE (extent)")
    mass = view.headers.index("p FWE (mass)")
    assert [r[col] for r in view.rows] == ["0.002", "0.030", "no cluster at p < 0.001"]
    assert view.rows[2][mass] == "no cluster at p < 0.001"
    # a peak above the threshold keeps its number, of either sign
    assert abs(-3.5) > Z_001 and view.rows[1][col] == "0.030"


@pytest.mark.parametrize(
    ("method", "header", "third"),
    [
        ("tfce", "p FWE (TFCE)", "0.040"),
        ("voxel", "p FWE (voxel)", "0.600"),
        ("cluster_mass", "p FWE (cluster mass)", "no cluster at p < 0.001"),
        ("fdr", "q FDR", "0.030"),
    ],
)
def test_p_corrected_is_the_p_of_the_deciding_method(method, header, third):
    context = TableContext(method, 0.001, Z_001)
    view = table_view(
        "clusters",
        _clusters_frame(),
        "x/clusters.tsv",
        columns=("peak_region", "z", "p_corrected"),
        context=context,
    )
    assert view.headers == ["peak region", "z", header]
    assert view.rows[2][2] == third


def test_manuscript_columns_share_their_decimals():
    frame = pd.DataFrame(
        {
            "name": ["a", "b", "c", "d"],
            "hemisphere": ["left", "right", "left", "right"],
            "effect": ["0.155", "0.0207", "-0.00031", "0.1"],
            "t": ["12.13", "3.5", "-0.2", "1"],
            "df": ["9", "9", "9", "9"],
            "p": ["0.0000057", "0.0123", "0.5", "0.00099"],
            "var_animal": ["0.0025689", "0.00012", "0", "0.003"],
            "runs": ["33.0", "33", "12", "4"],
        }
    )
    view = table_view("regions", frame, "x/regions.tsv", manuscript=True)
    columns = {h: [r[i] for r in view.rows] for i, h in enumerate(view.headers)}
    # effect: largest |value| 0.155 -> 3 significant digits -> 3 decimals in every row
    assert columns["effect (map units)"] == ["0.155", "0.021", "0.000", "0.100"]
    assert columns["t"] == ["12.13", "3.50", "-0.20", "1.00"]  # at least 2 decimals
    assert columns["df"] == ["9", "9", "9", "9"]  # whole df: no "9.00"
    assert columns["runs"] == ["33", "33", "12", "4"]
    assert columns["p"] == ["< 0.001", "0.012", "0.500", "< 0.001"]
    # τ²: largest 0.003 -> 5 decimals (3 significant digits of 0.00300)
    assert columns["τ² (map units²)"] == [f"{float(v):.5f}" for v in frame["var_animal"]]
    for values in columns.values():  # one number of decimals per number column
        decimals = {len(v.split(".")[1]) for v in values if "." in v and v[0] != "<"}
        assert len(decimals) <= 1


def test_column_decimals_follow_python_rounding():
    rng = np.random.default_rng(3)
    for scale in (1e-4, 1e-2, 0.5, 7.0, 300.0):
        values = list(rng.normal(0, scale, 20))
        decimals = column_decimals(values, "stat")
        largest = max(abs(v) for v in values)
        expected = min(6, max(2, 3 - 1 - math.floor(math.log10(largest))))
        assert decimals == expected
        # the largest value keeps 3 significant digits (or more) when printed
        printed = f"{largest:.{decimals}f}"
        assert float(printed) == pytest.approx(largest, rel=5e-3)
    assert column_decimals([9.0, 9.0], "df") == 0
    assert column_decimals([9.0, 9.5], "df") == 1


def test_booleans_read_yes_no_and_no_atlas_index_for_all_targets():
    frame = pd.DataFrame(
        {
            "kind": ["target", "targets"],
            "index": ["3", "-1"],
            "name": ["auditory cortex", "auditory cortex (left) + auditory cortex (right)"],
            "hemisphere": ["left", ""],
            "artefact_label": ["False", "True"],
            "new_flag": ["True", "False"],  # a column the catalogue does not know
        }
    )
    view = table_view("specificity", frame, "x/specificity.tsv")
    row0, row1 = (dict(zip(view.headers, r, strict=True)) for r in view.rows)
    assert row1["atlas index"] == "" and row0["atlas index"] == "3"
    assert (row0["artefact label"], row1["artefact label"]) == ("no", "yes")
    assert (row0["new flag"], row1["new flag"]) == ("yes", "no")
    assert "True" not in {v for r in view.rows for v in r}


def test_note_names_the_full_table_when_rows_are_left_out():
    frame = pd.DataFrame({"name": [f"r{i}" for i in range(7)], "p": ["0.5"] * 7})
    view = table_view("regions", frame, "x/regions.tsv", columns=("name", "p"), max_rows=5)
    assert len(view.rows) == 5 and view.total_rows == 7
    note = table_note(view, "x_regions.tsv")
    assert "first 5 of 7 rows" in note and "x_regions.tsv" in note


def test_words_for_counts_and_places():
    assert count(1, "run") == "1 run" and count(4, "run") == "4 runs"
    assert count(1024.0, "voxel") == "1,024 voxels"
    assert mean_count(3.0, "run") == "3 runs each"
    assert mean_count(3.3, "run") == "3.3 runs each on average"
    assert place("unlabelled", "") == "unlabelled"  # never "unlabelled ()"
    assert place("thalamus", "left") == "thalamus (left)"
    assert place(float("nan"), "left") == "unlabelled"


# --- [tables] in the study file ---------------------------------------------------------


def _study(tmp_path: Path, extra: str) -> Path:
    rng = np.random.default_rng(0)
    return write_study(
        tmp_path / "s", rng.normal(1, 1, size=(6, 3, 3, 2)), list("aabbcc"), toml_extra=extra
    )


def test_tables_setting_defaults_and_choice(tmp_path):
    s = load_settings(_study(tmp_path, '\n[tables]\nregions = ["name", "p"]\nmax_rows = 12\n'))
    assert s.tables.columns["regions"] == ("name", "p")
    assert s.tables.columns["clusters"] == DEFAULT_MANUSCRIPT_COLUMNS["clusters"]
    assert s.tables.max_rows == 12
    plain = s.to_dict()
    assert plain["tables"]["columns"]["regions"] == ["name", "p"]
    # settings "with defaults filled in": the resolved method, never null
    assert plain["clusters"]["method"] == "tfce"
    for key in MANUSCRIPT_TABLES:  # every default names real columns
        assert set(DEFAULT_MANUSCRIPT_COLUMNS[key]) <= set(TABLES[key].names)


def test_clusters_method_in_settings_without_permutations_is_fdr(tmp_path):
    s = load_settings(_study(tmp_path, "\n[inference]\npermutations = 0\n"))
    assert s.to_dict()["clusters"]["method"] == "fdr"


@pytest.mark.parametrize(
    ("extra", "words"),
    [
        (
            'clusters = ["peak_regoin", "z"]',
            ["[tables] clusters", "'peak_regoin'", "did you mean 'peak_region'", "clusters.tsv"],
        ),
        ("clusters = []", ["[tables] clusters", "at least one column"]),
        ('animals = ["animal", "animal"]', ["[tables] animals", "twice"]),
        ("max_rows = 0", ["[tables] max_rows", "at least 1"]),
        ('figures = ["x"]', ["[tables] figures", "unknown key"]),
    ],
)
def test_bad_tables_setting_names_the_key(tmp_path, extra, words):
    with pytest.raises(UserError) as info:
        load_settings(_study(tmp_path, f"\n[tables]\n{extra}\n"))
    text = str(info.value)  # the summary line and one line per problem
    for word in words:
        assert word in text, text


def test_an_input_is_found_again_when_study_and_outputs_moved(tmp_path):
    old, new = tmp_path / "old", tmp_path / "new"
    (new / "study").mkdir(parents=True)
    (new / "study" / "template.nii.gz").write_bytes(b"x")
    summary = {"output_folder": str(old / "results")}
    recorded = old / "study" / "template.nii.gz"  # no longer there
    found = locate_input(recorded, summary, new / "results")
    assert found == (new / "study" / "template.nii.gz").resolve()
    assert locate_input(recorded, {}, new / "results") is None  # older folders: not found
    assert locate_input(tmp_path / "none.nii.gz", summary, new / "results") is None
