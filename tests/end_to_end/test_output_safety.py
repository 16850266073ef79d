"""Nothing an analysis reads is ever lost, and nothing is written outside its output folder.

Each refusal is checked end to end through the command line: exit status 2, a one-line
``error: ...`` naming the path or key, no fit started, and every input file of the
study still present with its original bytes (SHA-256 before and after).

Outside sources named beside the checks:
- the POSIX portable file name character set (POSIX.1-2017, Base Definitions §3.282:
  letters, digits, ``.``, ``_``, ``-``; a name should not start with ``-``), which the
  name rule extends with space, ``+`` and parentheses (value from memory);
- the OWASP guidance on CSV injection (cells starting with ``=``, ``+``, ``-``, ``@``,
  tab or carriage return are prefixed with a single quote; value from memory);
- pdflatex itself, which must compile every LaTeX table;
- the ten characters LaTeX treats specially, ``# $ % & ~ _ ^ \\ { }`` (Lamport, LaTeX:
  A Document Preparation System, 2nd ed. 1994, §2.2.1 and §3.2; value from memory);
- file systems that ignore case (the default on macOS and Windows laptops: common
  practice).
"""

from __future__ import annotations

import hashlib
import importlib
import json
import os
import re
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import grouplevel
from grouplevel import pipeline
from grouplevel.cli import main
from grouplevel.errors import UserError
from grouplevel.outputs.folder import child_path
from grouplevel.outputs.names import case_collisions, name_problem
from grouplevel.report.tables import (
    Column,
    TableView,
    formula_safe,
    latex_escape,
    write_full,
)
from tests.conftest import compile_latex, save, write_study

ANIMALS = ["a", "a", "b", "b", "c", "c"]
FAST = "\n[inference]\npermutations = 0\n"
LATEX_SPECIALS = "_ % & # $ { } ~ ^ \\"


# --- helpers --------------------------------------------------------------------------
def study(folder: Path, *, contrasts: list[str] | None = None, toml_extra: str = "") -> Path:
    """Six runs of three animals on a 3×3×2 grid, no permutations: fast to fit."""
    effects = np.random.default_rng(0).normal(1, 1, size=(6, 3, 3, 2))
    columns = {"contrast": contrasts} if contrasts is not None else None
    return write_study(folder, effects, ANIMALS, columns=columns, toml_extra=toml_extra + FAST)


def atlas_study(folder: Path, names: tuple[str, str]) -> Path:
    """A study with a two-region atlas whose region names are ``names``."""
    effects = np.random.default_rng(0).normal(1, 1, size=(6, 3, 3, 2))
    toml = write_study(folder, effects, ANIMALS, mask=np.ones((3, 3, 2), bool), toml_extra=FAST)
    labels = np.ones((3, 3, 2))
    labels[2:] = 2
    save(folder / "atlas.nii.gz", labels)
    pd.DataFrame({"index": [1, 2], "name": list(names), "hemisphere": ["left", "right"]}).to_csv(
        folder / "atlas.tsv", sep="\t", index=False
    )
    toml.write_text(toml.read_text() + '\n[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\n')
    return toml


def hashes(folder: Path) -> dict[Path, str]:
    return {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in folder.rglob("*") if p.is_file()}


def assert_unchanged(before: dict[Path, str]) -> None:
    for path, digest in before.items():
        assert path.is_file(), f"{path} was deleted"
        assert hashlib.sha256(path.read_bytes()).hexdigest() == digest, f"{path} changed"


def cli(args: list, capsys) -> tuple[int, str]:
    code = main([str(a) for a in args])
    captured = capsys.readouterr()
    return code, captured.err


def one_line_error(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), err
    assert "Traceback" not in err
    return lines[0]


@pytest.fixture
def no_fit(monkeypatch):
    """Fail the test if a fit starts: refusals must come before any computation."""

    def boom(*_a, **_k):
        raise AssertionError("the fit started before the output folder was refused")

    monkeypatch.setattr(pipeline, "fit_study", boom)


