"""The HTML report, manuscript tables and methods text of a finished output folder.

The folder is the session's finished run of the invented example study (tests/conftest.py,
``example_output``: one atlas label renamed to a script tag, to check escaping; 32
random permutations). It is read, never edited: tests that write files work on a copy.
A copy gets small hand-made question tables (symmetry, laterality curves, specificity,
consistency, run quality) to check that their sections appear when the files exist.
"""

from __future__ import annotations

import base64
import html.parser
import io
import json
import re
import shutil
import struct
from pathlib import Path

import matplotlib.image as mpimg
import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from scipy import stats

import grouplevel
from grouplevel.errors import UserError
from grouplevel.report import render_report, write_manuscript_tables, write_methods
from grouplevel.report.tables import format_value, latex_escape, read_tsv
from tests.conftest import EXAMPLE_OUTPUT_PERMUTATIONS as PERMUTATIONS
from tests.conftest import HOSTILE_NAME as EVIL
from tests.conftest import compile_latex, write_study


@pytest.fixture(scope="module")
def output(example_output) -> Path:
    """The finished example output folder (shared; read only)."""
    return example_output


@pytest.fixture(scope="module")
def rendered(output) -> tuple[Path, str]:
    """The report the run wrote (``write_outputs`` renders it as ``grouplevel report``)."""
    path = output / "report.html"
    return path, path.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def output_copy(output, tmp_path_factory) -> Path:
    """A copy of the finished folder for the tests that write into it."""
    folder = tmp_path_factory.mktemp("report_copy") / "results"
    shutil.copytree(output, folder)
    return folder


class _Page(html.parser.HTMLParser):
    """Headings in order, tables with their row counts, images, script tags."""

    def __init__(self) -> None:
        super().__init__()
        self.headings: list[tuple[int, str]] = []
        self.tables: list[dict] = []
        self.images: list[dict] = []
        self.scripts = 0
        self._heading: int | None = None
        self._text = ""
        self._section: str | None = None
        self.sections: list[str] = []
        self._table: dict | None = None
        self._in_body = False
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "script":
            self.scripts += 1
        if tag == "section":
            self.sections.append(a.get("id", ""))
        if re.fullmatch(r"h[1-6]", tag):
            self._heading, self._text = int(tag[1]), ""
        if tag == "table":
            self._table = {"source": a.get("data-source"), "rows": [], "headers": []}
        if tag == "tbody":
            self._in_body = True
        if tag == "tr" and self._table is not None and self._in_body:
            self._table["rows"].append([])
        if tag in ("td", "th") and self._table is not None:
            self._cell = []
            if not self._in_body:
                assert a.get("scope") == "col", "header cells need scope=col"
        if tag == "img":
            self.images.append(a)

    def handle_endtag(self, tag):
        if self._heading is not None and tag == f"h{self._heading}":
            self.headings.append((self._heading, self._text.strip()))
            self._heading = None
        if tag in ("td", "th") and self._table is not None and self._cell is not None:
            text = "".join(self._cell).strip()
            if self._in_body:
                self._table["rows"][-1].append(text)
            else:
                self._table["headers"].append(text)
            self._cell = None
        if tag == "tbody":
            self._in_body = False
        if tag == "table" and self._table is not None:
            self.tables.append(self._table)
            self._table = None

    def handle_data(self, data):
        if self._heading is not None:
            self._text += data
        if self._cell is not None:
            self._cell.append(data)


def _parse(text: str) -> _Page:
    page = _Page()
    page.feed(text)
    return page


def _png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG specification, W3C 2003, §11.2.2)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG signature"
    length, kind = struct.unpack(">I4s", data[8:16])
    assert kind == b"IHDR" and length == 13
    return struct.unpack(">II", data[16:24])


# --- the report on the real example output -------------------------------------------


def test_sections_and_heading_order(rendered):
    _path, text = rendered
    page = _parse(text)
    assert page.sections == [
        "answer",
        "study",
        "maps",
        "tables",
        "figures",
        "cautions",
        "methods",
    ]
    levels = [level for level, _ in page.headings]
    assert levels[0] == 1 and levels.count(1) == 1
    # no skipped level (WCAG 2.1 technique G141, common practice)
    assert all(b <= a + 1 for a, b in zip(levels, levels[1:], strict=False))
    titles = [t for level, t in page.headings if level == 2]
    assert titles[0] == "In short"
    h3 = [t for level, t in page.headings if level == 3]
    assert "sound" in h3 and "paw" in h3
    assert page.scripts == 2  # the slice browser: its data block and its code


