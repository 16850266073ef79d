"""The dask backend gives the same numbers as the local one, on a 2-worker local cluster.

References used below:
- the local ``fit_reml`` and ``permutation_test``, themselves checked against statsmodels
  ``MixedLM`` (tests/unit/test_reml.py) and nilearn ``permuted_ols``
  (tests/unit/test_permutation.py):
  the distributed runs must reproduce them exactly (equality, not a tolerance);
- statsmodels ``MixedLM`` REML (Seabold & Perktold 2010, Proc. 9th Python in Science
  Conference, pp. 92-96) on voxels fitted by the workers;
- textbook combinatorics: 2^m sign flips of m animals, C(m, m/2) assignments of two
  equal groups (Feller W, 1968, An Introduction to Probability Theory and Its
  Applications, vol. 1, ch. II).
"""

from __future__ import annotations

import math
import shutil
import socket
from dataclasses import fields

import numpy as np
import pytest

from grouplevel.compute import fit_voxel_chunks, open_backend
from grouplevel.config import ComputeSettings
from grouplevel.errors import UserError
from grouplevel.inference.permutation import animal_level_data, permutation_test
from grouplevel.model import between_animal_df, fit_reml
from grouplevel.model.reml import MixedFit
from tests.unit.test_reml import statsmodels_fit

GRID = (20, 20, 12)
N_ANIMALS = 8
RUNS_PER_ANIMAL = 3


def _study(seed: int = 20261202):
    """8 animals × 3 runs on a 20×20×12 grid: a blob of signal, partial coverage at an edge."""
    rng = np.random.default_rng(seed)
    animal = np.repeat(np.arange(N_ANIMALS), RUNS_PER_ANIMAL)
    n, v = animal.size, int(np.prod(GRID))
    ii, jj, kk = np.indices(GRID)
    blob = np.exp(-((ii - 6) ** 2 + (jj - 12) ** 2 + (kk - 6) ** 2) / 8.0).reshape(-1)
    u = rng.normal(0.0, 0.7, (N_ANIMALS, v))
    s2 = rng.uniform(0.1, 0.4, (n, v))
    y = (
        1.2 * blob
        + u[animal]
        + rng.normal(0.0, 0.5, (n, v))
        + rng.normal(size=(n, v)) * np.sqrt(s2)
    )
    # runs without data at the first slab of voxels; too few runs left in the first 5
    y[:4, :200] = np.nan
    y[:, :5] = np.nan
    y[0, 5] = np.nan
    group = (np.arange(N_ANIMALS) % 2).astype(float)
    X = np.column_stack([np.ones(n), group[animal]])
    return y, s2, X, animal


def _warm_compiled_kernels() -> None:
    """Compile (or load) the numba kernels here first: workers then read the cache."""
    y, s2, X, animal = _study(1)
    y, s2 = y[:, 200:264], s2[:, 200:264]
    fit = fit_reml(y, s2, X, animal)
    data = animal_level_data(y, s2, X, animal, fit.var_run, fit.var_animal)
    mask = np.zeros((4, 4, 4), dtype=bool)
    mask.reshape(-1)[:64] = True
    permutation_test(
        data,
        np.array([1.0, 0.0]),
        np.full(64, 7.0),
        mask,
        n_permutations=4,
        rng=np.random.default_rng(0),
    )


@pytest.fixture(scope="module")
def dask_backend():
    _warm_compiled_kernels()
    with open_backend(ComputeSettings(backend="dask", workers=2)) as backend:
        yield backend


@pytest.fixture(scope="module")
def study():
    return _study()


def _assert_fits_equal(a: MixedFit, b: MixedFit) -> None:
    for f in fields(MixedFit):
        # the local fit_reml itself (checked against statsmodels in tests/unit/test_reml.py)
        np.testing.assert_array_equal(getattr(a, f.name), getattr(b, f.name), err_msg=f.name)


def test_dask_backend_has_two_workers(dask_backend):
    assert dask_backend.kind == "dask"
    assert dask_backend.distributed
    assert dask_backend.workers == 2
    # loopback only (common practice: a local cluster is not reachable from the network)
    address = dask_backend.client.scheduler.address
    assert address.startswith("tcp://127.0.0.1:")


@pytest.mark.parametrize("n_chunks", [None, 7])
def test_chunked_fit_equals_one_fit(dask_backend, study, n_chunks):
    y, s2, X, animal = study
    local = fit_reml(y, s2, X, animal)
    spread = fit_voxel_chunks(dask_backend, y, s2, X, animal, n_chunks=n_chunks)
    _assert_fits_equal(spread, local)
    # the study has unfittable voxels, and they stay in place
    assert np.isnan(spread.beta[:5]).all() and np.isfinite(spread.beta[5:]).all()


