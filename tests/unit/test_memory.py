"""Memory budget: float32 maps, chunk sizes, the too-large-study error, peak memory."""

from __future__ import annotations

import tracemalloc
from dataclasses import replace

import numpy as np
import pytest

from grouplevel.errors import UserError
from grouplevel.memory import (
    CHUNK_ARRAYS,
    CHUNK_SHARE,
    GIB,
    MIN_CHUNK_VOXELS,
    chunk_voxels,
    memory_plan,
    runs_array_bytes,
    study_memory_need,
)
from grouplevel.model import fit_reml

FIELDS = ("beta", "cov_beta", "var_animal", "var_run", "cov_theta", "dcov_beta", "loglik")


def _study_data(n_vox: int, seed: int = 3, n_animals: int = 8, runs: int = 3):
    """Effects and variances that are exactly representable in float32."""
    rng = np.random.default_rng(seed)
    animal = np.repeat(np.arange(n_animals), runs)
    n = animal.size
    s2 = rng.uniform(0.2, 1.5, (n, n_vox))
    u = rng.normal(size=(n_animals, n_vox)) * 0.8
    y = 0.4 + u[animal] + rng.normal(size=(n, n_vox)) * np.sqrt(0.3 + s2)
    y[0, :5] = np.nan  # partial coverage, handled as before
    s2[2, 5:8] = np.nan
    return y.astype(np.float32), s2.astype(np.float32), np.ones((n, 1)), animal


@pytest.mark.parametrize("backend", ["compiled", "numpy"])
def test_float32_input_gives_the_float64_fit(backend):
    # Every float32 is exactly a float64 (IEEE 754-2008, binary32 ⊂ binary64), so fitting
    # float32-loaded maps must give the same numbers as the same maps loaded as float64.
    y32, s32, X, animal = _study_data(600)
    y64, s64 = y32.astype(np.float64), s32.astype(np.float64)
    assert np.array_equal(y64.astype(np.float32), y32, equal_nan=True)
    a = fit_reml(y32, s32, X, animal, chunk_size=257, backend=backend)
    b = fit_reml(y64, s64, X, animal, chunk_size=257, backend=backend)
    for name in FIELDS:
        va, vb = getattr(a, name), getattr(b, name)
        np.testing.assert_allclose(va, vb, rtol=1e-12, atol=0.0, equal_nan=True, err_msg=name)
    assert np.array_equal(a.converged, b.converged)
    assert np.array_equal(a.n_runs, b.n_runs)
    assert a.n_runs[:5].max() == y32.shape[0] - 1  # the NaN run carried no weight


def test_float32_fit_matches_statsmodels_mean():
    # Outside check on a float32 fit: with no first-level variances the model is the
    # balanced one-way random-effects model, whose REML mean is the grand mean
    # (Searle, Casella & McCulloch 1992, Variance Components, ch. 3) and whose REML
    # variance components equal statsmodels MixedLM (REML) on the same data.
    import pandas as pd
    from statsmodels.regression.mixed_linear_model import MixedLM

    y32, _, X, animal = _study_data(20, seed=11)
    y32 = y32[:, 10:11]  # a voxel without missing runs
    fit = fit_reml(y32, None, X, animal)
    frame = pd.DataFrame({"y": y32[:, 0].astype(np.float64), "animal": animal})
    ref = MixedLM(frame["y"], np.ones((len(frame), 1)), groups=frame["animal"]).fit(reml=True)
    np.testing.assert_allclose(fit.beta[0, 0], frame["y"].mean(), rtol=1e-9)
    np.testing.assert_allclose(fit.var_animal[0], float(ref.cov_re.iloc[0, 0]), rtol=1e-4)
    np.testing.assert_allclose(fit.var_run[0], float(ref.scale), rtol=1e-4)


def test_chunk_size_respects_the_budget():
    # working set = chunk × runs × 8 bytes × arrays ≤ share × budget (our own rule)
    for n_runs in (10, 200, 2000):
        for gb in (0.5, 6.0, 64.0):
            c = chunk_voxels(n_runs, gb)
            if c == MIN_CHUNK_VOXELS:  # the floor: only when the share is smaller still
                assert c * n_runs * 8 * CHUNK_ARRAYS > CHUNK_SHARE * gb * GIB
                continue
            assert c * n_runs * 8 * CHUNK_ARRAYS <= CHUNK_SHARE * gb * GIB
            assert (c + 1) * n_runs * 8 * CHUNK_ARRAYS > CHUNK_SHARE * gb * GIB
    # 6 GiB, 200 runs: 6·2³⁰/16 / (8·200·24) = 10 485.76 → 10 485 voxels (hand arithmetic)
    assert chunk_voxels(200, 6.0) == 10_485
    # a tiny budget still gives the minimum chunk
    assert chunk_voxels(10_000, 0.001) == MIN_CHUNK_VOXELS
    with pytest.raises(UserError, match="memory_gb"):
        chunk_voxels(10, 0.0)


