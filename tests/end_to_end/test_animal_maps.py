"""Each animal's own estimate at every voxel (GroupMap.animal_effects and the
animal_*.nii.gz maps that the report's slice browser shows).

Outside references:
- a random drug slope: each animal's estimate is its own GLS slope of its runs on
  [1, drug] with the run covariance σ̂² I, checked against statsmodels WLS of that
  animal's runs (coefficient and its standard error with the scale fixed at σ̂²);
- a group mean with first-level variances: the precision-weighted mean of the animal's
  runs, weights 1/(σ̂² + s_k²), and SE sqrt(1/Σw) (inverse-variance weighting,
  Borenstein, Hedges, Higgins & Rothstein 2009, Introduction to Meta-Analysis), against
  statsmodels WLS with the scale fixed at 1;
- a within-animal column without a random slope has no per-animal estimate (common
  practice: its test does not rest on animals' own estimates), so no maps are written;
- the runs' values kept for a small study are the input maps' values (numpy).
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest
import statsmodels.api as sm

from grouplevel import fit_study, load_study
from grouplevel.outputs.animal_maps import (
    ANIMAL_MAP_FILES,
    animal_maps_summary,
    read_animal_maps,
    write_animal_maps,
)
from tests.conftest import write_study

SHAPE = (2, 2, 1)
CONTRAST_DRUG = '\n[[contrast]]\nname = "drug"\nweights = { drug = 1 }\n'
NO_PERMUTATIONS = "\n[inference]\npermutations = 0\n"


def _drug_study(tmp_path, slopes: str):
    rng = np.random.default_rng(4)
    m, per, n_vox = 5, 4, 4
    animal = np.repeat(np.arange(m), per)
    drug = np.tile([0.0, 1.0], m * per // 2)
    u0, u1 = rng.normal(0, 1.0, (m, n_vox)), rng.normal(0, 0.8, (m, n_vox))
    y = 2.0 + 0.5 * drug[:, None] + u0[animal] + drug[:, None] * u1[animal]
    y = y + rng.normal(0, 0.6, y.shape)
    toml = write_study(
        tmp_path / slopes,
        y.reshape(len(y), *SHAPE),
        [f"a{a}" for a in animal],
        shape=SHAPE,
        columns={"drug": list(drug)},
        model=f'formula = "1 + drug"\nrandom_slopes = "{slopes}"',
        toml_extra=NO_PERMUTATIONS + CONTRAST_DRUG,
    )
    maps, _ = fit_study(load_study(toml))
    return {gm.contrast: gm for gm in maps}, y, animal, drug


def test_random_slope_estimates_match_each_animals_wls(tmp_path):
    maps, y, animal, drug = _drug_study(tmp_path, "auto")
    gm = maps["drug"]
    effects = gm.animal_effects
    assert effects is not None and "drug slope" in effects.what
    assert effects.animals == tuple(f"a{a}" for a in range(5))
    for v in range(y.shape[1]):
        for a in range(5):
            rows = animal == a
            X = sm.add_constant(drug[rows])
            fit = sm.WLS(y[rows, v], X, weights=np.ones(rows.sum())).fit(
                cov_type="fixed scale", cov_kwds={"scale": float(gm.var_run[v])}
            )
            assert effects.effect[a, v] == pytest.approx(fit.params[1], rel=1e-5, abs=1e-6)
            assert effects.se[a, v] == pytest.approx(fit.bse[1], rel=1e-4)
            assert effects.runs[a, v] == rows.sum()


def test_no_estimates_for_a_within_animal_column_without_its_slope(tmp_path):
    maps, *_ = _drug_study(tmp_path, "none")
    assert maps["drug"].animal_effects is None


def test_group_mean_estimates_are_inverse_variance_means_and_round_trip(tmp_path):
    rng = np.random.default_rng(9)
    animal = np.repeat(np.arange(4), [2, 3, 2, 3])
    y = 1.0 + rng.normal(0, 1.0, (4, 4))[animal] + rng.normal(0, 0.5, (10, 4))
    s2 = rng.uniform(0.1, 0.9, y.shape)
    y[4, 2] = np.nan  # one run of animal a1 without data at voxel 2
    s2[4, 2] = np.nan
    toml = write_study(
        tmp_path / "s",
        y.reshape(10, *SHAPE),
        [f"a{a}" for a in animal],
        variances=s2.reshape(10, *SHAPE),
        shape=SHAPE,
        toml_extra="min_coverage = 0.5\n",  # keep the voxel where one run has no data
    )
    study = load_study(toml, permutations=0)
    (gm,) = fit_study(study)[0]
    assert gm.mask.all()  # voxel v of the arrays is voxel v of the maps
    effects = gm.animal_effects
    assert "precision-weighted mean" in effects.what
    for v in range(4):
        for a in range(4):
            rows = (animal == a) & np.isfinite(y[:, v])
            w = 1.0 / (gm.var_run[v] + s2[rows, v])
            fit = sm.WLS(y[rows, v], np.ones((rows.sum(), 1)), weights=w).fit(
                cov_type="fixed scale", cov_kwds={"scale": 1.0}
            )
            assert effects.effect[a, v] == pytest.approx(fit.params[0], rel=1e-5)
            assert effects.se[a, v] == pytest.approx(fit.bse[0], rel=1e-5)
            assert effects.runs[a, v] == rows.sum()
    assert effects.runs[1, 2] == 2  # the run without data is not counted
    # the runs behind the estimates (a small study keeps them), grouped by animal
    order = np.argsort(animal, kind="stable")
    np.testing.assert_allclose(effects.run_values, y[order], rtol=1e-6)  # NaN where no data

    # the 4-D maps hold the same values in the order summary.json records
    folder = tmp_path / "maps"
    folder.mkdir()
    write_animal_maps(folder, effects, gm.mask, gm.grid, "mean")
    entry = json.loads(json.dumps(animal_maps_summary(effects)))
    back = read_animal_maps(folder, entry)
    assert back.animals == effects.animals
    assert back.run_labels["a1"] == ["run 1", "run 2", "run 3"]
    for key in ANIMAL_MAP_FILES:
        img = nib.load(str(folder / ANIMAL_MAP_FILES[key]))
        assert img.shape == (*SHAPE, 4)
        on_grid = np.asarray(getattr(back, key).dataobj)[gm.mask]  # (voxels, animals)
        want = np.nan_to_num(getattr(effects, key)).T
        np.testing.assert_allclose(on_grid, want, rtol=1e-6)
    runs_back = np.asarray(back.run_values.dataobj)[gm.mask].T  # (runs, voxels)
    np.testing.assert_allclose(runs_back, y[order], rtol=1e-6)
    assert read_animal_maps(folder, None) is None
    (folder / ANIMAL_MAP_FILES["se"]).unlink()
    assert read_animal_maps(folder, entry) is None  # an incomplete set is not shown
