"""The questions' chunked passes give the numbers of one pass over all voxels or runs.

The leave-one-animal-out maps, the mirrored (left − right) data, run quality, the
region averages and the target-minus-rest means are computed a chunk of voxels (or a
block of runs) at a time within ``[compute] memory_gb``. Every number is a voxel's or a
run's own, so a tiny chunk (many chunks) must reproduce one chunk to rounding
(≤ 1e-12 relative; our own criterion, the brief of issue 15). Outside references: the
leave-one-out estimate at one voxel against statsmodels ``GLS`` (Seabold & Perktold
2010) with the dense covariance of the remaining runs, and the region average against
the share-weighted mean written out with numpy.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
import statsmodels.api as sm

from grouplevel.anatomy.regions import region_values
from grouplevel.model import fit_reml
from grouplevel.model.marginal import RandomTerms
from grouplevel.model.memory import (
    MIN_CHUNK_VOXELS,
    chunk_rows,
    chunk_voxels,
    voxel_chunks,
)
from grouplevel.questions.quality import run_quality
from grouplevel.questions.specificity import _weighted_run_means, loo_group_maps
from grouplevel.questions.symmetry import asymmetry_data, bootstrap_li, mirror_index

RTOL = 1e-12  # "equal to rounding" (our own criterion)


def _data(seed=5, m=7, runs=3, n_vox=61, missing=0.08):
    """float32 effects and variances with missing values, two groups of animals."""
    rng = np.random.default_rng(seed)
    animal = np.repeat(np.arange(m), runs)
    n = animal.size
    X = np.column_stack([np.ones(n), (np.arange(m) % 2).astype(float)[animal]])
    y = 0.4 + rng.normal(0, 0.5, (m, n_vox))[animal] + rng.normal(0, 0.4, (n, n_vox))
    s2 = rng.uniform(0.05, 0.2, (n, n_vox))
    y[rng.random((n, n_vox)) < missing] = np.nan
    return y.astype(np.float32), s2.astype(np.float32), X, animal


def _same(a, b):
    np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=RTOL, atol=1e-14)


def test_voxel_chunks_and_row_chunks_cover_everything_once():
    cuts = voxel_chunks(10, 3)
    assert [(s.start, s.stop) for s in cuts] == [(0, 3), (3, 6), (6, 9), (9, 10)]
    assert voxel_chunks(0, 4) == []
    # rows × voxels × 8 bytes × arrays ≤ share × budget, at least one row (our own rule)
    assert chunk_rows(1_000_000, 3.0, 8) == int(3.0 * 2**30 / 16) // (8 * 1_000_000 * 8)
    assert chunk_rows(10**9, 0.001, 8) == 1
    assert chunk_voxels(200, 0.001) == MIN_CHUNK_VOXELS


@pytest.mark.parametrize("model", ["intercept", "slopes"])
def test_loo_maps_in_many_chunks_equal_one_chunk(model):
    y, s2, X, animal = _data()
    c = np.array([1.0, 0.5])
    fit = fit_reml(y, s2, X, animal)
    if model == "intercept":
        kwargs = {"var_animal": fit.var_animal, "var_run": fit.var_run}
    else:  # the model-based downdate (random-intercept components given by name)
        kwargs = {
            "components": {"animal": fit.var_animal, "run": fit.var_run},
            "terms": RandomTerms(),
        }
    one = loo_group_maps(y, s2, X, animal, c, **kwargs)
    many = loo_group_maps(y, s2, X, animal, c, chunk=4, **kwargs)
    for field in ("t_full", "effect_full", "effect", "correlation", "max_abs_dt"):
        _same(getattr(many, field), getattr(one, field))
    assert np.isfinite(one.correlation).all() and np.isfinite(one.max_abs_dt).all()
    # chunks downdated side by side on threads: each voxel is downdated on its own, so
    # every number equals the one-chunk run exactly (not just to rounding)
    threaded = loo_group_maps(y, s2, X, animal, c, chunk=8, workers=3, **kwargs)
    one_by_one = loo_group_maps(y, s2, X, animal, c, chunk=8 // 3, **kwargs)
    for field in ("t_full", "effect_full", "effect", "correlation", "max_abs_dt"):
        np.testing.assert_array_equal(getattr(threaded, field), getattr(one_by_one, field))
        _same(getattr(threaded, field), getattr(one, field))


def test_loo_effect_equals_gls_without_the_animal():
    # the chunked map at fixed components against statsmodels GLS on the runs left
    y, s2, X, animal = _data()
    y, s2 = y.astype(float), s2.astype(float)
    c = np.array([1.0, 0.0])
    fit = fit_reml(y, s2, X, animal)
    loo = loo_group_maps(
        y,
        s2,
        X,
        animal,
        c,
        components={"animal": fit.var_animal, "run": fit.var_run},
        terms=RandomTerms(),
        chunk=5,
    )
    for a, v in ((0, 3), (4, 40), (6, 60)):
        keep = (animal != a) & np.isfinite(y[:, v]) & np.isfinite(s2[:, v])
        aa = animal[keep]
        V = np.diag(fit.var_run[v] + s2[keep, v]) + fit.var_animal[v] * (aa[:, None] == aa)
        ref = sm.GLS(y[keep, v], X[keep], sigma=V).fit()
        assert loo.effect[a, v] == pytest.approx(float(c @ ref.params), rel=1e-8)


def test_asymmetry_data_by_columns_equals_all_columns():
    rng = np.random.default_rng(2)
    mask = np.ones((6, 4, 3), dtype=bool)
    mask[0, 0, 0] = False
    affine = np.diag([0.2, 0.2, 0.2, 1.0])
    affine[0, 3] = -0.5
    mirror = mirror_index(mask, affine, 0.0)
    n_vox = int(mask.sum())
    y = rng.normal(size=(5, n_vox)).astype(np.float32)
    s2 = rng.uniform(0.1, 0.3, (5, n_vox)).astype(np.float32)
    y[1, 4] = np.nan
    s2[2, 7] = np.nan
    whole = asymmetry_data(y, s2, mirror)
    n_kept = whole.y.shape[1]
    assert n_kept == int(whole.half.sum()) > 10
    parts = [asymmetry_data(y, s2, mirror, sl) for sl in voxel_chunks(n_kept, 4)]
    np.testing.assert_array_equal(np.concatenate([p.y for p in parts], axis=1), whole.y)
    np.testing.assert_array_equal(
        np.concatenate([p.variance for p in parts], axis=1), whole.variance
    )
    # left minus its mirror, in float64 (numpy flip along x as the reference)
    left = np.flatnonzero(whole.half)
    k = left[3]
    ijk = np.argwhere(mask)[k]
    mirror_ijk = (mask.shape[0] - 1 - ijk[0], ijk[1], ijk[2])
    j = np.flatnonzero((np.argwhere(mask) == mirror_ijk).all(axis=1))[0]
    np.testing.assert_array_equal(whole.y[:, 3], y[:, k].astype(float) - y[:, j])


def test_run_quality_in_blocks_of_runs_and_on_some_rows():
    y, s2, X, animal = _data(n_vox=40)
    rng = np.random.default_rng(0)
    loo = rng.normal(0.4, 0.3, (7, 40))
    shell = np.zeros(40, dtype=bool)
    shell[:9] = True
    runs = pd.DataFrame({"animal": animal, "run": np.tile([1, 2, 3], 7)})
    one = run_quality(y, s2, animal, runs, loo, shell).runs
    many = run_quality(y, s2, animal, runs, loo, shell, chunk_rows=2).runs
    pd.testing.assert_frame_equal(many, one, rtol=RTOL)
    # some rows, without copying them first: the same as the copied rows
    keep = np.flatnonzero(animal >= 2)
    codes = animal[keep] - 2
    table = runs.iloc[keep].reset_index(drop=True)
    copied = run_quality(y[keep], s2[keep], codes, table, loo[2:], shell).runs
    picked = run_quality(y, s2, codes, table, loo[2:], shell, rows=keep, chunk_rows=3).runs
    pd.testing.assert_frame_equal(picked, copied, rtol=RTOL)
    # the mean variance of run 0, written out
    assert one["mean_variance"][0] == pytest.approx(float(np.nanmean(s2[0].astype(float))))


def test_region_values_and_target_means_in_blocks_of_runs():
    y, _, _, _ = _data(n_vox=30)
    rng = np.random.default_rng(1)
    shares = sp.csr_matrix(rng.uniform(0, 1, (30, 3)) * (rng.random((30, 3)) < 0.6))
    values, coverage = region_values(y, np.isfinite(y), shares)
    values_b, coverage_b = region_values(y, np.isfinite(y), shares, chunk_rows=2)
    _same(values_b, values)
    _same(coverage_b, coverage)
    # the share-weighted mean over the voxels where run 0 has data, written out
    w = shares.toarray()[:, 1]
    ok = np.isfinite(y[0])
    ref = (w[ok] * y[0, ok].astype(float)).sum() / w[ok].sum()
    assert values[0, 1] == pytest.approx(ref, rel=1e-12)
    target = rng.uniform(0, 1, 30)
    _same(_weighted_run_means(y, target, 4), _weighted_run_means(y, target))


def test_bootstrap_in_chunks_of_voxels_and_replicates_equals_one_pass():
    # a tiny budget reads the pair's voxels MIN_CHUNK_VOXELS at a time and maps one
    # replicate at a time; the draws and every LI are unchanged
    y, s2, _, animal = _data(n_vox=700)
    present = np.isfinite(y) & np.isfinite(s2)
    args = (y, present, animal, np.arange(0, 300), np.arange(350, 700))
    kwargs = {"variance": s2, "var_run": np.full(700, 0.1), "threshold": 1.0, "n_boot": 300}
    one = bootstrap_li(*args, rng=np.random.default_rng(3), **kwargs)
    many = bootstrap_li(*args, rng=np.random.default_rng(3), memory_gb=1e-9, **kwargs)
    _same(many.extent_replicates, one.extent_replicates)
    _same(many.effect_replicates, one.effect_replicates)
    assert many.effect_ci == pytest.approx(one.effect_ci, rel=RTOL)
    assert np.isfinite(one.effect_replicates).all()
    # some runs, sign-flipped, without a copy: the same as the copied, flipped runs
    keep = np.flatnonzero(animal >= 2)
    copied = bootstrap_li(
        -y[keep].astype(float),
        present[keep],
        animal[keep] - 2,
        *args[3:],
        rng=np.random.default_rng(4),
        **{**kwargs, "variance": s2[keep]},
    )
    picked = bootstrap_li(
        *args[:2], animal[keep] - 2, *args[3:], rows=keep, sign=-1.0, memory_gb=1e-9,
        rng=np.random.default_rng(4), **kwargs,
    )  # fmt: skip
    _same(picked.effect_replicates, copied.effect_replicates)
    _same(picked.extent_replicates, copied.extent_replicates)


def test_mirrored_maps_fitted_in_many_chunks_equal_one_chunk(tiny_study, monkeypatch):
    # the symmetry question's left − right maps: made, fitted, tested and reduced for the
    # permutations three voxels at a time, against all voxels at once
    import grouplevel
    from grouplevel.intake.study import load_runs
    from grouplevel.questions import ask

    study = grouplevel.load_study(tiny_study, permutations=16)
    fl = study.first_levels[0]
    data = load_runs(study, fl)
    gm = grouplevel.fit_study(study)[0][0]
    affine = gm.grid.affine
    midline = float(affine[0, 3] + affine[0, 0] * (gm.mask.shape[0] - 1) / 2)
    args = (gm, data.effect, data.variance, fl.design, np.ones(1), study.settings, midline, None)
    one = ask._asymmetry(*args)
    monkeypatch.setattr(ask, "_voxel_chunk", lambda settings, n_runs: 3)
    many = ask._asymmetry(*args)
    assert one.t.size == int(one.mask.sum()) > 6
    for field in ("t", "z", "q"):
        _same(getattr(many, field), getattr(one, field))
    for field in ("statistic", "p_fwe_voxel", "null_max_stat", "p_fwe_tfce", "null_max_tfce"):
        _same(getattr(many.permutation, field), getattr(one.permutation, field))
