"""Each animal's own estimate at every voxel: the 4-D maps of a result folder.

Three files per group contrast, one volume per animal in the order of the ``animals``
list that ``summary.json`` records under ``results.<name>.animal_maps``:

- ``animal_effect.nii.gz`` — each animal's estimate of what the contrast tests (float32);
- ``animal_se.nii.gz`` — its standard error (float32; 0 where unknown);
- ``animal_runs.nii.gz`` — the number of the animal's runs with data there (int16).

A voxel where an animal has no run with data holds 0 in all three; the run count tells
such a 0 from an estimate of 0.

For a small study (at most :data:`RUN_VALUES_MAX` runs × voxels) a fourth file keeps the
value of every run behind the estimates, so the report can show them:

- ``run_effect.nii.gz`` — one volume per run (float32; NaN where the run has no data),
  grouped by animal in the order of ``animals`` and of each animal's ``run_labels``.

This module is the one writer and reader of these files.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np

from grouplevel.intake.images import Grid, map_intent
from grouplevel.outputs.files import save_image
from grouplevel.results.maps import AnimalEffects

#: File of each per-animal quantity (the keys of the summary entry's ``files``).
ANIMAL_MAP_FILES = {
    "effect": "animal_effect.nii.gz",
    "se": "animal_se.nii.gz",
    "runs": "animal_runs.nii.gz",
}
#: Largest runs × voxels whose run values are copied into the result folder (our own
#: choice: a float32 file of at most 1 MB, which the report can embed; larger studies
#: keep their run values in the input maps only).
RUN_VALUES_MAX = 250_000
RUN_VALUES_FILE = "run_effect.nii.gz"
_DESCRIPTIONS = {
    "effect": "each animal's estimate",
    "se": "SE of each animal's estimate",
    "runs": "runs with data per animal",
}


def _volume(values: np.ndarray, mask: np.ndarray, grid: Grid, dtype) -> np.ndarray:
    out = np.zeros((*grid.shape, values.shape[0]), dtype=dtype)
    clean = np.nan_to_num(values, nan=0.0, posinf=0.0, neginf=0.0).astype(dtype)
    out[mask] = clean.T
    return out


def write_animal_maps(
    folder: Path, effects: AnimalEffects, mask: np.ndarray, grid: Grid, label: str
) -> None:
    """Write the three 4-D maps into ``folder`` (in-mask values; 0 elsewhere)."""
    for key, name in ANIMAL_MAP_FILES.items():
        values = getattr(effects, key)
        dtype = np.int16 if key == "runs" else np.float32
        img = nib.Nifti1Image(_volume(values, mask, grid, dtype), grid.affine)
        img.header["descrip"] = f"grouplevel {_DESCRIPTIONS[key]} [{label}]".encode(
            "ascii", "replace"
        )[:79]
        intent, params, intent_name = map_intent(name.split(".")[0])
        img.header.set_intent(intent, params, name=intent_name)
        img.header.set_xyzt_units("mm")
        img.set_qform(grid.affine, code=1)
        img.set_sform(grid.affine, code=1)
        save_image(img, folder / name)
    if effects.run_values is not None:
        values = np.zeros((*grid.shape, effects.run_values.shape[0]), dtype=np.float32)
        values[mask] = effects.run_values.T  # NaN kept: a run without data there
        img = nib.Nifti1Image(values, grid.affine)
        img.header["descrip"] = f"grouplevel each run's value [{label}]".encode("ascii", "replace")[
            :79
        ]
        img.header.set_intent("estimate", (), name="run value")
        img.header.set_xyzt_units("mm")
        img.set_qform(grid.affine, code=1)
        img.set_sform(grid.affine, code=1)
        save_image(img, folder / RUN_VALUES_FILE)


def animal_maps_summary(effects: AnimalEffects) -> dict:
    """The ``summary.json`` entry of the per-animal maps (``results.<name>.animal_maps``)."""
    return {
        "animals": list(effects.animals),
        "run_labels": {
            a: list(r) for a, r in zip(effects.animals, effects.run_labels, strict=True)
        },
        "what": effects.what,
        "files": dict(ANIMAL_MAP_FILES),
        "run_values": None if effects.run_values is None else RUN_VALUES_FILE,
    }


@dataclass(frozen=True)
class AnimalMapFiles:
    """The per-animal maps of one result folder, as read back.

    ``effect``, ``se`` and ``runs`` are 4-D images (one volume per animal) in the order
    of ``animals``; ``run_values`` (or None) one volume per run, grouped by animal.
    """

    animals: tuple[str, ...]
    run_labels: dict[str, list[str]]
    what: str
    effect: nib.spatialimages.SpatialImage
    se: nib.spatialimages.SpatialImage
    runs: nib.spatialimages.SpatialImage
    run_values: nib.spatialimages.SpatialImage | None = None


def read_animal_maps(folder: Path, entry: dict | None) -> AnimalMapFiles | None:
    """The per-animal maps of a result folder, or None when it has none (an older
    folder, or a design without per-animal estimates)."""
    if not entry:
        return None
    files = entry.get("files") or ANIMAL_MAP_FILES
    images = {}
    for key in ANIMAL_MAP_FILES:
        path = Path(folder) / str(files.get(key, ANIMAL_MAP_FILES[key]))
        if not path.is_file():
            return None
        images[key] = nib.load(str(path))
    animals = tuple(str(a) for a in entry.get("animals") or [])
    if any(img.ndim != 4 or img.shape[3] != len(animals) for img in images.values()):
        return None
    labels = {str(k): [str(v) for v in vs] for k, vs in (entry.get("run_labels") or {}).items()}
    run_values = None
    if entry.get("run_values") and (Path(folder) / str(entry["run_values"])).is_file():
        run_values = nib.load(str(Path(folder) / str(entry["run_values"])))
        n_runs = sum(len(labels.get(a, [])) for a in animals)
        if run_values.ndim != 4 or run_values.shape[3] != n_runs:
            run_values = None
    return AnimalMapFiles(
        animals=animals,
        run_labels=labels,
        what=str(entry.get("what") or ""),
        run_values=run_values,
        **images,
    )