def test_answer_paragraph_states_the_numbers(rendered, output):
    _path, text = rendered
    summary = json.loads((output / "summary.json").read_text())
    sound = summary["results"]["sound"]
    assert "Present?" in text and "Where?" in text
    # the peak t of summary.json, printed with 2 decimals
    assert f"t = {sound['peak']['t']:.2f}" in text
    # the example's sound response sits in auditory cortex (truth of write_example)
    answer = text[text.index('id="answer"') : text.index('id="study"')]
    assert "auditory area" in answer


def test_every_table_has_as_many_rows_as_its_tsv(rendered, output):
    _path, text = rendered
    page = _parse(text)
    sourced = [t for t in page.tables if t["source"]]
    sources = {t["source"] for t in sourced}
    assert {"sound/clusters.tsv", "sound/regions.tsv", "paw/regions.tsv"} <= sources
    for table in sourced:
        tsv = read_tsv(output / table["source"])
        assert len(table["rows"]) == len(tsv), table["source"]
        assert all(len(r) == len(table["headers"]) for r in table["rows"])


def test_table_values_are_the_tsv_values_rounded(rendered, output):
    _path, text = rendered
    page = _parse(text)
    regions = next(t for t in page.tables if t["source"] == "sound/regions.tsv")
    tsv = read_tsv(output / "sound/regions.tsv")
    col = regions["headers"].index("p")
    for row, value in zip(regions["rows"], tsv["p"], strict=True):
        if pd.isna(value):
            assert row[col] == "n/a"
        else:
            assert float(row[col]) == pytest.approx(float(value), rel=5e-3, abs=5e-4)


def test_figures_are_embedded_pngs_that_decode(rendered):
    _path, text = rendered
    page = _parse(text)
    assert len(page.images) >= 8  # montage, views, forest, variance for each contrast
    for img in page.images:
        assert img["alt"] and len(img["alt"]) > 20
        src = img["src"]
        assert src.startswith("data:image/png;base64,")
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        width, height = _png_size(data)
        pixels = mpimg.imread(io.BytesIO(data), format="png")
        assert pixels.shape[:2] == (height, width)
        assert width >= 300 and height >= 150
        assert pixels.std() > 0.01  # not a blank image
    # nothing points outside the file
    assert not re.search(r"""(src|href)=["']https?:""", text)
    assert "<link" not in text


def test_user_strings_are_escaped(rendered):
    _path, text = rendered
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    # the only script elements are the slice browser's own data block and code
    assert "<script>alert(1)" not in text.lower()
    assert set(re.findall(r"<script[^>]*>", text)) <= {
        '<script type="application/json" id="sb-data">',
        "<script>",
    }


def test_cautions_come_from_the_numbers(rendered, output):
    _path, text = rendered
    summary = json.loads((output / "summary.json").read_text())
    perm = summary["results"]["sound"]["inference"]["permutation"]
    cautions = text[text.index('id="cautions"') : text.index('id="methods"')]
    assert "10 animals" in cautions
    assert f"smallest attainable p = {perm['smallest_attainable_p']:.3g}" in cautions
    assert perm["permutations"] == PERMUTATIONS
    assert "drawn at random" in cautions


# --- manuscript tables ---------------------------------------------------------------


@pytest.fixture(scope="module")
def tables(output_copy) -> list[Path]:
    return write_manuscript_tables(output_copy)


def test_manuscript_table_files(tables, output_copy, output):
    names = {p.name for p in tables}
    for stem in ("sound_clusters", "sound_regions", "paw_regions", "sound_animals"):
        for suffix in (".tsv", ".csv", ".tex", ".md"):
            assert stem + suffix in names
    for path in tables:
        assert path.parent == output_copy / "tables"
        # the run itself wrote the same tables
        assert (output / "tables" / path.name).read_bytes() == path.read_bytes()


def _markdown_frame(path: Path) -> pd.DataFrame:
    text = path.read_text(encoding="utf-8")
    lines = text.split("\n\n")[0].splitlines()  # the table; a note may follow it
    assert set(lines[1].replace("|", "").replace(" ", "")) <= set(":-")
    body = "\n".join([lines[0], *lines[2:]])
    frame = pd.read_csv(
        io.StringIO(body), sep=r"\s*(?<!\\)\|\s*", engine="python", dtype=str, na_values=["n/a"]
    )
    return frame.drop(columns=[c for c in frame.columns if c.startswith("Unnamed")])


