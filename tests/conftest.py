"""Shared helpers: build small studies (maps, runs table, TOML) in a temporary folder."""

from __future__ import annotations

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
