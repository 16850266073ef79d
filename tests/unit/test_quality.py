"""Run quality: robust z scores, correlations with the leave-one-animal-out group map,
edge-rim scores and flags.

Outside references: scipy.stats.median_abs_deviation(scale="normal") for the robust z
(Iglewicz & Hoaglin 1993, How to Detect and Handle Outliers, ASQC; 3.5 cut-off, value from
memory), numpy.corrcoef for the spatial correlations. The example cohort's recorded ground truth
(truth.json: the motion animal and the noisy runs) is checked against the fitted example
in end_to_end/test_example_fit.py.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from grouplevel.errors import UserError
from grouplevel.quality import DEFAULT_Z_THRESHOLD, QUALITY_COLUMNS, robust_z, run_quality
from grouplevel.specificity import edge_shell


def test_robust_z_equals_scipy_mad_based_z():
    rng = np.random.default_rng(1)
    x = rng.standard_t(3, size=41)
    x[5] = np.nan
    ok = np.isfinite(x)
    # reference: scipy.stats.median_abs_deviation with scale="normal" (MAD / Φ⁻¹(3/4));
    # the module's 1.4826 is that factor rounded (common practice), hence rel 1e-5.
    mad = stats.median_abs_deviation(x[ok], scale="normal")
    expected = (x[ok] - np.median(x[ok])) / mad
    np.testing.assert_allclose(robust_z(x)[ok], expected, rtol=1e-5)
    assert np.isnan(robust_z(x)[5])


def test_robust_z_with_zero_mad():
    z = robust_z(np.array([1.0, 1.0, 1.0, 2.0, 0.5]))
    np.testing.assert_array_equal(z, [0.0, 0.0, 0.0, np.inf, -np.inf])


def synthetic_runs(rng):
    animal = np.repeat(np.arange(8), 3)
    n = animal.size
    mask = np.zeros((12, 12, 10), dtype=bool)
    mask[1:11, 1:11, 1:9] = True
    shell = edge_shell(mask, 2)
    n_vox = int(mask.sum())
    pattern = rng.normal(0, 1, n_vox)
    y = 0.5 * pattern + rng.normal(0, 1, (n, n_vox))
    variance = rng.uniform(0.9, 1.1, (n, n_vox))
    y[4, shell] += 4.0 * np.sign(rng.normal(size=int(shell.sum())))  # an edge rim
    variance[10] *= 5.0  # a noisy run
    y[17] = -0.5 * pattern + rng.normal(0, 1, n_vox)  # a run unlike the group
    y[2, :3] = np.nan
    loo = np.stack([0.5 * pattern + rng.normal(0, 0.1, n_vox) for _ in range(8)])
    runs = pd.DataFrame({"animal": [f"a{a}" for a in animal], "session": 1, "run": 1})
    return y, variance, animal, runs, loo, shell


def test_run_quality_numbers_by_hand_and_flags():
    y, variance, animal, runs, loo, shell = synthetic_runs(np.random.default_rng(6))
    out = run_quality(y, variance, animal, runs, loo, shell)
    table = out.table()
    assert tuple(table.columns) == QUALITY_COLUMNS
    for k in range(len(y)):
        ok = np.isfinite(y[k])
        # reference: numpy.corrcoef over the voxels with data
        r = np.corrcoef(y[k, ok], loo[animal[k], ok])[0, 1]
        assert table["correlation"].iloc[k] == pytest.approx(r, rel=1e-10)
        a = np.abs(y[k])
        edge = np.nanmean(a[shell]) / np.nanmean(a[~shell])
        assert table["edge_score"].iloc[k] == pytest.approx(edge, rel=1e-10)
        assert table["mean_variance"].iloc[k] == pytest.approx(variance[k].mean(), rel=1e-12)
    np.testing.assert_allclose(table["z_edge"], robust_z(table["edge_score"]))
    flagged = set(np.flatnonzero(table["flagged"]))
    zs = table[["z_correlation", "z_variance", "z_edge"]].abs().to_numpy()
    assert flagged == set(np.flatnonzero(np.nanmax(zs, axis=1) > 3.5))
    # the planted runs; with 24 runs a chance |z| > 3.5 can flag another (here run 7,
    # correlation z 3.6)
    assert {4, 10, 17} <= flagged
    assert "edge-rim" in table["why"].iloc[4]
    assert "variance" in table["why"].iloc[10]
    assert "low correlation" in table["why"].iloc[17]
    assert out.summary()["flagged"] == len(flagged)
    assert out.threshold == DEFAULT_Z_THRESHOLD


def test_run_quality_without_variances_never_flags_on_variance():
    y, _, animal, runs, loo, shell = synthetic_runs(np.random.default_rng(6))
    table = run_quality(y, None, animal, runs, loo, shell).table()
    assert table["mean_variance"].isna().all() and table["z_variance"].isna().all()
    flagged = set(np.flatnonzero(table["flagged"]))
    assert {4, 17} <= flagged
    assert not table["why"].str.contains("variance").any()


def test_run_quality_bad_inputs():
    y, variance, animal, runs, loo, shell = synthetic_runs(np.random.default_rng(6))
    with pytest.raises(UserError, match="table rows"):
        run_quality(y, variance, animal, runs.iloc[:-1], loo, shell)
    with pytest.raises(UserError, match="loo_effect"):
        run_quality(y, variance, animal, runs, loo[:, :-1], shell)
    with pytest.raises(UserError, match="threshold"):
        run_quality(y, variance, animal, runs, loo, shell, threshold=0.0)


def test_agreement_is_measured_where_the_response_is():
    # A focal response (100 of 4000 voxels) inside a target three times its size: over
    # the whole brain every run's correlation with the group map is small, whether the
    # run shows the response or not; inside the target it tells the two apart.
    # Reference: numpy.corrcoef over the same voxels.
    rng = np.random.default_rng(5)
    animal = np.repeat(np.arange(8), 3)
    n, n_vox = animal.size, 4000
    target = np.zeros(n_vox, dtype=bool)
    target[:300] = True
    pattern = np.zeros(n_vox)
    pattern[:100] = rng.uniform(1.0, 2.0, 100)
    y = pattern + rng.normal(0, 1, (n, n_vox))
    y[7] = rng.normal(0, 1, n_vox)  # a run without the response
    loo = np.stack([pattern + rng.normal(0, 0.1, n_vox) for _ in range(8)])
    runs = pd.DataFrame({"animal": [f"a{a}" for a in animal], "session": 1, "run": 1})
    shell = np.zeros(n_vox, dtype=bool)
    shell[-300:] = True
    whole = run_quality(y, None, animal, runs, loo, shell).table()
    inside = run_quality(
        y, None, animal, runs, loo, shell, agreement=target, agreement_where="inside the target"
    ).table()
    for k in (0, 7, 20):
        expected = np.corrcoef(y[k, target], loo[animal[k], target])[0, 1]
        assert inside["correlation"][k] == pytest.approx(expected, abs=1e-12)
    assert (inside["correlation_voxels"] == 300).all()
    assert set(inside["correlation_where"]) == {"inside the target"}
    assert set(whole["correlation_where"]) == {"the whole analysed brain"}
    others = np.delete(np.arange(n), 7)
    assert whole["correlation"][others].median() < 0.35
    assert inside["correlation"][others].median() > 0.5
    assert inside["correlation"][7] < 0.2  # the run without the response stands out
    assert inside["z_correlation"][7] < -DEFAULT_Z_THRESHOLD
    with pytest.raises(ValueError, match="agreement"):
        run_quality(y, None, animal, runs, loo, shell, agreement=target[:-1])
