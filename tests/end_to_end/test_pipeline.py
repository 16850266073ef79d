"""End to end through the command line: output contract, naming, atomic writes, API."""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

import grouplevel
from grouplevel.cli import main
from tests.conftest import TINY_AFFINE, write_study

MAPS = [
    "effect",
    "se",
    "t",
    "z",
    "p",
    "df",
    "var_animal",
    "var_run",
    "coverage",
    "coverage_animals",
    "mask",
]


def test_run_writes_every_map_with_the_grid_affine(tiny_study, tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["run", str(tiny_study), "--out", str(out)]) == 0
    assert "outputs written to" in capsys.readouterr().out
    for name in MAPS:
        img = nib.load(str(out / "mean" / f"{name}.nii.gz"))
        assert img.shape == (4, 4, 3)
        np.testing.assert_allclose(img.affine, TINY_AFFINE, atol=1e-6)
        data = np.asarray(img.dataobj)
        assert np.isfinite(data).all()
    summary = json.loads((out / "summary.json").read_text())
    res = summary["results"]["mean"]
    assert res["animals"] == 6 and res["runs"] == 18
    assert res["runs_per_animal"] == {f"a{i}": 3 for i in range(6)}
    assert summary["settings"]["model"]["formula"] == "1"
    assert summary["settings"]["inference"]["seed"] == 1
    assert summary["tool"]["name"] == "grouplevel"
    roles = {i["role"] for i in summary["inputs"]}
    assert {"study file", "runs table"} <= roles
    assert all(len(i["sha256"]) == 64 for i in summary["inputs"])
    # between-animal df: 6 animals - 1
    df = np.asarray(nib.load(str(out / "mean" / "df.nii.gz")).dataobj)
    assert np.all(df == 5)


def test_maps_match_statsmodels_at_one_voxel_without_variances(tmp_path):
    # The t map at a voxel equals the textbook GLS t at statsmodels' REML estimates
    # (statsmodels MixedLM, Seabold & Perktold 2010) for the same runs.
    rng = np.random.default_rng(11)
    animals = [f"a{i}" for i in range(5) for _ in range(4)]
    u = rng.normal(0, 1.0, 5)
    effects = np.stack([0.8 + u[k // 4] + rng.normal(0, 0.6, (2, 2, 2)) for k in range(20)])
    toml = write_study(tmp_path / "s", effects, animals, shape=(2, 2, 2))
    study = grouplevel.load_study(toml)
    (gm,), _ = grouplevel.fit_study(study)
    y = effects[:, 1, 0, 1]
    frame = pd.DataFrame({"y": y, "animal": animals})
    sm = smf.mixedlm("y ~ 1", frame, groups=frame["animal"]).fit(reml=True)
    tau2 = float(sm.cov_re.iloc[0, 0])
    sigma2 = float(sm.scale)
    V = np.kron(np.eye(5), tau2 * np.ones((4, 4))) + sigma2 * np.eye(20)
    Vi = np.linalg.inv(V)
    X = np.ones((20, 1))
    cov = np.linalg.inv(X.T @ Vi @ X)
    beta = (cov @ X.T @ Vi @ y)[0]
    vol = {k: gm.volume(k)[1, 0, 1] for k in ("effect", "se", "var_animal", "var_run")}
    assert vol["effect"] == pytest.approx(beta, rel=1e-4)
    assert vol["se"] == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-4)
    assert vol["var_animal"] == pytest.approx(tau2, rel=1e-4)
    assert vol["var_run"] == pytest.approx(sigma2, rel=1e-4)


def test_contrast_column_and_group_contrasts_name_the_folders(tmp_path):
    rng = np.random.default_rng(5)
    animals = [f"m{i}" for i in range(6) for _ in range(2)] * 2
    contrast = ["sound"] * 12 + ["paw"] * 12
    group = ["ctl" if int(a[1]) < 3 else "ko" for a in animals]
    effects = rng.normal(1, 1, size=(24, 2, 2, 2))
    toml = write_study(
        tmp_path / "s",
        effects,
        animals,
        shape=(2, 2, 2),
        columns={"contrast": contrast, "group": group},
        model='formula = "1 + group"',
        toml_extra='\n[[contrast]]\nname = "mean"\nweights = { Intercept = 1 }\n'
        '\n[[contrast]]\nname = "ko_vs_ctl"\nweights = { "group[T.ko]" = 1 }\n',
    )
    # runs were numbered per animal across both contrasts; renumber within contrast
    table = pd.read_csv(toml.parent / "runs.tsv", sep="\t")
    table["run"] = table.groupby(["contrast", "animal"]).cumcount() + 1
    table.to_csv(toml.parent / "runs.tsv", sep="\t", index=False)
    out = tmp_path / "out"
    assert main(["run", str(toml), "--out", str(out), "--quiet"]) == 0
    # the result folders, beside grouplevel's own figures/ (and tables/ with an atlas)
    folders = sorted(p.name for p in out.iterdir() if p.is_dir())
    assert folders == ["figures", "paw", "paw.ko_vs_ctl", "sound", "sound.ko_vs_ctl"]
    summary = json.loads((out / "summary.json").read_text())
    assert summary["results"]["sound.ko_vs_ctl"]["group_contrast"] == "ko_vs_ctl"
    assert summary["results"]["paw"]["runs"] == 12
    # 6 animals - rank 2 animal-level design
    df = np.asarray(nib.load(str(out / "sound.ko_vs_ctl" / "df.nii.gz")).dataobj)
    assert np.all(df == 4)


def test_force_replaces_and_keeps_no_partial(tiny_study, tmp_path):
    out = tmp_path / "out"
    assert main(["run", str(tiny_study), "--out", str(out), "--quiet"]) == 0
    # a file left inside a result folder (e.g. by `grouplevel plan`) goes with it; a file
    # the user put at the top of the folder is never deleted (tests/test_output_safety.py)
    (out / "mean" / "stale.txt").write_text("old")
    assert main(["run", str(tiny_study), "--out", str(out), "--quiet", "--force"]) == 0
    assert not (out / "mean" / "stale.txt").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".out.")]