# --- 1. --force never replaces inputs, shared places or folders of others -------------
@pytest.mark.parametrize(
    "where, reason",
    [
        ("study folder", "holds an input of the study"),
        ("maps folder", "holds an input of the study"),
        ("ancestor", "holds an input of the study"),
    ],
)
def test_force_never_replaces_a_folder_holding_inputs(tmp_path, capsys, no_fit, where, reason):
    toml = study(tmp_path / "lab" / "project" / "s")
    out = {
        "study folder": toml.parent,
        "maps folder": toml.parent / "maps",
        "ancestor": tmp_path / "lab",
    }[where]
    before = hashes(tmp_path)
    code, err = cli(["run", toml, "--out", out, "--force"], capsys)
    line = one_line_error(err)
    assert code == 2 and reason in line and str(out) in line
    assert_unchanged(before)


def test_force_never_replaces_the_folder_of_the_runs_table_elsewhere(tmp_path, capsys, no_fit):
    # the runs table and maps live in another folder than the TOML file
    toml = study(tmp_path / "s")
    data = tmp_path / "data"
    data.mkdir()
    shutil.move(toml.parent / "maps", data / "maps")
    shutil.move(toml.parent / "runs.tsv", data / "runs.tsv")
    toml.write_text(toml.read_text().replace('"runs.tsv"', f'"{data / "runs.tsv"}"'))
    before = hashes(tmp_path)
    code, err = cli(["run", toml, "--out", data, "--force"], capsys)
    line = one_line_error(err)
    assert code == 2 and "holds an input of the study" in line and "runs table" in line
    assert_unchanged(before)


@pytest.mark.parametrize("out", ["", "   "])
def test_empty_out_is_refused(tmp_path, capsys, monkeypatch, no_fit, out):
    toml = study(tmp_path / "s")
    monkeypatch.chdir(toml.parent)
    before = hashes(tmp_path)
    code, err = cli(["run", toml, "--out", out, "--force"], capsys)
    assert code == 2 and "--out is empty" in one_line_error(err)
    assert_unchanged(before)


@pytest.mark.parametrize(
    "out, what",
    [
        (".", "is the current working folder"),
        ("..", "contains the current working folder"),
        ("/", "contains the current working folder"),
        ("HOME", "is the home folder"),
    ],
)
def test_shared_places_are_refused(tmp_path, capsys, monkeypatch, no_fit, out, what):
    toml = study(tmp_path / "work" / "s")
    home = tmp_path / "home"
    home.mkdir()
    (home / "thesis.txt").write_text("years of work")
    monkeypatch.setenv("HOME", str(home))
    monkeypatch.chdir(toml.parent)
    before = hashes(tmp_path)
    target = str(home) if out == "HOME" else out
    code, err = cli(["run", toml, "--out", target, "--force"], capsys)
    line = one_line_error(err)
    assert code == 2 and what in line
    assert_unchanged(before)


def test_force_refuses_a_folder_grouplevel_did_not_write(tmp_path, capsys, no_fit):
    toml = study(tmp_path / "s")
    other = tmp_path / "results"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    before = hashes(tmp_path)
    code, err = cli(["run", toml, "--out", other, "--force"], capsys)
    line = one_line_error(err)
    assert (
        code == 2 and str(other) in line and "holds no summary.json written by grouplevel" in line
    )
    assert_unchanged(before)


def test_force_replaces_its_own_output_but_not_a_file_added_to_it(tmp_path, capsys):
    toml = study(tmp_path / "s")
    out = tmp_path / "results"
    assert cli(["run", toml, "--out", out, "--quiet"], capsys)[0] == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["tool"]["name"] == "grouplevel"
    # grouplevel's own folder is replaced with --force ...
    assert cli(["run", toml, "--out", out, "--quiet", "--force"], capsys)[0] == 0
    assert not list(tmp_path.glob(".results.*"))  # no partial or old folder left
    umask = os.umask(0)
    os.umask(umask)
    assert out.stat().st_mode & 0o777 == 0o777 & ~umask  # readable like any new folder
    # ... but not once it holds a file of the user's
    (out / "my_figure.svg").write_text("<svg/>")
    before = hashes(tmp_path)
    code, err = cli(["run", toml, "--out", out, "--quiet", "--force"], capsys)
    line = one_line_error(err)
    assert code == 2 and "my_figure.svg" in line and "did not write" in line
    assert_unchanged(before)


