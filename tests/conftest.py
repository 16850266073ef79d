"""Shared helpers and fixtures.

Helpers build small studies (maps, runs table, TOML) in a temporary folder.

The invented example study is expensive to write, load and fit, so it is done once per
test session and shared **read-only** by every test that needs it:

- ``example_folder``: the study written by :func:`grouplevel.example.write_example`;
- ``example_study``: that study loaded with ``permutations = 0`` (parametric maps, FDR);
- ``example_maps``: ``fit_study`` of it, the group maps by name (``sound``, ``paw``),
  with their region tables and the answers to the study's questions;
- ``example_output``: the finished output folder of ``run_study`` on the example (32
  random sign flips; maps, tables, methods, report), as ``grouplevel run`` writes it;
- ``example_sound_run``: the sound contrast alone with the study file's own inference
  settings (all 1024 sign flips of 10 animals), with its in-memory maps.

A test that edits files works on a copy (``shutil.copytree`` into its ``tmp_path``).
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

TINY_AFFINE = np.diag([0.2, 0.2, 0.2, 1.0])

#: Session fixtures that fit the example study: a test that uses one is slow (it may be
#: the first to ask for the fit) and is marked so automatically.
EXPENSIVE_FIXTURES = ("example_study", "example_maps", "example_output", "example_sound_run")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Mark every test that uses an expensive example fixture ``slow``."""
    for item in items:
        if any(name in EXPENSIVE_FIXTURES for name in getattr(item, "fixturenames", ())):
            item.add_marker(pytest.mark.slow)


def save(path: Path, data: np.ndarray, affine: np.ndarray = TINY_AFFINE) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    nib.save(nib.Nifti1Image(np.asarray(data, dtype=np.float32), affine), str(path))
    return path


def compile_latex(body: str, folder: Path, extra_preamble: str = "", timeout: float = 120):
    """Compile LaTeX table(s) in a minimal document with pdflatex (``t.tex`` in ``folder``).

    Without booktabs (e.g. only texlive-latex-base installed) its three rules become
    plain lines. Returns the finished process (``returncode`` 0 when it compiled).
    """
    import subprocess

    pdflatex = shutil.which("pdflatex")
    kpsewhich = shutil.which("kpsewhich")
    has_booktabs = (
        kpsewhich is not None
        and subprocess.run([kpsewhich, "booktabs.sty"], capture_output=True).returncode == 0
    )
    rules = (
        "\\usepackage{booktabs}\n"
        if has_booktabs
        else "\\newcommand{\\toprule}{\\hline}\\newcommand{\\midrule}{\\hline}"
        "\\newcommand{\\bottomrule}{\\hline}\n"
    )
    doc = (
        f"\\documentclass{{article}}\n\\usepackage[utf8]{{inputenc}}\n{rules}{extra_preamble}"
        f"\\begin{{document}}\n\\tiny\n{body}\n\\end{{document}}\n"
    )
    (folder / "t.tex").write_text(doc, encoding="utf-8")
    return subprocess.run(
        [pdflatex, "-interaction=nonstopmode", "-halt-on-error", "t.tex"],
        cwd=folder,
        capture_output=True,
        text=True,
        timeout=timeout,
    )


def write_study(
    folder: Path,
    effects: np.ndarray,
    animals: list[str],
    *,
    variances: np.ndarray | None = None,
    shape: tuple[int, int, int] = (3, 3, 2),
    mask: np.ndarray | None = None,
    columns: dict[str, list] | None = None,
    toml_extra: str = "",
    model: str = "",
    affine: np.ndarray = TINY_AFFINE,
) -> Path:
    """Write a study with one map per run.

    ``effects`` is (n_runs,) — each map constant at that value — or (n_runs, *shape).
    Returns the study TOML path.
    """
    folder.mkdir(parents=True, exist_ok=True)
    effects = np.asarray(effects, dtype=float)
    n = effects.shape[0]
    rows = []
    run_counter: dict[str, int] = {}
    for k in range(n):
        vol = np.full(shape, effects[k]) if effects.ndim == 1 else effects[k]
        eff = save(folder / "maps" / f"run{k:03d}_effect.nii.gz", vol, affine)
        run_counter[animals[k]] = run_counter.get(animals[k], 0) + 1
        row = {
            "animal": animals[k],
            "run": run_counter[animals[k]],
            "effect": str(eff.relative_to(folder)),
        }
        if variances is not None:
            var = np.asarray(variances, dtype=float)
            vvol = np.full(shape, var[k]) if var.ndim == 1 else var[k]
            vpath = save(folder / "maps" / f"run{k:03d}_variance.nii.gz", vvol, affine)
            row["variance"] = str(vpath.relative_to(folder))
        rows.append(row)
    table = pd.DataFrame(rows)
    for name, values in (columns or {}).items():
        table[name] = values
    table.to_csv(folder / "runs.tsv", sep="\t", index=False)
    text = '[study]\ntable = "runs.tsv"\n'
    if mask is not None:
        save(folder / "mask.nii.gz", mask.astype(np.float32), affine)
        text += 'mask = "mask.nii.gz"\n'
    text += toml_extra
    if model:
        text += "\n[model]\n" + model + "\n"
    (folder / "study.toml").write_text(text)
    return folder / "study.toml"