def test_same_inputs_give_identical_maps(tiny_study, tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    assert main(["run", str(tiny_study), "--out", str(a), "--quiet"]) == 0
    assert main(["run", str(tiny_study), "--out", str(b), "--quiet"]) == 0
    for name in MAPS:
        x = np.asarray(nib.load(str(a / "mean" / f"{name}.nii.gz")).dataobj)
        y = np.asarray(nib.load(str(b / "mean" / f"{name}.nii.gz")).dataobj)
        np.testing.assert_array_equal(x, y)


def test_partial_coverage_fits_with_the_runs_it_has(tmp_path):
    # A voxel where one run has no data equals the fit without that run
    # (checked against statsmodels MixedLM on the remaining runs).
    rng = np.random.default_rng(21)
    animals = [f"a{i}" for i in range(6) for _ in range(3)]
    u = rng.normal(0, 1, 6)
    effects = np.stack([u[k // 3] + rng.normal(0, 0.5, (2, 2, 2)) for k in range(18)])
    effects[4, 0, 0, 0] = np.nan
    mask = np.ones((2, 2, 2), bool)
    toml = write_study(
        tmp_path / "s",
        effects,
        animals,
        shape=(2, 2, 2),
        mask=mask,
        toml_extra="min_coverage = 0.9\n",
    )
    study = grouplevel.load_study(toml)
    (gm,), _ = grouplevel.fit_study(study)
    assert gm.coverage_runs[0, 0, 0] == 17 and gm.coverage_runs[1, 1, 1] == 18
    keep = np.arange(18) != 4
    frame = pd.DataFrame({"y": effects[keep, 0, 0, 0], "animal": np.array(animals)[keep]})
    sm = smf.mixedlm("y ~ 1", frame, groups=frame["animal"]).fit(reml=True)
    assert gm.volume("effect")[0, 0, 0] == pytest.approx(sm.fe_params.iloc[0], rel=1e-4)
    assert gm.volume("var_animal")[0, 0, 0] == pytest.approx(sm.cov_re.iloc[0, 0], rel=1e-4)


def test_voxels_below_min_coverage_are_left_out(tmp_path):
    rng = np.random.default_rng(22)
    animals = [f"a{i}" for i in range(4) for _ in range(2)]
    effects = rng.normal(size=(8, 2, 2, 2))
    effects[:3, 0, 0, 0] = np.nan  # 5 of 8 runs left there
    toml = write_study(
        tmp_path / "s",
        effects,
        animals,
        shape=(2, 2, 2),
        mask=np.ones((2, 2, 2), bool),
        toml_extra="min_coverage = 0.75\n",
    )
    study = grouplevel.load_study(toml)
    fl = study.first_levels[0]
    assert not fl.mask[0, 0, 0] and fl.mask.sum() == 7
    assert any("left out for too little coverage" in w for w in study.warnings)