def test_markdown_parses_back_to_the_rounded_values(tables, output):
    md = _markdown_frame(output / "tables" / "sound_clusters.md")
    tsv = read_tsv(output / "sound" / "clusters.tsv")
    assert len(md) == len(tsv)
    # the one-page columns (defaults of [tables]), p of the deciding method (TFCE)
    assert list(md.columns) == [
        "peak region",
        "side",
        "voxels",
        "volume (mm³)",
        "AP (mm)",
        "ML (mm)",
        "DV (mm)",
        "z",
        "p FWE (TFCE)",
    ]
    # rounding rules: statistics 2 decimals, coordinates 0.01 mm (common practice)
    for header, source, decimals in (
        ("z", "z", 2),
        ("AP (mm)", "peak_AP_mm", 2),
        ("ML (mm)", "peak_ML_mm", 2),
    ):
        got = md[header].astype(float).to_numpy()
        want = np.round(tsv[source].astype(float).to_numpy(), decimals)
        np.testing.assert_allclose(got, want, atol=0.5 * 10**-decimals + 1e-12)
    p = md["p FWE (TFCE)"].astype(float).to_numpy()
    np.testing.assert_allclose(p, tsv["p_fwe_tfce_min"].astype(float), rtol=5e-3, atol=5e-4)
    full = pd.read_csv(output / "tables" / "sound_clusters.tsv", sep="\t", dtype=str)
    assert len(full.columns) == len(tsv.columns)  # the full table keeps every column
    # a peak below the cluster-forming z (scipy: |z| of two-sided p = 0.001) is in no
    # cluster: its cluster p reads in words; the others keep their number
    below = tsv["z"].astype(float).abs() < stats.norm.isf(0.001 / 2)
    assert (full["p FWE (extent)"][below] == "no cluster at p < 0.001").all()
    np.testing.assert_allclose(
        full["p FWE (extent)"][~below].astype(float),
        tsv["p_fwe_cluster_extent"][~below].astype(float),
        atol=5e-4,
    )
    regions = _markdown_frame(output / "tables" / "sound_regions.md")
    assert EVIL in set(regions["region"])  # text kept as written (Markdown is not HTML)


def test_csv_and_tsv_agree(tables, output):
    a = pd.read_csv(output / "tables" / "sound_regions.csv", dtype=str, keep_default_na=False)
    b = pd.read_csv(
        output / "tables" / "sound_regions.tsv", sep="\t", dtype=str, keep_default_na=False
    )
    pd.testing.assert_frame_equal(a, b)
    assert "volume (mm³)" in a.columns and "τ² (map units²)" in a.columns


def test_latex_uses_booktabs_and_escapes(tables, output):
    tex = (output / "tables" / "sound_regions.tex").read_text(encoding="utf-8")
    for rule in ("\\toprule", "\\midrule", "\\bottomrule"):
        assert tex.count(rule) == 1
    # (a long word in a wrapping column may break between characters: \allowbreak{})
    unbroken = tex.replace(r"\allowbreak{}", "")
    assert r"\textless{}script\textgreater{}alert(1)\textless{}/script\textgreater{}" in unbroken
    assert "<script>" not in tex


def test_latex_compiles(tables, output, tmp_path):
    pdflatex = shutil.which("pdflatex")
    if pdflatex is None:
        pytest.skip("pdflatex not found: the LaTeX tables were not compiled (install texlive)")
    body = "\n".join(
        (output / "tables" / f"sound_{k}.tex").read_text(encoding="utf-8")
        for k in ("clusters", "regions")
    )
    run = compile_latex(
        body, tmp_path, "\\usepackage[landscape,margin=5mm]{geometry}\n", timeout=60
    )
    assert run.returncode == 0, run.stdout[-2000:]
    assert (tmp_path / "t.pdf").stat().st_size > 1000


