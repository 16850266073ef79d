"""The first-level variance bound of each run's region average, in blocks of runs.

``region_variances`` converts one block of runs at a time to float64 within
``[compute] memory_gb``. A run's bound is its own, so a tiny budget (one run per block)
must reproduce one block to rounding (≤ 1e-12 relative; our own criterion, as in
tests/unit/test_question_chunks.py). Outside reference: the bound written out with
numpy, the square of the share-weighted mean of the standard errors over the voxels
where the run has data (fully correlated noise; Borenstein, Hedges, Higgins & Rothstein
2009, Introduction to Meta-Analysis, chapter 24, a mean of correlated outcomes with
correlation 1 — chapter from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from grouplevel.anatomy.regions import region_variances
from grouplevel.model.memory import REGION_AVERAGE_ARRAYS, chunk_rows

RTOL = 1e-12  # "equal to rounding" (our own criterion)


def _variances_and_shares(seed=3, runs=9, n_vox=53, regions=4):
    rng = np.random.default_rng(seed)
    s2 = rng.uniform(0.05, 0.4, (runs, n_vox)).astype(np.float32)
    present = rng.random((runs, n_vox)) > 0.1
    s2[~present & (rng.random((runs, n_vox)) < 0.5)] = np.nan
    present[:, :5] = False  # a region (voxels 0-4 only) where no run has data
    shares = np.zeros((n_vox, regions))
    shares[np.arange(n_vox), np.minimum(np.arange(n_vox) // 5, regions - 1)] = 1.0
    shares[10:20, 1] = 0.5  # partial shares: voxels split between two regions
    shares[10:20, 2] = 0.5
    return s2, present, sp.csr_matrix(shares)


def _bound_by_hand(s2, present, shares):
    """(Σ_v w_v s_v / Σ_v w_v)² over the voxels where the run has data (numpy)."""
    dense = shares.toarray()
    ok = present & np.isfinite(s2)
    se = np.where(ok, np.sqrt(np.where(ok, s2, 0.0).astype(float)), 0.0)
    weight = ok.astype(float) @ dense
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(weight > 0, (se @ dense) / weight, np.nan) ** 2


def test_region_variances_in_blocks_of_one_run_equal_one_block_and_the_hand_bound():
    s2, present, shares = _variances_and_shares()
    one = region_variances(s2, present, shares)
    # a budget so small that every run is its own block (at least one row per block)
    rows = chunk_rows(s2.shape[1], 1e-9, REGION_AVERAGE_ARRAYS)
    assert rows == 1
    many = region_variances(s2, present, shares, chunk_rows=rows)
    three = region_variances(s2, present, shares, chunk_rows=4)  # uneven last block
    np.testing.assert_allclose(many, one, rtol=RTOL, atol=0)
    np.testing.assert_allclose(three, one, rtol=RTOL, atol=0)
    assert np.array_equal(np.isnan(many), np.isnan(one))
    reference = _bound_by_hand(s2, present, shares)
    assert np.isnan(one[:, 0]).all() == np.isnan(reference[:, 0]).all()
    np.testing.assert_allclose(one, reference, rtol=1e-12, equal_nan=True)
    assert np.isfinite(one[:, 1:]).all()


def test_region_variances_refuse_negative_variance_in_any_block():
    s2, present, shares = _variances_and_shares()
    row, col = 7, int(np.flatnonzero(present[7])[-1])
    s2[row, col] = -0.1  # in the last block of three rows, not the first
    with pytest.raises(ValueError, match="must not be negative"):
        region_variances(s2, present, shares, chunk_rows=3)
