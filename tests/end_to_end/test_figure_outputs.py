"""Figure files, per-animal maps, the thresholded z map and the targets of a finished run.

The folder is the session's finished example run (tests/conftest.py, ``example_output``),
read only. Outside references:
- Pillow reads each PNG and its resolution (the pHYs chunk, PNG specification W3C 2003
  §11.3.5.3); a PDF starts with ``%PDF-`` (ISO 32000-1:2008 §7.5.2);
- numpy.average with weights 1/(σ̂² + s_k²) on the run maps read from the study's own
  files is the reference for each animal's precision-weighted mean (inverse-variance
  weighting, Borenstein et al. 2009, Introduction to Meta-Analysis, ch. 11, from memory);
- the atlas label table (atlas.tsv: index, parent) for the target outlines.
"""

from __future__ import annotations

import base64
import html
import json
import re
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from PIL import Image

_FIGURE = re.compile(
    r'<figure[^>]*data-file="(?P<file>[^"]+)"[^>]*>\s*'
    r'<img src="data:image/png;base64,(?P<png>[^"]+)" alt="[^"]*">\s*'
    r"<figcaption>(?P<caption>.*?)</figcaption>",
    re.S,
)


@pytest.fixture(scope="module")
def output(example_output) -> Path:
    return example_output


@pytest.fixture(scope="module")
def summary(output) -> dict:
    return json.loads((output / "summary.json").read_text(encoding="utf-8"))


def _data(path: Path) -> np.ndarray:
    return np.asarray(nib.load(str(path)).dataobj, dtype=float)


def test_report_figures_are_the_files_with_their_captions(output, summary):
    text = (output / "report.html").read_text(encoding="utf-8")
    shown = list(_FIGURE.finditer(text))
    # the report lists its figure files in report.json (summary.json is the run's own)
    kept = json.loads((output / "report.json").read_text(encoding="utf-8"))
    listed = {entry["png"]: entry for entry in kept["figures"]}
    assert shown and {m["file"] for m in shown} == set(listed)
    for match in shown:
        entry = listed[match["file"]]
        png = (output / entry["png"]).read_bytes()
        assert base64.b64decode(match["png"]) == png  # the report embeds the file itself
        image = Image.open(output / entry["png"])
        assert image.format == "PNG"
        assert image.info["dpi"] == pytest.approx((300, 300), abs=0.5)
        assert (output / entry["pdf"]).read_bytes().startswith(b"%PDF-")
        caption = " ".join(html.unescape(re.sub(r"<[^>]+>", "", match["caption"])).split())
        sidecar = (output / entry["caption"]).read_text(encoding="utf-8").strip()
        assert sidecar == caption
    keys = {(e["result"], e["figure"]) for e in listed.values()}
    for name in summary["results"]:
        assert (name, "montage") in keys and (name, "projections") in keys
    assert ("sound", "run_quality") in keys and ("sound", "laterality") in keys


def test_map_captions_state_the_voxels_shown(output, summary):
    for name, result in summary["results"].items():
        shown = int((_data(output / name / "z_surviving.nii.gz") != 0).sum())
        assert shown == result["z_surviving"]["voxels"]
        caption = (output / "figures" / f"{name}_montage.txt").read_text(encoding="utf-8")
        assert f"({shown} voxels)" in caption
        variance = (output / "figures" / f"{name}_variance.txt").read_text(encoding="utf-8")
        assert f"τ² = {result['var_animal_median']:.3g}" in variance
        if result["var_animal_median"] > 0:
            assert "estimated at 0" not in variance


def test_z_surviving_is_z_where_the_chosen_correction_survives(output, summary):
    alpha = summary["settings"]["inference"]["alpha"]
    for name, result in summary["results"].items():
        entry = result["z_surviving"]
        stem = {"tfce": "p_fwe_tfce", "voxel": "p_fwe_voxel", "fdr": "q"}[entry["method"]]
        mask = _data(output / name / "mask.nii.gz") > 0
        keep = mask & (_data(output / name / f"{stem}.nii.gz") <= alpha)
        expected = np.where(keep, _data(output / name / "z.nii.gz"), 0.0)
        np.testing.assert_allclose(_data(output / name / "z_surviving.nii.gz"), expected, atol=1e-6)
        header = nib.load(str(output / name / "z_surviving.nii.gz")).header
        assert header.get_intent()[0] == "z score"