def test_python_api_refuses_the_same_folders(tmp_path, monkeypatch):
    toml = study(tmp_path / "s")
    monkeypatch.setattr(pipeline, "fit_study", lambda *a, **k: pytest.fail("fit started"))
    before = hashes(tmp_path)
    with pytest.raises(UserError, match="holds an input of the study"):
        grouplevel.run_study(toml, toml.parent, force=True)
    with pytest.raises(UserError, match="--out is empty"):
        grouplevel.run_study(toml, "", force=True)
    loaded = grouplevel.load_study(toml)
    with pytest.raises(UserError, match="holds an input of the study"):
        grouplevel.write_outputs(loaded, [], toml.parent / "maps", force=True)
    assert_unchanged(before)


# --- 2. names that become paths ---------------------------------------------------------
BAD_NAMES = [
    ("../../x", "path separator '/'"),
    ("a/b", "path separator '/'"),
    ("a\\b", "path separator '\\\\'"),
    ("/tmp/abs", "path separator '/'"),
    ("..", "'..'"),
    ("x..y", "'..'"),
    ("...", "'..'"),
    (".hidden", "starts with '.'"),
    ("-rf", "starts with '-'"),
    (" lead", "starts with ' '"),
    ("trail.", "ends with '.'"),
    ("a:b", "':'"),
    ("a\x07b", "control character (code 7)"),
    ("CON", "device name"),
    ("x" * 101, "101 characters long"),
]


@pytest.mark.parametrize("name, why", BAD_NAMES)
def test_name_rule_refuses(name, why):
    # POSIX.1-2017 §3.282 portable file name characters, plus space, + and parentheses
    problem = name_problem(name)
    assert problem is not None and why in problem


@pytest.mark.parametrize("name", ["sound", "paw (left)", "drug+stim", "a.b_c-1", "Tone 2"])
def test_name_rule_allows(name):
    assert name_problem(name) is None


def test_empty_and_case_only_names():
    assert name_problem("") == "is empty"
    assert case_collisions(["Paw", "sound", "paw", "PAW", "tone"]) == [("Paw", "paw", "PAW")]


@pytest.mark.parametrize("name, why", BAD_NAMES[:7] + [BAD_NAMES[12]])
def test_first_level_contrast_names_are_refused_at_intake(tmp_path, capsys, name, why):
    toml = study(tmp_path / "s", contrasts=[name] * 6)
    before = hashes(tmp_path)
    code, err = cli(["check", toml], capsys)
    assert code == 2
    if "control character" in why:  # refused by the table reader, before the name rule
        assert "runs.tsv line 2, column 'contrast'" in err and "control character" in err
    else:
        assert "runs.tsv line 2: 'condition'" in err and why in err
    assert_unchanged(before)


def test_first_level_contrast_escaping_out_is_refused_by_run(tmp_path, capsys, no_fit):
    toml = study(tmp_path / "a" / "b" / "s", contrasts=["../../x"] * 6)
    before = hashes(tmp_path)
    code, err = cli(["run", toml, "--out", tmp_path / "a" / "b" / "out"], capsys)
    assert code == 2 and err.startswith("error: ") and "runs.tsv line 2" in err
    assert sorted(p.name for p in tmp_path.rglob("*") if p.name == "x") == []
    assert_unchanged(before)


def test_empty_first_level_name_beside_named_rows(tmp_path, capsys):
    toml = study(tmp_path / "s", contrasts=["sound"] * 5 + [""])
    code, err = cli(["check", toml], capsys)
    assert code == 2 and "runs.tsv line 7" in err and "'condition' is empty" in err


def test_first_level_names_differing_in_case(tmp_path, capsys):
    toml = study(tmp_path / "s", contrasts=["Paw", "paw"] * 3)
    code, err = cli(["check", toml], capsys)
    assert code == 2
    assert "'Paw' (line 2), 'paw' (line 3) differ only in upper and lower case" in err


