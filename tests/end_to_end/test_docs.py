"""The examples in docs/ run as written (a check of our own documentation).

The Python blocks of the user guide are executed in order, in one namespace, in a
folder where the example study has been written (as the guide says); the command lines
of "A first session" are run through the command-line entry point.
"""

from __future__ import annotations

import os
import re
import shlex
import shutil
from pathlib import Path

import pytest

from grouplevel.cli import main

DOCS = Path(__file__).resolve().parents[2] / "docs"
# in the order a reader meets them: the API writes my_results_api, the others use it
PYTHON_PAGES = ("python-api.md", "planning.md", "report.md")

# the pages run whole analyses of the example (fit, permutations, report)
pytestmark = pytest.mark.slow


def _blocks(page: str, language: str) -> list[str]:
    text = (DOCS / page).read_text(encoding="utf-8")
    return re.findall(rf"```{language}\n(.*?)```", text, flags=re.S)


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