def test_animal_maps_are_precision_weighted_means_of_the_runs(output, summary):
    result = summary["results"]["sound"]
    animals = result["animal_maps"]["animals"]
    effect = _data(output / "sound" / "animal_effect.nii.gz")
    se = _data(output / "sound" / "animal_se.nii.gz")
    assert effect.shape[3] == se.shape[3] == len(animals) == result["animals"]
    runs_path = Path(summary["settings"]["study"]["table"])
    runs = pd.read_csv(runs_path, sep="\t", dtype=str, keep_default_na=False)
    runs = runs[(runs["condition"] == "sound") & (runs["exclude"].str.lower() != "true")]
    var_run = _data(output / "sound" / "var_run.nii.gz")
    mask = _data(output / "sound" / "mask.nii.gz") > 0
    voxels = np.argwhere(mask)[:: max(1, int(mask.sum()) // 7)][:7]
    for a, animal in enumerate(animals):
        mine = runs[runs["animal"] == animal]
        y = np.stack([_data(runs_path.parent / p) for p in mine["effect"]])
        s2 = np.stack([_data(runs_path.parent / p) for p in mine["variance"]])
        for i, j, k in voxels:
            ok = np.isfinite(y[:, i, j, k]) & np.isfinite(s2[:, i, j, k])
            w = 1.0 / (var_run[i, j, k] + s2[ok, i, j, k])
            assert effect[i, j, k, a] == pytest.approx(
                np.average(y[ok, i, j, k], weights=w), rel=1e-4, abs=1e-6
            )
            assert se[i, j, k, a] == pytest.approx(np.sqrt(1.0 / w.sum()), rel=1e-4)
    assert not np.any(effect[~mask])  # 0 outside the mask


def test_targets_map_and_run_quality_use_the_targets(output, summary):
    atlas_table = pd.read_csv(summary["settings"]["atlas"]["labels"], sep="\t")
    atlas = _data(Path(summary["settings"]["atlas"]["image"]))
    result = summary["results"]["sound"]
    labels = result["targets_map"]["labels"]
    assert labels == {"1": "auditory cortex", "2": "inferior colliculus"}
    targets = _data(output / "sound" / "targets.nii.gz")
    parent = dict(zip(atlas_table["index"], atlas_table["parent"], strict=True))
    names = dict(zip(atlas_table["index"], atlas_table["name"], strict=True))

    def ancestors(index):
        while index == index and index in names:  # NaN parent ends the chain
            yield names[index]
            index = parent.get(index)

    for k, name in labels.items():
        inside = atlas[targets == int(k)]
        assert inside.size > 0
        assert all(name in set(ancestors(int(v))) for v in np.unique(inside))
    quality = pd.read_csv(output / "sound" / "run_quality.tsv", sep="\t")
    mask = _data(output / "sound" / "mask.nii.gz") > 0
    assert set(quality["correlation_where"]) == {
        result["questions"]["run_quality"]["correlation_where"]
    }
    assert quality["correlation_where"].iloc[0].startswith("inside the targets")
    assert quality["correlation_voxels"].max() == int(((targets > 0) & mask).sum())


def test_symmetry_table_carries_the_bootstrap_point(output, summary):
    sym = pd.read_csv(output / "sound" / "symmetry.tsv", sep="\t")
    recorded = summary["results"]["sound"]["questions"]["symmetry"]
    for _, row in sym.iterrows():
        boot = recorded[row["region"]]["bootstrap"]
        assert row["li_extent_shortcut"] == pytest.approx(boot["li_extent_shortcut"], abs=1e-5)
        assert row["li_effect_shortcut"] == pytest.approx(boot["li_effect_shortcut"], abs=1e-5)