def _contrast_toml(*names: str) -> str:
    return "".join(f'\n[[contrast]]\nname = "{n}"\nweights = {{Intercept = 1}}\n' for n in names)


@pytest.mark.parametrize(
    "name, why",
    [
        ("../x", "path separator '/'"),
        ("/abs/x", "path separator '/'"),
        ("a\\\\b", "path separator '\\\\'"),
        ("..", "'..'"),
        ("", "is empty"),
        ("a\\tb", "control character (code 9)"),
    ],
)
def test_group_contrast_names_are_refused(tmp_path, capsys, name, why):
    toml = study(tmp_path / "s", toml_extra=_contrast_toml(name))
    before = hashes(tmp_path)
    code, err = cli(["check", toml], capsys)
    assert code == 2 and "study.toml: [contrast 1] name:" in err and why in err
    assert_unchanged(before)


def test_group_contrast_names_differing_in_case(tmp_path, capsys):
    toml = study(tmp_path / "s", toml_extra=_contrast_toml("Up", "up"))
    code, err = cli(["check", toml], capsys)
    assert code == 2 and "[contrast 2] name" in err and "'up' is used twice" in err


def test_result_folders_may_not_collide_or_take_our_names(tmp_path, capsys):
    # first-level 'sound' with group contrast 'x' and first-level 'sound.x' with the
    # default group contrast both name the folder sound.x
    toml = study(
        tmp_path / "s",
        contrasts=["sound"] * 3 + ["sound.X"] * 3,
        toml_extra=_contrast_toml("mean", "x"),
    )
    table = pd.read_csv(toml.parent / "runs.tsv", sep="\t", dtype=str)
    table["animal"] = ["a", "b", "c"] * 2
    table["run"] = "1"
    table.to_csv(toml.parent / "runs.tsv", sep="\t", index=False)
    code, err = cli(["check", toml], capsys)
    assert code == 2 and "'sound.x'" in err and "'sound.X'" in err and "differ only in case" in err
    toml = study(tmp_path / "t", contrasts=["tables"] * 6)
    code, err = cli(["check", toml], capsys)
    assert code == 2 and "result folder 'tables'" in err and "clash" in err


def test_writer_refuses_a_name_that_leaves_the_folder(tmp_path):
    # second line of defence: a GroupMap whose name escapes is refused at writing time
    toml = study(tmp_path / "s")
    loaded = grouplevel.load_study(toml)
    maps, _ = grouplevel.fit_study(loaded)
    bad = [replace(maps[0], name="../escaped")]
    before = hashes(tmp_path)
    with pytest.raises(UserError, match="path separator"):
        grouplevel.write_outputs(loaded, bad, tmp_path / "out")
    assert not (tmp_path / "escaped").exists() and not (tmp_path / "out").exists()
    assert not list(tmp_path.glob(".out.*"))  # the partial folder was removed
    assert_unchanged(before)


def test_child_path_refuses_a_symbolic_link_out(tmp_path):
    folder = tmp_path / "out"
    folder.mkdir()
    (folder / "link").symlink_to(tmp_path)
    assert child_path(folder, "sound") == folder / "sound"
    with pytest.raises(UserError, match="resolves outside"):
        child_path(folder, "link")
    with pytest.raises(UserError, match="'..'"):
        child_path(folder, "..")


# --- 3. an output location that cannot be created or written ---------------------------
def test_out_below_a_file(tmp_path, capsys, no_fit):
    toml = study(tmp_path / "s")
    before = hashes(tmp_path)
    code, err = cli(["run", toml, "--out", toml / "results"], capsys)
    line = one_line_error(err)
    assert code == 2 and f"{toml} is a file, not a folder" in line
    assert_unchanged(before)