def test_chunked_fit_without_variances_matches_statsmodels(dask_backend, study):
    y, _, X, animal = study
    y = y[:, 300:330]
    spread = fit_voxel_chunks(dask_backend, y, None, X, animal, n_chunks=3, max_iter=200)
    _assert_fits_equal(spread, fit_reml(y, None, X, animal, max_iter=200))
    checked = 0
    for v in range(y.shape[1]):
        res = statsmodels_fit(y[:, v], X, animal)
        tau2 = float(res.cov_re.iloc[0, 0])
        # statsmodels MixedLM, REML (Seabold & Perktold 2010): the same REML criterion
        # (with its 2π constant), which our estimate maximises at least as well
        assert spread.loglik[v] >= res.llf - 1e-8
        # statsmodels' optimiser stops within about 1e-4 of the optimum and early near
        # τ² = 0 (see tests/unit/test_reml.py): compare the interior voxels, to 1e-3
        if not res.converged or tau2 < 0.05 * res.scale:
            continue
        checked += 1
        np.testing.assert_allclose(spread.beta[v], res.fe_params.to_numpy(), rtol=1e-3)
        np.testing.assert_allclose(spread.var_animal[v], tau2, rtol=1e-3)
        np.testing.assert_allclose(spread.var_run[v], res.scale, rtol=1e-3)
    assert checked >= 10


def test_chunked_numpy_fit_equals_one_numpy_fit(dask_backend, study):
    # fit_reml's own backend keyword passes through (the vectorised numpy reference)
    y, s2, X, animal = study
    y, s2 = y[:, :400], s2[:, :400]
    spread = fit_voxel_chunks(dask_backend, y, s2, X, animal, n_chunks=3, backend="numpy")
    local = fit_reml(y, s2, X, animal, backend="numpy")
    # the vectorised reference does batched linear algebra over a chunk's voxels, whose
    # last bits depend on the chunk's shape (measured: up to 3e-15 relative); the
    # compiled default fits voxel by voxel and is compared exactly above
    for f in fields(MixedFit):
        np.testing.assert_allclose(
            getattr(spread, f.name), getattr(local, f.name), rtol=1e-12, atol=0, err_msg=f.name
        )


@pytest.mark.parametrize(
    ("contrast", "requested", "kind"),
    [
        ([1.0, 0.0], 100, "sign flips"),  # fewer than 2^8 = 256: drawn at random
        ([0.0, 1.0], 60, "animal permutations"),  # fewer than C(8, 4) = 70: drawn
    ],
)
def test_permutations_equal_local(dask_backend, study, contrast, requested, kind):
    y, s2, X, animal = study
    keep = np.isfinite(y).all(axis=0)  # voxels with every run, as the pipeline's mask
    y, s2 = y[:, keep], s2[:, keep]
    mask = keep.reshape(GRID)
    c = np.array(contrast)
    fit = fit_reml(y, s2, X, animal)
    data = animal_level_data(y, s2, X, animal, fit.var_run, fit.var_animal)
    df = between_animal_df(X, animal, np.isfinite(y), c)
    common = dict(
        n_permutations=requested, cluster_forming_p=0.01, voxel_volume_mm3=0.008, use_tfce=True
    )
    local = permutation_test(data, c, df, mask, rng=np.random.default_rng(7), **common)
    reported: list[tuple[int, int]] = []
    spread = permutation_test(
        data,
        c,
        df,
        mask,
        rng=np.random.default_rng(7),
        backend=dask_backend,
        progress=lambda done, total: reported.append((done, total)),
        **common,
    )
    # textbook combinatorics: the plan is a random draw here, not an enumeration
    assert spread.scheme.kind == kind and not spread.scheme.exhaustive
    assert spread.scheme.n_distinct == (2.0**N_ANIMALS if kind == "sign flips" else math.comb(8, 4))
    assert spread.scheme.n == requested
    np.testing.assert_array_equal(spread.scheme.signs, local.scheme.signs)
    np.testing.assert_array_equal(spread.scheme.orders, local.scheme.orders)
    # the local permutation engine (checked against nilearn in tests/unit/test_permutation.py)
    for name in (
        "statistic",
        "null_max_stat",
        "null_max_extent",
        "null_max_mass",
        "null_max_tfce",
        "p_fwe_voxel",
        "p_fwe_cluster_extent",
        "p_fwe_cluster_mass",
        "tfce",
        "p_fwe_tfce",
    ):
        np.testing.assert_array_equal(getattr(spread, name), getattr(local, name), err_msg=name)
    np.testing.assert_array_equal(spread.clusters.labels, local.clusters.labels)
    assert spread.clusters.extent_voxels.size >= 1  # the blob forms a cluster
    assert sum(done for done, _ in reported) == requested
    assert {total for _, total in reported} == {requested}
    # several tasks were sent, not one
    assert len(reported) >= 2


