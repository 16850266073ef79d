"""Headers scaled ×10 or with exchanged axes, declared in [space]: true units everywhere.

The same tiny study is written three times: with true headers, with every header length
×10, and with the header's y and z exchanged (y dorsal, z anterior). Once declared
([space] header_units_per_mm, header_axes) the three give the same volumes, coordinates
and sub-peaks. Geometry references: nibabel's affine tools (``nibabel.affines.
apply_affine`` for voxel → mm, ``nibabel.orientations.aff2axcodes`` for where the
header's axes point).
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from nibabel.affines import apply_affine
from nibabel.orientations import aff2axcodes

import grouplevel
from grouplevel.anatomy.coordinates import header_to_true
from grouplevel.intake.images import Grid, write_map
from tests.conftest import save, write_study

VOXEL = 0.5  # true mm
SHAPE = (8, 12, 6)  # x (left→right), y (posterior→anterior), z (ventral→dorsal)
ORIGIN = [0.0, 0.5, 0.75]  # bregma, true mm
EXCHANGED = ("right", "dorsal", "anterior")  # header y is dorsal, header z anterior


def _true_affine() -> np.ndarray:
    affine = np.diag([VOXEL, VOXEL, VOXEL, 1.0])
    affine[:3, 3] = [-VOXEL * (n - 1) / 2.0 for n in SHAPE]
    return affine


def _maps():
    """12 runs of 6 animals: a ridge along y with two maxima 3 mm apart, on the left."""
    rng = np.random.default_rng(11)
    i, j, k = np.indices(SHAPE)
    brain = ((i - 3.5) / 4.2) ** 2 + ((j - 5.5) / 6.3) ** 2 + ((k - 2.5) / 3.2) ** 2 < 1.0
    ridge = (
        3.0
        * np.exp(-((i - 2) ** 2) / 1.5 - (k - 3) ** 2 / 1.5)
        * (0.8 + np.exp(-((j - 2) ** 2) / 2.0) + 1.3 * np.exp(-((j - 8) ** 2) / 2.0))
    )
    animals = [f"m{a}" for a in range(6) for _ in range(2)]
    effects = np.stack([ridge + rng.normal(0, 0.3) + rng.normal(0, 0.25, SHAPE) for _ in animals])
    variances = np.full((12, *SHAPE), 0.05)
    labels = np.where(i < 4, 1, 2) * brain
    return brain, effects, variances, animals, labels


def _study(folder: Path, header_affine: np.ndarray, space: str) -> Path:
    brain, effects, variances, animals, labels = _maps()
    save(folder / "atlas.nii.gz", labels, header_affine)
    pd.DataFrame(
        {"index": [1, 2], "name": ["cortex", "cortex"], "hemisphere": ["left", "right"]}
    ).to_csv(folder / "atlas.tsv", sep="\t", index=False)
    origin = ", ".join(str(v) for v in ORIGIN)
    toml = (
        f'[space]\norigin_mm = [{origin}]\norigin_name = "bregma"\n{space}\n'
        '[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\n'
        '[clusters]\nmethod = "fdr"\n[inference]\npermutations = 0\n'
    )
    return write_study(
        folder,
        effects,
        animals,
        variances=variances,
        shape=SHAPE,
        mask=brain,
        affine=header_affine,
        toml_extra=toml,
    )


_FITTED: dict[int, object] = {}


def _fit(study):
    """The study's one group map (fitted once per study in this module)."""
    if id(study) not in _FITTED:
        (_FITTED[id(study)],) = grouplevel.fit_study(study)[0]
    return _FITTED[id(study)]


def _clusters(study) -> pd.DataFrame:
    return _fit(study).tables.clusters