def _read_only_folder(tmp_path: Path) -> Path:
    """A folder nobody can create files in: chmod 555, or /sys/kernel for root."""
    if os.geteuid() != 0:
        folder = tmp_path / "locked"
        folder.mkdir()
        folder.chmod(0o555)
        return folder
    sysfs = Path("/sys/kernel")
    if sysfs.is_dir():
        try:
            (sysfs / "grouplevel-probe").mkdir()
        except OSError:
            return sysfs
        (sysfs / "grouplevel-probe").rmdir()
    pytest.skip("running as root without a read-only folder to try (root ignores chmod)")


def test_read_only_parent_is_refused_before_the_fit(tmp_path, capsys, no_fit):
    toml = study(tmp_path / "s")
    locked = _read_only_folder(tmp_path)
    before = hashes(tmp_path / "s")
    try:
        code, err = cli(["run", toml, "--out", locked / "results"], capsys)
    finally:
        if locked.is_relative_to(tmp_path):
            locked.chmod(0o755)
    line = one_line_error(err)
    assert code == 2 and f"cannot write in {locked}" in line
    assert_unchanged(before)


# --- 4. CSV tables are safe to open in a spreadsheet -----------------------------------
def test_formula_safe_follows_the_owasp_list():
    # OWASP, CSV injection: = + - @ tab and carriage return start a formula
    for cell in ("=1+1", "+A1", "-2+3", "@SUM(A1)", "\tx", "\rx", "-cmd|' /C calc'!A0"):
        assert formula_safe(cell) == "'" + cell
    # numbers stay numbers, other text stays as it is
    for cell in ("-1.5", "+2", "1e-05", "-0.11", "n/a", "auditory cortex", "3"):
        assert formula_safe(cell) == cell


def test_csv_text_cells_are_neutralised_and_tsv_keeps_exact_values(tmp_path):
    view = TableView(
        key="regions",
        caption="c",
        columns=(Column("name", "region", "text"), Column("t", "t", "stat")),
        rows=(('=HYPERLINK("http://x")', "-1.50"), ("@cmd", "2.00"), ("+x", "-0.10")),
        source="x",
    )
    paths = write_full(view, tmp_path / "t")
    csv = pd.read_csv(paths[1], dtype=str, keep_default_na=False)
    tsv = pd.read_csv(paths[0], sep="\t", dtype=str, keep_default_na=False)
    assert list(csv["region"]) == ['\'=HYPERLINK("http://x")', "'@cmd", "'+x"]
    assert list(csv["t"]) == ["-1.50", "2.00", "-0.10"]
    assert list(tsv["region"]) == ['=HYPERLINK("http://x")', "@cmd", "+x"]


def test_run_writes_formula_safe_csv_tables(tmp_path, capsys):
    evil = '=HYPERLINK("http://x","a")'
    toml = atlas_study(tmp_path / "s", (evil, "-cmd"))
    out = tmp_path / "out"
    assert cli(["run", toml, "--out", out, "--quiet"], capsys)[0] == 0
    csv = pd.read_csv(out / "tables" / "mean_regions.csv", dtype=str, keep_default_na=False)
    tsv = pd.read_csv(out / "tables" / "mean_regions.tsv", sep="\t", dtype=str)
    assert "'" + evil in set(csv["region"]) and "'-cmd" in set(csv["region"])
    assert evil in set(tsv["region"]) and "-cmd" in set(tsv["region"])
    numbers = pd.to_numeric(csv["effect (map units)"])  # still numbers in the CSV
    np.testing.assert_allclose(numbers, pd.to_numeric(tsv["effect (map units)"]))


# --- 5. LaTeX tables compile -----------------------------------------------------------
def test_latex_escape_leaves_no_special_character_bare():
    # the ten special characters of LaTeX (Lamport 1994, §2.2.1; value from memory)
    for ch in LATEX_SPECIALS.split():
        escaped = latex_escape(f"a{ch}b")
        assert escaped != f"a{ch}b"
        assert escaped.startswith("a") and escaped.endswith("b")
    assert latex_escape("τ² (map units²)") == r"$\tau^{2}$ (map units\textsuperscript{2})"
    assert latex_escape("volume (mm³)") == r"volume (mm$^{3}$)"