def test_one_page_latex_tables_fit_an_a4_page(tables, output, tmp_path):
    # Each one-page table compiles with pdflatex on its own page of the standard article
    # class (text width 345 pt at 10 pt type, the same on A4 and letter paper; LaTeX's
    # own layout: no "Overfull \\hbox" in the log means no line is wider than the text
    # width; the page count from pdflatex's last line).
    if shutil.which("pdflatex") is None:
        pytest.skip("pdflatex not found: the LaTeX tables were not compiled (install texlive)")
    files = sorted((output / "tables").glob("sound_*.tex"))
    assert len(files) == 6  # clusters, regions, symmetry, specificity, consistency, animals
    body = "\n\\clearpage\n".join(f.read_text(encoding="utf-8") for f in files)
    for f in files:  # only the chosen columns: at most 9 (the defaults of [tables])
        lines = f.read_text(encoding="utf-8").splitlines()
        header = lines[lines.index("\\toprule") + 1]
        assert header.count(" & ") + 1 <= 9, f.name
    run = compile_latex(body, tmp_path, timeout=60)
    assert run.returncode == 0, run.stdout[-2000:]
    log = (tmp_path / "t.log").read_text(encoding="latin-1")
    assert "Overfull \\hbox" not in log, log[log.find("Overfull") - 200 :][:800]
    pages = re.search(r"Output written on t\.pdf \((\d+) pages?", run.stdout)
    assert pages is not None and int(pages.group(1)) == len(files)
    regions = (output / "tables" / "sound_regions.tex").read_text(encoding="utf-8")
    assert "9.00" not in regions and " & 9 & " in regions  # df as an integer
    assert "True" not in regions and "False" not in regions


def test_short_answers_fold_the_numbers(rendered):
    _path, text = rendered
    card = text[text.index('id="answer-1"') : text.index("</article>", text.index('id="answer-1"'))]
    specific = card[card.index("<dt>Specific?</dt>") :]
    specific = specific[: specific.index("</dd>")]
    shown = re.sub(r"<[^>]+>", "", specific[: specific.index("<details")]).strip()
    assert shown.startswith("Specific?") and len(shown) < 260, shown  # one sentence
    assert specific.count("<li>") >= 2  # the other reasons, folded
    assert "Not shown" not in text and "unlabelled ()" not in text


def test_present_and_caution_wording():
    from grouplevel.report.render import _present_item, _uncorrected_cautions

    words = "TFCE, FWE p ≤ 0.05"
    assert _present_item({}, 0, words, "")[1] == "No"  # not "Not shown"
    result = {
        "voxels_p_below_0.001_uncorrected": 0,
        "inference": {"permutation": {"surviving": {"tfce": 123}}},
    }
    first, second = _uncorrected_cautions(result, "tfce", words)
    assert first.startswith("0 voxels have uncorrected p < 0.001")
    assert "(123) than have uncorrected p < 0.001 (0)" in second
    assert "not a contradiction" in second and "TFCE" in second
    result["voxels_p_below_0.001_uncorrected"] = 1
    result["inference"]["permutation"]["surviving"]["tfce"] = 1
    (only,) = _uncorrected_cautions(result, "tfce", words)  # no contradiction to explain
    assert only.startswith("1 voxel has uncorrected")


def test_report_finds_or_names_a_missing_template(output_copy, tmp_path, capsys, monkeypatch):
    import grouplevel.report as report_package
    from grouplevel.cli import main
    from grouplevel.report.render import missing_inputs

    folder = tmp_path / "moved" / "results"
    shutil.copytree(output_copy, folder, ignore=shutil.ignore_patterns("*.nii.gz", "tables"))
    summary = json.loads((folder / "summary.json").read_text())
    # as if the study folder and its outputs had moved together from elsewhere
    summary["output_folder"] = "/nowhere/study-area/results"
    summary["settings"]["study"]["template"] = "/nowhere/study-area/study/template.nii.gz"
    (folder / "summary.json").write_text(json.dumps(summary))
    (problem,) = missing_inputs(folder)
    assert "/nowhere/study-area/study/template.nii.gz was not found" in problem
    # `grouplevel report` says so (the rendering itself is checked elsewhere)
    for name in ("render_report", "write_methods"):
        monkeypatch.setattr(report_package, name, lambda *a, **k: folder / "x")
    monkeypatch.setattr(report_package, "write_manuscript_tables", lambda *a, **k: [])
    assert main(["report", str(folder)]) == 0
    assert "warning: the template" in capsys.readouterr().err
    (folder.parent / "study").mkdir()
    (folder.parent / "study" / "template.nii.gz").write_bytes(b"found")
    assert missing_inputs(folder) == []  # found relative to the moved output folder