@pytest.fixture(scope="module")
def three_studies(tmp_path_factory) -> dict:
    root = tmp_path_factory.mktemp("headers")
    true = _true_affine()
    tenfold = np.diag([10.0, 10.0, 10.0, 1.0]) @ true
    exchanged = np.linalg.inv(header_to_true(1, EXCHANGED)) @ true
    out = {}
    for name, affine, space in (
        ("true", true, ""),
        ("tenfold", tenfold, "header_units_per_mm = 10"),
        ("tenfold_undeclared", tenfold, ""),
        ("exchanged", exchanged, f"header_axes = {list(EXCHANGED)!r}".replace("'", '"')),
        ("exchanged_undeclared", exchanged, ""),
    ):
        toml = _study(root / name, affine, space)
        study = grouplevel.load_study(toml)
        out[name] = (affine, study)
    return out


def test_exchanged_header_is_what_nibabel_says(three_studies):
    affine, _ = three_studies["exchanged"]
    # Reference: nibabel.orientations.aff2axcodes names the world direction of each
    # array axis: the array's j axis points up (S) and k forward (A) in that header.
    assert aff2axcodes(affine) == ("R", "S", "A")
    assert aff2axcodes(three_studies["true"][0]) == ("R", "A", "S")


def test_undeclared_headers_are_warned_about_with_the_setting_to_use(three_studies):
    _, tenfold = three_studies["tenfold_undeclared"]
    assert any("[space] header_units_per_mm = 10" in w for w in tenfold.warnings)
    _, exchanged = three_studies["exchanged_undeclared"]
    axis = [w for w in exchanged.warnings if "longest along" in w]
    assert len(axis) == 1
    assert "dorsal–ventral axis (6.0 mm, header axis z)" in axis[0]
    assert "[space] header_axes" in axis[0]
    for name in ("true", "tenfold", "exchanged"):
        _, study = three_studies[name]
        assert not any("header" in w for w in study.warnings), name


def test_tenfold_header_gives_the_true_studys_results(three_studies):
    true_affine, true_study = three_studies["true"]
    _, tenfold = three_studies["tenfold"]
    _, undeclared = three_studies["tenfold_undeclared"]
    assert tenfold.grid.voxel_volume == pytest.approx(VOXEL**3, rel=1e-12)
    expected = _clusters(true_study)
    got = _clusters(tenfold)
    assert len(expected) >= 2  # a cluster with its sub-peak 3 mm away
    assert (expected["peak"] > 1).any()
    columns = ["voxels", "volume_mm3", "z", "effect", "peak_AP_mm", "peak_ML_mm", "peak_DV_mm"]
    columns += ["peak_x_mm", "peak_y_mm", "peak_z_mm", "centre_AP_mm"]
    pd.testing.assert_frame_equal(got[columns], expected[columns], rtol=1e-9, atol=1e-9)
    # the ×10 study's voxel → mm affine is the true one, and each reported peak is
    # nibabel.affines.apply_affine of it at the peak's voxel
    np.testing.assert_allclose(tenfold.grid.affine, true_affine, atol=1e-12)
    voxels = apply_affine(np.linalg.inv(true_affine), got[["peak_x_mm", "peak_y_mm", "peak_z_mm"]])
    np.testing.assert_allclose(voxels, np.rint(voxels), atol=1e-9)
    # undeclared, the same study reports volumes a thousand times too large
    wrong = _clusters(undeclared)
    assert wrong["volume_mm3"].iloc[0] == pytest.approx(1000 * expected["volume_mm3"].iloc[0])
    # the atlas: same midline (true mm) and region volumes
    assert tenfold.atlas.midline_mm == pytest.approx(true_study.atlas.midline_mm, abs=1e-9)
    np.testing.assert_allclose(
        tenfold.atlas.regions["volume_mm3"], true_study.atlas.regions["volume_mm3"], rtol=1e-9
    )


