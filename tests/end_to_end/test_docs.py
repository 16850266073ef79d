"""The examples in docs/ run as written (a check of our own documentation).

The Python blocks of the user guide are executed in order, in one namespace, in a
folder where the example study has been written (as the guide says); the command lines
of "A first session" are run through the command-line entry point.
"""

from __future__ import annotations

import importlib
import os
import re
import shlex
import shutil
from pathlib import Path

import pandas as pd
import pytest

from grouplevel.cli import main

DOCS = Path(__file__).resolve().parents[2] / "docs"
# in the order a reader meets them: the API writes my_results_api, the others use it
PYTHON_PAGES = ("python-api.md", "planning.md", "report.md")

# the pages run whole analyses of the example (fit, permutations, report)
pytestmark = pytest.mark.slow


def _blocks(page: str, language: str) -> list[str]:
    """The fenced code blocks of a page whose info string is ``language``."""
    blocks: list[str] = []
    current: list[str] | None = None
    info = ""
    for line in (DOCS / page).read_text(encoding="utf-8").splitlines():
        if current is None and line.startswith("```"):
            info, current = line[3:].strip(), []
        elif current is not None and line.strip() == "```":
            if info == language:
                blocks.append("\n".join(current) + "\n")
            current = None
        elif current is not None:
            current.append(line)
    return blocks


@pytest.fixture(scope="module")
def folder(tmp_path_factory, example_folder):
    here = tmp_path_factory.mktemp("docs")
    # what `grouplevel example my_example` writes: a copy of the session's example
    shutil.copytree(example_folder, here / "my_example")
    old = os.getcwd()
    os.chdir(here)
    yield here
    os.chdir(old)


def test_python_examples_run_as_written(folder):
    namespace: dict = {}
    count = 0
    for page in PYTHON_PAGES:
        for block in _blocks(page, "python"):
            exec(compile(block, f"docs/{page}", "exec"), namespace)  # noqa: S102
            count += 1
    assert count >= 4
    assert (folder / "my_results_api" / "report.html").is_file()
    assert (folder / "my_results_api" / "sound" / "power.tsv").is_file()


def test_first_session_commands_run_as_written(folder, capsys):
    (block,) = [b for b in _blocks("index.md", "") if "grouplevel example" in b]
    commands = [line.split("#")[0].strip() for line in block.splitlines()]
    ran = 0
    for command in commands:
        words = shlex.split(command)
        if not words or not words[0].endswith("grouplevel"):
            continue  # `make demo` is what the fresh-clone check runs
        if words[1] == "run":
            # the full run (1024 exhaustive sign flips per contrast) is exercised by the
            # example tests; here the same command line, with fewer permutations
            words += ["--permutations", "16"]
        assert main(words[1:]) == 0, command
        ran += 1
    assert ran == 3
    assert (folder / "my_results" / "report.html").is_file()
    assert "study is valid" in capsys.readouterr().out


def test_first_level_page_runs_as_written(folder, capsys):
    # docs/first-level-to-grouplevel.md: the Python blocks build a derivatives folder
    # from the example's maps and rewrite the example's atlas table in the style of a
    # published structure table (named in the study file), `grouplevel table` turns the
    # folder into a runs table, and the study file naming that table passes `check` with
    # the same runs as the original, reading the atlas table as the page says
    page = "first-level-to-grouplevel.md"
    blocks = _blocks(page, "python")
    assert len(blocks) == 2
    namespace: dict = {}
    for block in blocks:
        exec(compile(block, f"docs/{page}", "exec"), namespace)  # noqa: S102
    commands = [
        shlex.split(line.split("#")[0])
        for b in _blocks(page, "")
        for line in b.splitlines()
        if line.startswith(".venv/bin/grouplevel")
    ]
    assert [c[1] for c in commands] == ["table", "check"]
    assert main(commands[0][1:]) == 0
    made = pd.read_csv(folder / "my_example" / "runs_from_folder.tsv", sep="\t", dtype=str)
    original = pd.read_csv(folder / "my_example" / "runs.tsv", sep="\t", dtype=str)
    assert len(made) == len(original)
    key = ["animal", "session", "run", "condition"]
    assert sorted(map(tuple, made[key].to_numpy())) == sorted(map(tuple, original[key].to_numpy()))
    toml = folder / "my_example" / "study.toml"
    text = toml.read_text()
    assert 'labels = "atlas_structures.csv"' in text
    toml.write_text(text.replace('table = "runs.tsv"', 'table = "runs_from_folder.tsv"'))
    try:
        assert main(commands[1][1:]) == 0
    finally:
        toml.write_text(text.replace('labels = "atlas_structures.csv"', 'labels = "atlas.tsv"'))
    out = capsys.readouterr().out
    assert "study is valid" in out
    assert "'acronym' as the abbreviation" in out
    assert "hemisphere read from the region name in 46 row(s)" in out


# --------------------------------------------------------------------------------------
# Import paths the documentation shows
# --------------------------------------------------------------------------------------

_FROM_IMPORT = re.compile(r"from (grouplevel[\w.]*) import (?:\(([^)]*)\)|([\w ,]+))")
_DOTTED = re.compile(r"\bgrouplevel(?:\.[A-Za-z_]\w*)+")


def _documented_text() -> str:
    pages = sorted(DOCS.glob("*.md"))
    root = DOCS.parent
    pages += [root / "README.md", root / "DEVELOPERS.md"]
    return "\n".join(p.read_text(encoding="utf-8") for p in pages if p.is_file())


def _resolve(dotted: str):
    """Import the longest importable prefix of ``dotted`` and get the rest as attributes."""
    parts = dotted.split(".")
    for k in range(len(parts), 0, -1):
        try:
            obj = importlib.import_module(".".join(parts[:k]))
        except ModuleNotFoundError:
            continue
        for name in parts[k:]:
            obj = getattr(obj, name)
        return obj
    raise ModuleNotFoundError(dotted)


def test_documented_from_imports_work():
    found = _FROM_IMPORT.findall(_documented_text())
    assert len(found) >= 6
    for module, in_parentheses, on_one_line in found:
        imported = importlib.import_module(module)
        names = in_parentheses or on_one_line
        for name in (n.strip() for n in names.replace("\n", ",").split(",")):
            if name:
                assert hasattr(imported, name), f"docs: from {module} import {name}"


def test_documented_dotted_names_resolve():
    names = set(_DOTTED.findall(_documented_text())) - {"grouplevel.templates"}
    # file names such as grouplevel.toml are not Python names
    names = {n for n in names if not n.endswith((".toml", ".tsv", ".json", ".md", ".py"))}
    assert len(names) >= 5
    for dotted in sorted(names):
        _resolve(dotted)


def test_public_api_and_old_import_paths():
    import grouplevel
    from grouplevel._moved import MOVED

    for name in ("load_study", "fit_study", "write_outputs", "run_study", "GroupMap", "Study"):
        assert callable(getattr(grouplevel, name)), name
    assert issubclass(grouplevel.UserError, Exception)
    # the flat paths before 0.2 are the very same module objects as the new homes
    for old, new in MOVED.items():
        assert importlib.import_module(old) is importlib.import_module(new), old
    from grouplevel.cli import main as cli_main
    from grouplevel.planning import plan_from_output
    from grouplevel.questions import answer_questions

    assert callable(cli_main) and callable(plan_from_output) and callable(answer_questions)
