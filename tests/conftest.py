"""Shared helpers and fixtures.

Helpers build small studies (maps, runs table, TOML) in a temporary folder.

The invented example study is expensive to write, load and fit, so it is done once per
test session and shared **read-only** by every test that needs it:

- ``example_folder``: the study written by :func:`grouplevel.example.write_example`;
- ``example_study``: that study loaded with ``permutations = 0`` (parametric maps, FDR);
- ``example_maps``: ``fit_study`` of it, the group maps by name (``sound``, ``paw``),
  with their region tables and the answers to the study's questions;
- ``example_run``: one finished run of the example with the study file's own settings
  (all 1024 sign flips of 10 animals), written to an output folder exactly as
  ``grouplevel run`` writes it (maps, tables, methods, report), with the in-memory maps.

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


def save(path: Path, data: np.ndarray, affine: np.ndarray = TINY_AFFINE) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    nib.save(nib.Nifti1Image(np.asarray(data, dtype=np.float32), affine), str(path))
    return path


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

#: A user string with markup, put into the example atlas of the finished run (it names a
#: region) so that the report, tables and methods of every later check carry it; the
#: report tests check that it is escaped (HTML) or kept as text (Markdown, LaTeX).
HOSTILE_NAME = "<script>alert(1)</script>"
#: The atlas region renamed to ``HOSTILE_NAME`` (no effect is planted there).
RENAMED_REGION = "visual cortex"


@dataclass(frozen=True)
class ExampleRun:
    """The example analysed with its own settings and written to ``out``."""

    study_folder: Path  # the inputs (a copy of the example, one region renamed)
    out: Path  # the finished output folder
    study: object  # grouplevel Study
    maps: dict  # name -> GroupMap, as fitted (with the permutation results)
    warnings: tuple[str, ...]


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
def example_run(example_folder: Path, tmp_path_factory: pytest.TempPathFactory) -> ExampleRun:
    """The example run with the study file's settings, as ``run_study`` runs it.

    ``run_study`` is ``load_study`` + ``fit_study`` + ``write_outputs``; the three steps
    are called here so that the in-memory maps can be checked against the written files.
    The inputs are a copy of the example whose atlas calls the visual cortex
    ``HOSTILE_NAME``.
    """
    import pandas as pd

    from grouplevel.pipeline import check_output_folder, fit_study, load_study, write_outputs

    base = tmp_path_factory.mktemp("example_run")
    folder = base / "study"
    shutil.copytree(example_folder, folder)
    labels = folder / "atlas.tsv"
    table = pd.read_csv(labels, sep="\t", dtype=str, keep_default_na=False)
    assert (table["name"] == RENAMED_REGION).any()
    table.loc[table["name"] == RENAMED_REGION, "name"] = HOSTILE_NAME
    table.to_csv(labels, sep="\t", index=False)
    out = base / "results"
    check_output_folder(out, False)
    study = load_study(folder / "study.toml")
    maps, warnings = fit_study(study)
    write_outputs(study, maps, out, warnings=warnings)
    return ExampleRun(folder, out, study, {m.name: m for m in maps}, tuple(warnings))


@pytest.fixture
def example_output_copy(example_run: ExampleRun, tmp_path: Path) -> Path:
    """A private, editable copy of the finished example output folder."""
    folder = tmp_path / "results"
    shutil.copytree(example_run.out, folder)
    return folder