def test_declared_axis_order_gives_the_correct_coordinates(three_studies):
    true_affine, true_study = three_studies["true"]
    header_affine, exchanged = three_studies["exchanged"]
    expected = _clusters(true_study)
    got = _clusters(exchanged)
    columns = ["voxels", "volume_mm3", "z", "peak_AP_mm", "peak_ML_mm", "peak_DV_mm"]
    pd.testing.assert_frame_equal(got[columns], expected[columns], rtol=1e-9, atol=1e-9)
    # Reference: the strongest voxel's AP/ML/DV from nibabel.affines.apply_affine with
    # the true affine (the arrays are identical in the two studies).
    gm = _fit(true_study)
    z = np.zeros(SHAPE)
    z[gm.mask] = gm.z
    top = np.unravel_index(np.argmax(z), SHAPE)
    x, y, zz = apply_affine(true_affine, top)
    first = got.iloc[0]
    assert (first["peak_AP_mm"], first["peak_ML_mm"], first["peak_DV_mm"]) == pytest.approx(
        (y - ORIGIN[1], x - ORIGIN[0], zz - ORIGIN[2]), abs=1e-9
    )
    # undeclared, the header's y (truly dorsal) is read as AP and its z (truly anterior)
    # as DV: the coordinates a user would have published
    wrong = _clusters(three_studies["exchanged_undeclared"][1]).iloc[0]
    assert (wrong["peak_AP_mm"], wrong["peak_DV_mm"]) == pytest.approx(
        (zz - ORIGIN[1], y - ORIGIN[2]), abs=1e-9
    )
    assert wrong["peak_AP_mm"] != pytest.approx(first["peak_AP_mm"])


def test_output_maps_keep_the_headers_affine(tmp_path):
    header = np.diag([10 * VOXEL, 10 * VOXEL, 10 * VOXEL, 1.0])
    grid = Grid(SHAPE, header).with_true_units(header_to_true(10, ("right", "anterior", "dorsal")))
    assert grid.voxel_volume == pytest.approx(VOXEL**3)
    mask = np.ones(SHAPE, bool)
    write_map(tmp_path / "t.nii.gz", np.ones(mask.sum()), mask, grid, "t")
    # Reference: nibabel reads back the header's own affine (the map lies on the template)
    np.testing.assert_allclose(nib.load(tmp_path / "t.nii.gz").affine, header, atol=1e-6)
    np.testing.assert_allclose(grid.header_to_true @ header, grid.affine, atol=1e-12)


def test_written_folder_of_a_declared_tenfold_study(three_studies, tmp_path):
    affine, study = three_studies["tenfold"]
    out = grouplevel.write_outputs(study, [_fit(study)], tmp_path / "out")
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    # summary.json: the true affine, the headers' own, and the matrix between them
    np.testing.assert_allclose(summary["grid"]["affine"], _true_affine(), atol=1e-12)
    np.testing.assert_allclose(summary["grid"]["header_affine"], affine, atol=1e-12)
    np.testing.assert_allclose(summary["grid"]["header_to_true"], np.diag([0.1] * 3 + [1]))
    # output maps keep the headers' affine (nibabel reads it back), so they lie on the
    # template in a viewer that reads those headers
    (folder,) = [p for p in out.iterdir() if (p / "z.nii.gz").is_file()]
    np.testing.assert_allclose(nib.load(folder / "z.nii.gz").affine, affine, atol=1e-4)
    # the tables are in true mm³ (0.125 mm³ voxels)
    clusters = pd.read_csv(folder / "clusters.tsv", sep="\t")
    first = clusters.iloc[0]
    assert first["volume_mm3"] == pytest.approx(first["voxels"] * VOXEL**3)
    methods = (out / "methods.md").read_text(encoding="utf-8")
    assert "their lengths were divided by 10" in methods
    report = (out / "report.html").read_text(encoding="utf-8")
    assert "their lengths were divided by 10" in report


def test_check_says_when_the_tables_sides_are_swapped(tmp_path, capsys):
    from grouplevel.cli import main

    toml = _study(tmp_path / "swapped", _true_affine(), "")
    table = tmp_path / "swapped" / "atlas.tsv"
    table.write_text(
        table.read_text().replace("left", "LEFT").replace("right", "left").replace("LEFT", "right")
    )
    assert main(["check", str(toml)]) == 0
    text = capsys.readouterr()
    text = text.out + text.err
    # the brain's own midline (x = 0 by construction), with a high mirror overlap
    assert "x = 0.00 mm (mirror plane of the analysis mask)" in text
    assert "(Dice) 1.000" in text
    assert "the table's left and right are swapped against the header" in text
    assert text.count("warning:") == 1