def test_every_latex_table_compiles(tmp_path, capsys):
    if shutil.which("pdflatex") is None:
        pytest.skip("pdflatex not found: the LaTeX tables were not compiled (install texlive)")
    names = (f"left {LATEX_SPECIALS} <b>", 'right ≥ α – Ą é | "q"')
    toml = atlas_study(tmp_path / "s", names)
    # the one-page regions table with the variance components (their symbols in LaTeX)
    toml.write_text(
        toml.read_text()
        + '\n[tables]\nregions = ["name", "volume_mm3", "var_animal", "var_run", "p"]\n'
    )
    out = tmp_path / "out"
    assert cli(["run", toml, "--out", out, "--quiet"], capsys)[0] == 0
    tables = sorted((out / "tables").glob("*.tex"))
    assert {p.name for p in tables} >= {"mean_regions.tex", "mean_clusters.tex"}
    regions = (out / "tables" / "mean_regions.tex").read_text(encoding="utf-8")
    assert r"$\tau^{2}$" in regions and r"$\sigma^{2}$" in regions and "mm$^{3}$" in regions
    for path in tables:
        work = tmp_path / f"tex_{path.stem}"
        work.mkdir()
        run = compile_latex(path.read_text(encoding="utf-8"), work)
        assert run.returncode == 0, f"{path.name}: {run.stdout[-1500:]}"
        assert (work / "t.pdf").stat().st_size > 1000


# --- report and plan write only into grouplevel's own folders --------------------------
@pytest.mark.parametrize("command", ["report", "plan"])
def test_report_and_plan_refuse_a_foreign_folder(tmp_path, capsys, command):
    folder = tmp_path / "mine"
    folder.mkdir()
    (folder / "summary.json").write_text('{"results": {}}')
    (folder / "report.html").write_text("my own page")
    before = hashes(folder)
    code, err = cli([command, folder], capsys)
    line = one_line_error(err)
    assert code == 2 and "not written by grouplevel" in line
    assert_unchanged(before)
    assert sorted(p.name for p in folder.iterdir()) == ["report.html", "summary.json"]


def test_report_refuses_result_names_that_leave_the_folder(tmp_path, capsys):
    folder = tmp_path / "a" / "out"
    folder.mkdir(parents=True)
    summary = {"tool": {"name": "grouplevel"}, "results": {"../../escaped": {}}}
    (folder / "summary.json").write_text(json.dumps(summary))
    code, err = cli(["report", folder], capsys)
    assert code == 2 and "'../../escaped'" in one_line_error(err)
    assert [p.name for p in folder.iterdir()] == ["summary.json"]


# --- 6. what keeps holding --------------------------------------------------------------
def test_interrupted_run_keeps_the_earlier_output(tmp_path, capsys, monkeypatch):
    toml = study(tmp_path / "s")
    out = tmp_path / "out"
    assert cli(["run", toml, "--out", out, "--quiet"], capsys)[0] == 0
    earlier = hashes(out)

    def interrupted(_folder, **_k):
        raise KeyboardInterrupt

    # the report is imported when it is drawn (grouplevel.report loads it lazily)
    monkeypatch.setattr(
        importlib.import_module("grouplevel.report.render"), "render_report", interrupted
    )
    code = main(["run", str(toml), "--out", str(out), "--quiet", "--force"])
    assert code == 130
    assert_unchanged(earlier)
    assert set(hashes(out)) == set(earlier)  # nothing added either
    assert not list(tmp_path.glob(".out.*"))  # no half-written folder left beside it


def test_interrupted_fit_after_a_written_result_keeps_the_earlier_output(
    tmp_path, capsys, monkeypatch
):
    """A run writes each result as soon as it is finished (into its hidden folder): an
    interrupt after the first result is on disk still leaves the earlier output as it
    was and no hidden folder beside it."""
    toml = study(tmp_path / "s", contrasts=["light", "puff"] * 3)
    out = tmp_path / "out"
    assert cli(["run", toml, "--out", out, "--quiet"], capsys)[0] == 0
    earlier = hashes(out)
    written: list[list[str]] = []
    add = pipeline.OutputWriter.add

    def add_then_stop(self, gm):
        add(self, gm)
        written.append(sorted(p.name for p in self.tmp.iterdir()))
        raise KeyboardInterrupt

    monkeypatch.setattr(pipeline.OutputWriter, "add", add_then_stop)
    code = main(["run", str(toml), "--out", str(out), "--quiet", "--force"])
    assert code == 130
    assert len(written) == 1 and len(written[0]) == 1  # one result was on disk
    assert_unchanged(earlier)
    assert set(hashes(out)) == set(earlier)
    assert not list(tmp_path.glob(".out.*"))