# --- formatting rules ----------------------------------------------------------------


def test_p_value_and_number_formatting():
    # p to 3 decimals, scientific below 0.001 so a small p never reads 0.000
    # (APA Publication Manual, 7th ed. 2020, §6.36: exact p to 2-3 decimals; value
    # from memory)
    assert format_value(0.0004321, "p") == "4.32e-04"
    assert format_value(0.001, "p") == "0.001"
    assert format_value(0.04567, "p") == "0.046"
    assert format_value(1.0, "p") == "1.000"
    assert format_value(float("nan"), "p") == "n/a"
    assert format_value(-2.346, "stat") == "-2.35"
    assert format_value(-0.001, "stat") == "0.00"  # no negative zero
    assert format_value(-3.3049, "coord") == "-3.30"
    assert format_value(0.000418193, "variance") == "0.000418"
    assert format_value("True", "bool") == "yes"


def test_latex_escape_specials():
    # the ten special characters of LaTeX (Lamport 1994, LaTeX: A Document Preparation
    # System, 2nd ed., §2.2.1 / common practice)
    assert latex_escape("a_b & 50% #1 $x {y} ~^\\") == (
        r"a\_b \& 50\% \#1 \$x \{y\} \textasciitilde{}\textasciicircum{}\textbackslash{}"
    )


# --- methods --------------------------------------------------------------------------


def test_methods_text_follows_the_settings(output_copy, output):
    text = write_methods(output_copy).read_text(encoding="utf-8")
    assert (output / "methods.md").read_text(encoding="utf-8") == text  # as the run wrote it
    assert "REML" in text and "Biometrika 58:545" in text
    assert "J R Stat Soc B 57:289" in text  # BH (the example's fdr = "bh")
    assert "Ann Stat 29:1165" not in text  # BY not used
    assert "NeuroImage 44:83" in text and "E = 0.5, H = 2" in text  # TFCE on
    assert "NeuroImage 92:381" in text and "PNAS 113:7900" in text
    assert f"{PERMUTATIONS} rearrangements" in text and "drawn at random (seed 1)" in text
    assert "10 animals, 33 runs" in text
    for package in ("numpy", "scipy", "nibabel", "statsmodels"):
        assert re.search(rf"- {package} \d", text)
    has_symmetry = (output / "sound" / "symmetry.tsv").exists()
    assert ("Magn Reson Imaging 26:594" in text) == has_symmetry


# --- optional sections from hand-made files ------------------------------------------


