"""The templates ship inside a non-editable wheel, and the console script is declared."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet", "-w", str(out), str(ROOT)],
        check=True,
        capture_output=True,
    )
    (built,) = out.glob("grouplevel-*.whl")
    return built


def test_wheel_contains_templates_and_entry_point(wheel):
    names = zipfile.ZipFile(wheel).namelist()
    shipped = {n for n in names if n.startswith("grouplevel/templates/")}
    on_disk = {
        f"grouplevel/templates/{p.name}"
        for p in (ROOT / "templates").iterdir()
        if p.suffix in (".j2", ".css", ".js", ".py")
    }
    assert on_disk and on_disk <= shipped
    entry = next(n for n in names if n.endswith("entry_points.txt"))
    text = zipfile.ZipFile(wheel).read(entry).decode()
    assert "grouplevel = grouplevel.cli:main" in text


def test_non_editable_install_renders_the_check_template(wheel, tmp_path):
    target = tmp_path / "site"
    subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "install",
            "--no-deps",
            "--quiet",
            "--target",
            str(target),
            str(wheel),
        ],
        check=True,
        capture_output=True,
    )
    code = (
        "import grouplevel, importlib.resources as r;"
        "print(grouplevel.__file__);"
        "print(r.files('grouplevel.templates').joinpath('check_summary.txt.j2')"
        ".read_text()[:20])"
    )
    done = subprocess.run(
        [sys.executable, "-c", code],
        cwd=tmp_path,
        env={"PYTHONPATH": str(target), "PATH": "/usr/bin:/bin"},
        check=True,
        capture_output=True,
        text=True,
    )
    first, second = done.stdout.splitlines()[:2]
    assert first.startswith(str(target))
    assert "{{ title }}" in second