def test_fit_reml_uses_the_budget_for_its_chunks(monkeypatch):
    import grouplevel.model.reml as reml

    seen = []
    original = reml._fit_compiled

    def spy(y, variance, present, idx, *args):
        seen.append(idx.size)
        return original(y, variance, present, idx, *args)

    monkeypatch.setattr(reml, "_fit_compiled", spy)
    y, s2, X, animal = _study_data(1000)
    budget = MIN_CHUNK_VOXELS * 1.5 * y.shape[0] * 8 * CHUNK_ARRAYS / CHUNK_SHARE / GIB
    expected = chunk_voxels(y.shape[0], budget)
    assert MIN_CHUNK_VOXELS < expected < 1000
    fit_reml(y, s2, X, animal, memory_gb=budget)
    assert max(seen) == expected
    assert sum(seen) == 1000


def test_sizes_by_hand():
    # 200 runs × 1 000 000 voxels × 4 bytes × 2 maps = 1.6e9 bytes (hand arithmetic)
    assert runs_array_bytes(200, 1_000_000, True) == 1_600_000_000
    assert runs_array_bytes(200, 1_000_000, False) == 800_000_000
    # + presence 2e8 bytes + (1+1+2+4+2+1+4) = 15 outputs × 8 bytes per voxel = 1.2e8
    assert study_memory_need(200, 1_000_000, True) == 1_600_000_000 + 200_000_000 + 120_000_000
    plan = memory_plan(200, 1_000_000, True, 1.0)
    assert not plan.arrays_fit
    assert plan.summary()["arrays_gb"] == round(1.6e9 / GIB, 3)
    assert memory_plan(200, 1_000_000, True, 2.0).arrays_fit


def test_load_runs_refuses_a_study_larger_than_the_budget(tiny_study):
    from grouplevel.study import load_runs, load_study

    study = load_study(tiny_study, permutations=0)
    fl = study.first_levels[0]
    n, v = len(fl.runs), int(fl.mask.sum())
    need = runs_array_bytes(n, v, fl.variance_kind != "none") / GIB
    small = replace(study.settings, compute=replace(study.settings.compute, memory_gb=need / 2))
    with pytest.raises(UserError) as err:
        load_runs(replace(study, settings=small), fl)
    text = str(err.value)
    assert "study.toml" in text and "[compute] memory_gb" in text and "mask" in text
    assert f"{n} runs" in text and f"{v:,} in-mask voxels" in text
    # an explicit budget overrides the study's; with enough memory the maps load as float32
    data = load_runs(study, fl, memory_gb=need * 4)
    assert data.effect.dtype == np.float32 and data.effect.shape == (n, v)
    assert data.variance is not None and data.variance.dtype == np.float32


def _peak_fit_bytes(y, s2, X, animal) -> int:
    tracemalloc.start()
    fit_reml(y, s2, X, animal, memory_gb=0.05)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak


def test_fit_reml_peak_memory_is_a_small_multiple_of_the_input():
    # Stated bound (our own, in the spirit of the model benchmark's ≤ 3×): the peak
    # traced allocation of the fit is ≤ 1.5× the float32 input (effects + variances).
    # It holds the presence mask (¼ of the float32 effects), the per-voxel outputs and
    # one chunk; at 24 runs the outputs (15 float64 per voxel) weigh most.
    y, s2, X, animal = _study_data(40_000, seed=5)
    fit_reml(y[:, :300], s2[:, :300], X, animal)  # compile / warm the kernel outside
    peak32 = _peak_fit_bytes(y, s2, X, animal)
    assert peak32 <= 1.5 * (y.nbytes + s2.nbytes), peak32 / (y.nbytes + s2.nbytes)
    # No whole-array float64 copy of float32 input: the float32 fit's peak is within
    # a tenth of one float64 copy of the float64 fit's peak (a whole copy would add
    # 100 % of it).
    y64, s64 = y.astype(np.float64), s2.astype(np.float64)
    peak64 = _peak_fit_bytes(y64, s64, X, animal)
    assert peak32 <= peak64 + 0.1 * (y64.nbytes + s64.nbytes), (peak32, peak64)