@pytest.fixture(scope="module")
def with_questions(output, tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("questions") / "results"
    shutil.copytree(output, folder)
    sound = folder / "sound"
    pd.DataFrame(
        {
            "region": ["auditory cortex", "inferior colliculus"],
            "li_extent": [0.05, -0.10],
            "li_extent_low": [-0.1, -0.35],
            "li_extent_high": [0.2, 0.15],
            "li_effect": [0.08, 0.02],
            "li_effect_low": [-0.05, -0.2],
            "li_effect_high": [0.21, 0.24],
            "verdict": ["bilateral", "inconclusive"],
            "reasons": ["TOST p = 0.01 within margin 0.2", "CI crosses the margin"],
        }
    ).to_csv(sound / "symmetry.tsv", sep="\t", index=False)
    pd.DataFrame(
        {
            "region": ["auditory cortex"] * 3 + ["inferior colliculus"] * 3,
            "threshold": [2.0, 3.0, 4.0] * 2,
            "li": [0.05, 0.07, 0.1, -0.1, -0.2, -0.3],
        }
    ).to_csv(sound / "li_curves.tsv", sep="\t", index=False)
    pd.DataFrame(
        {"measure": ["target share", "edge share"], "value": [0.82, 0.03], "p": [0.0002, 0.4]}
    ).to_csv(sound / "specificity.tsv", sep="\t", index=False)
    animals = [f"m{i:02d}" for i in range(1, 11)]
    pd.DataFrame(
        {
            "animal": animals,
            "effect": np.linspace(0.1, 0.4, 10),
            "se": [0.05] * 10,
            "ci_low": np.linspace(0.1, 0.4, 10) - 0.1,
            "ci_high": np.linspace(0.1, 0.4, 10) + 0.1,
            "positive": [True] * 9 + [False],
        }
    ).to_csv(sound / "consistency.tsv", sep="\t", index=False)
    pd.DataFrame(
        {
            "animal": ["m01", "m07", "m07"],
            "session": [1, 1, 2],
            "run": [1, 1, 1],
            "correlation": [0.6, 0.1, 0.2],
            "z_correlation": [0.5, -2.5, -2.0],
            "z_variance": [0.1, 3.1, 2.0],
            "flagged": [False, True, False],
            "why": ["", "low correlation; <b>edge</b>", ""],
        }
    ).to_csv(sound / "run_quality.tsv", sep="\t", index=False)
    mask = nib.load(sound / "mask.nii.gz")
    t = np.asarray(nib.load(sound / "t.nii.gz").dataobj) * 0.3
    nib.save(nib.Nifti1Image(t.astype(np.float32), mask.affine), sound / "asymmetry_t.nii.gz")
    summary = json.loads((folder / "summary.json").read_text())
    summary["results"]["sound"]["questions"] = {
        "symmetry": {
            "auditory cortex": {"verdict": "bilateral", "reasons": ["LI within ±0.2"]},
            "inferior colliculus": {"verdict": "inconclusive", "reasons": "CI too wide"},
        },
        "specificity": {"verdict": "specific", "reasons": ["82% of surviving voxels on target"]},
        "consistency": {"verdict": "consistent", "reasons": ["9 of 10 animals positive"]},
    }
    (folder / "summary.json").write_text(json.dumps(summary))
    return folder


def test_question_sections_render_when_files_exist(with_questions):
    text = render_report(with_questions).read_text(encoding="utf-8")
    page = _parse(text)
    sources = {t["source"]: t for t in page.tables if t["source"]}
    for stem, n in (("symmetry", 2), ("specificity", 2), ("consistency", 10), ("run_quality", 3)):
        assert len(sources[f"sound/{stem}.tsv"]["rows"]) == n
    alts = " ".join(i["alt"] for i in page.images)
    for words in (
        "Laterality index with its interval",
        "as a function of the z threshold",
        "Strips of each run",
        "unthresholded left-minus-right",
        "Forest plot",
    ):
        assert words in alts
    answer = text[text.index('id="answer"') : text.index('id="study"')]
    assert "Bilateral?" in answer and "auditory cortex: bilateral; inferior" in answer
    # the reasons of each verdict, folded under it
    assert "<li>auditory cortex: LI within ±0.2.</li>" in answer
    assert "Specific?" in answer and "Consistent?" in answer
    assert "&lt;b&gt;edge&lt;/b&gt;" in text  # a reason from a file is text, not markup
    tables = write_manuscript_tables(with_questions)
    names = {p.name for p in tables}
    assert {"sound_symmetry.tex", "sound_specificity.md", "sound_consistency.csv"} <= names
    methods = write_methods(with_questions).read_text(encoding="utf-8")
    assert "Magn Reson Imaging 26:594" in methods


def test_without_atlas_or_permutations(tmp_path):
    rng = np.random.default_rng(3)
    animals = [f"a{i}" for i in range(5) for _ in range(2)]
    effects = 1.0 + rng.normal(0, 0.5, size=(10, 5, 5, 4))
    toml = write_study(tmp_path / "s", effects, animals, shape=(5, 5, 4))
    out = grouplevel.run_study(toml, tmp_path / "out", permutations=0)
    text = render_report(out, title="A & B <i>").read_text(encoding="utf-8")
    assert "<h1>A &amp; B &lt;i&gt;</h1>" in text
    # the title is kept (report.json) for later renderings without one
    text = render_report(out).read_text(encoding="utf-8")
    assert "<h1>A &amp; B &lt;i&gt;</h1>" in text
    assert json.loads((out / "report.json").read_text())["title"] == "A & B <i>"
    # a study without named first-level contrasts: its runs are "runs", not "runs of runs"
    assert "No run was excluded." in text and "of runs" not in text
    assert "Runs per animal —" in text
    assert "No permutation test was run" in text
    assert "No atlas was given" in text
    assert write_manuscript_tables(out) == []
    methods = write_methods(out).read_text(encoding="utf-8")
    assert "No permutation test was run" in methods
    assert "NeuroImage 44:83" not in methods and "NeuroImage 92:381" not in methods


def test_missing_summary_is_a_user_error(tmp_path):
    with pytest.raises(UserError, match="summary.json"):
        render_report(tmp_path)


def test_planning_section_after_plan(tmp_path):
    # `grouplevel plan` adds power.png and summary["plan"]; the report then shows them.
    import json

    from grouplevel.report.render import build_context

    out = tmp_path / "out"
    (out / "sound").mkdir(parents=True)
    summary = {
        "title": "t",
        "results": {"sound": {"first_level_contrast": "sound", "group_contrast": "mean"}},
        "plan": {
            "sound": {
                "regions": [
                    {
                        "region": "primary auditory area",
                        "hemisphere": "left",
                        "inputs": {
                            "effect": 0.3,
                            "effect_source": "observed",
                            "animals": 10,
                            "runs_per_animal": 3.3,
                            "power_of_this_study": 0.95,
                        },
                        "cheapest": {"animals": 6, "runs": 2, "power": 0.83, "cost": 72.0},
                        "caution": "Power computed from an observed effect is optimistic.",
                    }
                ]
            }
        },
    }
    (out / "summary.json").write_text(json.dumps(summary))
    (result,) = build_context(out)["results"]  # an older folder: the plan in summary.json
    assert result["plan"]["rows"][0]["best"] == "6 animals × 2 runs: power 0.83, cost 72"
    assert result["plan"]["rows"][0]["now"] == "10 animals, 3.3 runs each on average: power 0.95"
    assert "optimistic" in result["plan"]["caution"]
    # plan.json (what `grouplevel plan` writes now) wins over the old entry
    plans = summary.pop("plan")
    region = plans["sound"]["regions"][0]
    region["inputs"].update(animals=4, runs_per_animal=1.0)
    region["cheapest"].update(animals=1, runs=1)
    (out / "summary.json").write_text(json.dumps(summary))
    (out / "plan.json").write_text(json.dumps({"plans": plans}))
    (result,) = build_context(out)["results"]
    # counts in words: no "4 animals x 1 runs", no "1.0 runs each"
    assert result["plan"]["rows"][0]["now"] == "4 animals, 1 run each: power 0.95"
    assert result["plan"]["rows"][0]["best"].startswith("1 animal × 1 run: power")


def test_plan_command_prints_counts_in_words(tmp_path, capsys, monkeypatch):
    # `grouplevel plan` prints the cheapest design as "4 animals x 1 run", never "1 runs"
    # (the planning itself is checked in test_planning_output.py; stubbed here)
    from types import SimpleNamespace

    import grouplevel.planning.plan as plan_module
    import grouplevel.report as report_package
    from grouplevel.cli import main

    folder = tmp_path / "out"
    folder.mkdir()
    (folder / "summary.json").write_text(
        json.dumps({"tool": {"name": "grouplevel"}, "results": {}})
    )
    plan = SimpleNamespace(
        name="sound",
        region="auditory cortex",
        hemisphere="left",
        cheapest={"animals": 4.0, "runs": 1.0, "power": 0.81, "cost": 44.0},
        caution="optimistic",
    )
    monkeypatch.setattr(plan_module, "plan_from_output", lambda *a, **k: [plan])
    monkeypatch.setattr(plan_module, "write_plan", lambda *a, **k: [])
    monkeypatch.setattr(report_package, "render_report", lambda *a, **k: folder / "report.html")
    assert main(["plan", str(folder)]) == 0
    out = capsys.readouterr().out
    assert "4 animals x 1 run (power 0.81, cost 44)" in out, out


def test_report_tables_give_each_number_column_one_number_of_decimals(rendered, output):
    _path, text = rendered
    page = _parse(text)
    regions = next(t for t in page.tables if t["source"] == "sound/regions.tsv")
    tsv = read_tsv(output / "sound/regions.tsv")
    col = regions["headers"].index("effect (map units)")
    shown = [row[col] for row in regions["rows"]]
    decimals = {len(v.split(".")[1]) for v in shown}
    assert len(decimals) == 1  # one number of decimals in the column
    (d,) = decimals
    largest = tsv["effect"].astype(float).abs().max()
    # enough for 3 significant digits of the largest value (at least 2 decimals)
    assert d >= 2 and float(f"{largest:.{d}f}") == pytest.approx(largest, rel=5e-3)
    np.testing.assert_allclose(
        [float(v) for v in shown], tsv["effect"].astype(float), atol=0.5 * 10**-d + 1e-12
    )