@pytest.fixture
def tiny_study(tmp_path: Path) -> Path:
    """Six animals × three runs, smooth-free random maps with first-level variances."""
    rng = np.random.default_rng(7)
    animals = [f"a{i}" for i in range(6) for _ in range(3)]
    u = rng.normal(0, 1.0, size=(6, 4, 4, 3))
    effects = np.stack([1.0 + u[i // 3] + rng.normal(0, 0.7, (4, 4, 3)) for i in range(18)])
    variances = rng.uniform(0.2, 0.6, size=(18, 4, 4, 3))
    return write_study(tmp_path / "study", effects, animals, variances=variances, shape=(4, 4, 3))


# --------------------------------------------------------------------------------------
# The example study, once per session
# --------------------------------------------------------------------------------------

#: A user string with markup, put into the atlas of the finished example run (it names a
#: region) so that its report, tables and methods carry it; the report tests check that
#: it is escaped (HTML, LaTeX) or kept as text (Markdown).
HOSTILE_NAME = "<script>alert(1)</script>"
#: The atlas region renamed to ``HOSTILE_NAME`` (no effect is planted there).
RENAMED_REGION = "visual cortex"
#: Random sign flips of the finished example run: few, so that the run is quick (10
#: animals have 2^10 = 1024 distinct flips, so these are drawn at random).
EXAMPLE_OUTPUT_PERMUTATIONS = 32


@dataclass(frozen=True)
class SoundRun:
    """The example's sound contrast run with the study's own inference settings."""

    study_folder: Path  # the inputs: the example, sound runs only, no [questions]
    out: Path  # the finished output folder
    study: object  # grouplevel Study
    maps: dict  # name -> GroupMap, as fitted (with the permutation results)


@pytest.fixture(scope="session")
def example_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The example study as written by ``write_example`` (``study.toml`` inside)."""
    from grouplevel.example import write_example

    folder = tmp_path_factory.mktemp("example") / "study"
    toml = write_example(folder)
    assert toml == folder / "study.toml"
    return folder


@pytest.fixture(scope="session")
def example_study(example_folder: Path):
    """The example loaded without permutations (parametric maps and FDR)."""
    import grouplevel

    return grouplevel.load_study(example_folder / "study.toml", permutations=0)


@pytest.fixture(scope="session")
def example_maps(example_study) -> dict:
    """``fit_study`` of the example without permutations: group maps by name."""
    import grouplevel

    maps, _ = grouplevel.fit_study(example_study)
    return {m.name: m for m in maps}


@pytest.fixture(scope="session")
def example_output(example_folder: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The finished output folder of ``run_study`` on the example (both contrasts, the
    questions, EXAMPLE_OUTPUT_PERMUTATIONS random sign flips; maps, tables, methods and
    report). The inputs are a copy of the example whose atlas calls the visual cortex
    ``HOSTILE_NAME``."""
    import pandas as pd

    import grouplevel

    base = tmp_path_factory.mktemp("example_output")
    folder = base / "study"
    shutil.copytree(example_folder, folder)
    labels = folder / "atlas.tsv"
    table = pd.read_csv(labels, sep="\t", dtype=str, keep_default_na=False)
    assert (table["name"] == RENAMED_REGION).any()
    table.loc[table["name"] == RENAMED_REGION, "name"] = HOSTILE_NAME
    table.to_csv(labels, sep="\t", index=False)
    return grouplevel.run_study(
        folder / "study.toml", base / "results", permutations=EXAMPLE_OUTPUT_PERMUTATIONS
    )


@pytest.fixture(scope="session")
def example_sound_run(example_folder: Path, tmp_path_factory: pytest.TempPathFactory):
    """The sound contrast of the example with the study file's inference settings (all
    1024 sign flips of 10 animals): the exact permutation test, the slowest step of the
    suite. The study is cut to what that needs: the sound runs only, without the
    ``[questions]`` tables (the permutation maps and the region tables do not depend on
    them; the sound fit is the same as in the whole study, contrasts being fitted one by
    one). ``run_study`` is ``load_study`` + ``fit_study`` + ``write_outputs``; the steps are
    called here so that the in-memory maps can be checked against the written files.
    """
    import pandas as pd

    from grouplevel.pipeline import fit_study, load_study, write_outputs

    base = tmp_path_factory.mktemp("example_sound")
    folder = base / "study"
    shutil.copytree(example_folder, folder)
    toml = folder / "study.toml"
    text = toml.read_text()
    assert text.index("[questions]") > text.index("[inference]")  # questions come last
    kept = text[: text.index("[questions]")]
    # the sound condition alone: its comparison with paw goes too
    kept = kept[: kept.index("[[comparison]]")] + kept[kept.index("[inference]") :]
    toml.write_text(kept)
    runs = folder / "runs.tsv"
    table = pd.read_csv(runs, sep="\t", dtype=str, keep_default_na=False)
    table[table["condition"] == "sound"].to_csv(runs, sep="\t", index=False)
    study = load_study(toml)
    maps, warnings = fit_study(study)
    out = write_outputs(study, maps, base / "results", warnings=warnings)
    return SoundRun(folder, out, study, {m.name: m for m in maps})