def test_local_backend_runs_here():
    with open_backend(ComputeSettings(backend="local")) as backend:
        assert backend.kind == "local" and backend.client is None
        assert not backend.distributed
        order: list[int] = []
        out = backend.map_batches(
            lambda shared, b: shared * b, 10, [np.arange(3), np.arange(3, 5)], order.append
        )
    np.testing.assert_array_equal(np.concatenate(out), 10 * np.arange(5))
    assert order == [3, 2]


def test_unknown_backend_is_a_user_error():
    with pytest.raises(UserError, match=r"\[compute\] backend must be one of local, dask"):
        with open_backend(ComputeSettings(backend="cloud")):
            pass


def test_zero_workers_is_a_user_error():
    with pytest.raises(UserError, match=r"\[compute\] workers must be at least 1, got 0"):
        with open_backend(ComputeSettings(backend="dask", workers=0)):
            pass


def test_unreachable_scheduler_is_a_user_error():
    with socket.socket() as s:  # a loopback port that nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    settings = ComputeSettings(backend="dask", scheduler=f"tcp://127.0.0.1:{port}")
    with pytest.raises(UserError, match=r"\[compute\] scheduler: cannot reach"):
        with open_backend(settings, connect_timeout_s=1.0):
            pass


def _without_run_details(value, drop=("created", "inputs", "compute", "versions", "output_folder")):
    """summary.json without what differs between two runs of one study by design: the
    time, the inputs' and the output's folders, the [compute] settings and the tool
    versions block."""
    if isinstance(value, dict):
        return {k: _without_run_details(v, drop) for k, v in value.items() if k not in drop}
    if isinstance(value, list):
        return [_without_run_details(v, drop) for v in value]
    return value


def test_whole_example_on_dask_equals_local(dask_backend, example_output, tmp_path):
    # The whole example study (three conditions, the questions with their asymmetry
    # permutations, 32 sign flips per contrast, atlas tables) run on a local two-worker
    # dask cluster writes the same outputs as the local run of the session fixture:
    # every map array, every table and summary.json (but for the time, the inputs'
    # folder and the [compute] settings). The run connects to the module's cluster
    # through [compute] scheduler (its workers have the compiled kernels loaded).
    import json

    import nibabel as nib

    import grouplevel
    from tests.conftest import EXAMPLE_OUTPUT_PERMUTATIONS

    folder = tmp_path / "study"
    shutil.copytree(example_output.parent / "study", folder)
    toml = folder / "study.toml"
    text = toml.read_text()
    assert "[compute]" not in text
    address = dask_backend.client.scheduler.address
    toml.write_text(text + f'\n[compute]\nbackend = "dask"\nscheduler = "{address}"\n')
    out = grouplevel.run_study(toml, tmp_path / "results", permutations=EXAMPLE_OUTPUT_PERMUTATIONS)
    local_files = sorted(p.relative_to(example_output) for p in example_output.rglob("*"))
    dask_files = sorted(p.relative_to(out) for p in out.rglob("*"))
    assert local_files == dask_files
    compared = 0
    for rel in local_files:
        a, b = example_output / rel, out / rel
        if a.is_dir() or rel.suffix in (".html", ".md", ".tex", ".png", ".svg", ".pdf"):
            continue  # the report and methods repeat the summary (and name the backend)
        if rel.name == "summary.json":
            # the inputs sit in two folders: compare with each folder's path replaced
            sa = json.loads(a.read_text().replace(str(example_output.parent / "study"), "S"))
            sb = json.loads(b.read_text().replace(str(folder), "S"))
            assert sb["settings"]["compute"]["backend"] == "dask"
            assert _without_run_details(sa) == _without_run_details(sb)
        elif rel.name.endswith((".nii.gz", ".nii")):
            np.testing.assert_array_equal(
                np.asarray(nib.load(a).dataobj), np.asarray(nib.load(b).dataobj), err_msg=str(rel)
            )
        else:
            assert a.read_bytes() == b.read_bytes(), rel
        compared += 1
    assert compared > 50
