"""False discovery rate against a published example and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from grouplevel.errors import UserError
from grouplevel.inference import fdr

# Benjamini Y, Hochberg Y (1995), J R Stat Soc B 57:289, worked example: 15 p-values,
# 4 rejections at q = 0.05 (values from memory).
BH1995_P = np.array(
    [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
     0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]
)  # fmt: skip


def test_benjamini_hochberg_worked_example():
    # Benjamini & Hochberg (1995), J R Stat Soc B 57:289: 4 rejections at 0.05, the
    # largest rejected p being 0.0095 (values from memory).
    result = fdr(BH1995_P, alpha=0.05, method="bh")
    assert result.n_significant == 4
    assert result.threshold_p == 0.0095
    assert np.all(result.q[:4] <= 0.05) and np.all(result.q[4:] > 0.05)
    # The same list with the Benjamini-Yekutieli correction (c(15) = 3.318) keeps 3:
    # 0.0019 <= 3 * 0.05 / (15 * 3.318) = 0.00301 but 0.0095 > 4 * 0.05 / 49.77 = 0.00402
    # (arithmetic on the list above).
    by = fdr(BH1995_P, alpha=0.05, method="by")
    assert by.n_significant == 3 and by.threshold_p == 0.0019


@pytest.mark.parametrize("method, theirs", [("bh", "fdr_bh"), ("by", "fdr_by")])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_q_values_equal_statsmodels(method, theirs, seed):
    # Reference: statsmodels.stats.multitest.multipletests(method="fdr_bh" / "fdr_by"),
    # q-values to 1e-12 relative and the same rejections.
    rng = np.random.default_rng(seed)
    p = np.concatenate([rng.uniform(size=400), rng.uniform(0, 0.002, size=60)])
    p[:5] = p[5]  # ties
    rng.shuffle(p)
    reject, q_sm, _, _ = multipletests(p, alpha=0.05, method=theirs)
    result = fdr(p, alpha=0.05, method=method)
    np.testing.assert_allclose(result.q, q_sm, rtol=1e-12, atol=0)
    np.testing.assert_array_equal(result.q <= 0.05, reject)
    assert result.n_significant == int(reject.sum())
    assert result.threshold_p == p[reject].max()


def test_shape_and_nan_are_kept():
    # Reference: statsmodels multipletests on the finite values only (NaN is not a test).
    rng = np.random.default_rng(4)
    p = rng.uniform(0, 0.1, size=(6, 5, 4))
    p[0, 0, 0] = np.nan
    p[3, 2, 1] = np.nan
    result = fdr(p, alpha=0.1)
    assert result.q.shape == p.shape
    assert np.isnan(result.q[0, 0, 0]) and np.isnan(result.q[3, 2, 1])
    finite = ~np.isnan(p)
    _, q_sm, _, _ = multipletests(p[finite], alpha=0.1, method="fdr_bh")
    np.testing.assert_allclose(result.q[finite], q_sm, rtol=1e-12)


def test_none_significant_gives_nan_threshold():
    # Step-up rule (Benjamini & Hochberg 1995): with every p above alpha none is rejected.
    result = fdr(np.array([0.2, 0.5, 0.9, 0.06]), alpha=0.05)
    assert result.n_significant == 0
    assert np.isnan(result.threshold_p)
    assert result.method == "bh" and result.alpha == 0.05
    empty = fdr(np.full(3, np.nan))
    assert empty.n_significant == 0 and np.isnan(empty.threshold_p)
    assert np.all(np.isnan(empty.q))


def test_bad_input_gives_clear_errors():
    with pytest.raises(UserError, match="FDR method"):
        fdr(BH1995_P, method="holm")
    with pytest.raises(UserError, match="alpha"):
        fdr(BH1995_P, alpha=1.5)
    with pytest.raises(UserError, match=r"\[0, 1\]"):
        fdr(np.array([0.1, 1.2]))
