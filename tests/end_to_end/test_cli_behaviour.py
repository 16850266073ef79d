"""Command-line behaviour that is not about numbers: refusals, pipes, help, logs."""

from __future__ import annotations

import io
import os
import sys

import pytest

from grouplevel.cli import main
from grouplevel.cli.commands import _parser
from grouplevel.progress import Progress


def test_example_does_not_overwrite_a_study_of_ones_own(tmp_path, capsys):
    folder = tmp_path / "mine"
    folder.mkdir()
    (folder / "study.toml").write_text("# my own study\n")
    assert main(["example", str(folder)]) == 2
    assert "holds no earlier example" in capsys.readouterr().err
    assert (folder / "study.toml").read_text() == "# my own study\n"
    # an earlier example is ours to write again
    again = tmp_path / "again"
    assert main(["example", str(again)]) == 0
    assert main(["example", str(again)]) == 0
    assert "INVENTED" in (again / "study.toml").read_text()


def test_a_closed_pipe_ends_quietly(tmp_path, monkeypatch, capsys):
    # `grouplevel ... | head -1`: the reader closes the pipe; no traceback, exit 0
    read_end, write_end = os.pipe()
    os.close(read_end)
    broken = os.fdopen(write_end, "w", buffering=1)
    monkeypatch.setattr(sys, "stdout", broken)
    folder = tmp_path / "ex"
    try:
        assert main(["example", str(folder)]) == 0
    finally:
        broken.close()
    assert "Traceback" not in capsys.readouterr().err


@pytest.mark.parametrize(
    ("command", "words"),
    [
        (["plan", "--help"], "power the cheapest design must reach"),
        (["example", "--help"], "folder to write the example study into"),
        (["demo", "--help"], "print only errors"),
    ],
)
def test_every_option_has_help(command, words, capsys):
    with pytest.raises(SystemExit):
        _parser().parse_args(command)
    assert words in " ".join(capsys.readouterr().out.split())


def test_progress_in_a_log_is_a_few_plain_lines():
    stream = io.StringIO()  # not a terminal
    bar = Progress("permutations sound", "permutations", quiet=False, stream=stream)
    for _ in range(64):
        bar.update(16, 1024)
    bar.close()
    text = stream.getvalue()
    assert "\r" not in text
    assert text.splitlines() == [
        "permutations sound: 256/1024 permutations",
        "permutations sound: 512/1024 permutations",
        "permutations sound: 768/1024 permutations",
        "permutations sound: 1024/1024 permutations",
    ]
    quiet = io.StringIO()
    silent = Progress("x", "permutations", quiet=True, stream=quiet)
    silent.update(10, 10)
    assert quiet.getvalue() == ""


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_bar_time_left_ignores_the_compiling_first_batch():
    # The first batch includes compiling the kernels (here: 100 s on a fake clock), the
    # next ones take 1 s each. The time left must come from the later batches only:
    # 62 batches of 16 left at 1 s each = 62 s (tqdm prints it as 01:02), not the
    # ~50 minutes a rate measured from the start would promise.
    clock = [0.0]
    stream = _Terminal()
    bar = Progress("permutations sound", "permutations", quiet=False, stream=stream)
    bar._bar._time = lambda: clock[0]
    bar._bar.start_t = bar._bar.last_print_t = 0.0
    bar._bar.mininterval = 0
    assert "first batch (includes compiling)" in stream.getvalue()
    clock[0] = 100.0
    bar.update(16, 1024)
    clock[0] = 101.0
    bar.update(16, 1024)
    remaining = bar._bar.format_dict
    rate = (remaining["n"] - remaining["initial"]) / remaining["elapsed"]
    assert rate == pytest.approx(16.0)
    assert (1024 - remaining["n"]) / rate == pytest.approx(62.0)
    assert "01:02" in stream.getvalue().rsplit("\r", 1)[-1]
    bar.close()


def test_check_and_a_fit_load_only_what_they_use(example_folder):
    # `check` needs neither the compiled kernels (numba) nor the report stack
    # (matplotlib); a fit loads numba when it first fits, and the report stack is
    # loaded only when the report is drawn (after fit_study). Neither loads scipy.stats
    # (grouplevel.distributions has the t, normal, F and chi-squared functions they use).
    # One fresh interpreter, so that nothing imported by other tests counts.
    import subprocess
    import sys

    toml = example_folder / "study.toml"
    code = f"""
import sys
from grouplevel.cli.commands import main
assert main(["check", {str(toml)!r}]) == 0
print("check", "numba" in sys.modules, "matplotlib" in sys.modules, "scipy.stats" in sys.modules)
import grouplevel
study = grouplevel.load_study({str(toml)!r}, permutations=0)
grouplevel.fit_study(study)
print("fit", "numba" in sys.modules, "matplotlib" in sys.modules, "scipy.stats" in sys.modules)
"""
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    lines = [line for line in done.stdout.splitlines() if line.startswith(("check", "fit"))]
    assert lines == ["check False False False", "fit True False False"]