def test_run_writes_each_result_before_the_next_is_tested(tmp_path, monkeypatch):
    """Each result's maps are written (and its arrays let go) before the next result is
    tested; the folder equals the one written from all maps at once."""
    toml = study(tmp_path / "s", contrasts=["light", "puff"] * 3)
    events: list[str] = []
    add, test = pipeline.OutputWriter.add, pipeline._test_and_correct

    def logged_add(self, gm):
        events.append(f"add {gm.name}")
        add(self, gm)

    def logged_test(*args, **kwargs):
        events.append("test")
        return test(*args, **kwargs)

    monkeypatch.setattr(pipeline.OutputWriter, "add", logged_add)
    monkeypatch.setattr(pipeline, "_test_and_correct", logged_test)
    streamed = grouplevel.run_study(toml, tmp_path / "streamed")
    assert events == ["test", "add light", "test", "add puff"]
    monkeypatch.undo()
    loaded = grouplevel.load_study(toml)
    maps, warns = grouplevel.fit_study(loaded)
    at_once = grouplevel.write_outputs(loaded, maps, tmp_path / "at_once", warnings=warns)
    ignore = {"report.html", "summary.json", "methods.md"}  # they name the folder and time
    a, b = (
        {k.relative_to(f): v for k, v in hashes(f).items() if k.name not in ignore}
        for f in (streamed, at_once)
    )
    assert a == b and len(a) > 10
    summary = [json.loads((f / "summary.json").read_text()) for f in (streamed, at_once)]
    for s in summary:
        s.pop("created"), s.pop("output_folder")
    assert summary[0] == summary[1]


def test_script_tags_in_the_title_are_escaped_in_the_report(tmp_path, capsys):
    toml = study(tmp_path / "s")
    toml.write_text(
        toml.read_text().replace("[study]\n", '[study]\ntitle = "<script>alert(1)</script>"\n')
    )
    out = tmp_path / "out"
    assert cli(["run", toml, "--out", out, "--quiet"], capsys)[0] == 0
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    # the only script elements are the slice browser's own data block and code
    assert "<script>alert(1)" not in page.lower()
    assert set(re.findall(r"<script[^>]*>", page)) <= {
        '<script type="application/json" id="sb-data">',
        "<script>",
    }


def test_toml_typos_are_refused_with_a_suggestion(tmp_path, capsys):
    toml = study(tmp_path / "s")
    toml.write_text(toml.read_text().replace("permutations", "permutatons"))
    code, err = cli(["check", toml], capsys)
    assert code == 2 and "did you mean 'permutations'" in err


def test_example_is_never_written_over_a_study_of_ones_own(tmp_path, capsys):
    toml = study(tmp_path / "s")
    before = hashes(tmp_path)
    code, err = cli(["example", toml.parent], capsys)
    line = one_line_error(err)
    assert code == 2 and str(toml.parent) in line and "holds no earlier example" in line
    assert_unchanged(before)


def test_check_lists_a_bad_name_with_the_other_problems_of_the_table(tmp_path, capsys):
    toml = study(tmp_path / "s", contrasts=["../x"] * 6)
    table = pd.read_csv(toml.parent / "runs.tsv", sep="\t", dtype=str)
    table["exclude"] = ["maybe"] + ["no"] * 5
    table.to_csv(toml.parent / "runs.tsv", sep="\t", index=False)
    code, err = cli(["check", toml], capsys)
    assert code == 2 and "2 problem(s) in the runs table" in err
    assert "'exclude' must be true or false" in err and "'condition' '../x'" in err
