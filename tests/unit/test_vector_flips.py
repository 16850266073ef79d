"""The permutation F-test of several within-animal effects (whole-vector sign flips).

Sources:
- Hotelling's T² of the animals' own difference vectors, ``T² = m d̄ᵀ C⁻¹ d̄`` with the
  sample covariance C (numpy.cov), recomputed for every one of the 2⁵ sign flips by
  plain numpy (common practice for a one-sample multivariate test; Hotelling 1931, Ann
  Math Stat 2:360). With equal sampling covariances the engine's F is a monotone
  function of that T², so the exhaustive permutation p-values must be equal.
- The count of flips that give the observed statistic back (the identity and the flip of
  every animal, for data in general position): smallest attainable p 2/2⁵ (common
  practice for two-sided sign-flip tests; Winkler et al. 2014, NeuroImage 92:381).
"""

from __future__ import annotations

import numpy as np
import pytest

from grouplevel.errors import ArgumentError
from grouplevel.inference.vector_flips import (
    animal_effect_vectors,
    estimable_animals,
    null_between_covariance,
    vector_f,
    vector_flip_test,
)

M_ANIMALS, RUNS_PER_CONDITION = 5, 2
CONDITIONS = ("a", "b", "c")
VAR_RUN = 0.01  # small run noise: the null covariance estimate stays inside the PSD cone


def _runs(rng, shift_b=0.0, shift_c=0.0, n_vox=1):
    """5 animals × 3 conditions × 2 runs; each animal has its own b−a and c−a effects."""
    per_animal = len(CONDITIONS) * RUNS_PER_CONDITION
    animal = np.repeat(np.arange(M_ANIMALS), per_animal)
    cond = np.tile(np.repeat(np.arange(3), RUNS_PER_CONDITION), M_ANIMALS)
    own = np.column_stack([cond == 1, cond == 2]).astype(float)
    base = rng.normal(0, 1, (M_ANIMALS, n_vox))[animal]
    slope_b = (shift_b + rng.normal(0, 1, (M_ANIMALS, n_vox)))[animal]
    slope_c = shift_c + 0.5 * slope_b + rng.normal(0, 1, (M_ANIMALS, n_vox))[animal]
    y = base + own[:, :1] * slope_b + own[:, 1:] * slope_c
    y = y + rng.normal(0, np.sqrt(VAR_RUN), y.shape)
    return y, own, animal, cond


def _hotelling(d: np.ndarray) -> float:
    m = d.shape[0]
    mean = d.mean(axis=0)
    return float(m * mean @ np.linalg.solve(np.cov(d, rowvar=False), mean))


def _flips(m):
    bits = (np.arange(2**m)[:, None] >> np.arange(m)[None, :]) & 1
    return 1 - 2 * bits


@pytest.mark.parametrize(("seed", "shift"), [(1, 0.0), (2, 0.0), (3, 0.4), (4, 3.0)])
def test_exhaustive_p_equals_hotelling_brute_force(seed, shift):
    rng = np.random.default_rng(seed)
    y, own, animal, cond = _runs(rng, shift_b=shift, shift_c=-shift)
    data = animal_effect_vectors(
        y, None, own, np.array([[0.0, 1, 0], [0, 0, 1]]), animal, np.full(1, VAR_RUN)
    )
    # reference: each animal's own differences of condition means (OLS = GLS with equal
    # run variances), Hotelling's T² of every flip
    means = np.array(
        [[y[(animal == a) & (cond == c), 0].mean() for c in range(3)] for a in range(5)]
    )
    d = means[:, 1:] - means[:, :1]
    np.testing.assert_allclose(data.effect[0], d, rtol=1e-10, atol=1e-12)
    # the precondition of the equivalence: (1/m) Σ d dᵀ − S inside the PSD cone
    S = data.covariance[0, 0]
    assert np.linalg.eigvalsh(d.T @ d / 5 - S).min() > 0
    signs = _flips(5)
    t2 = np.array([_hotelling(s[:, None] * d) for s in signs])
    p_ref = np.mean(t2 >= t2[0] * (1 - 1e-9))
    f = vector_f(data, signs)[:, 0]
    # the engine's F is m·r/q and T² = (m−1)·r/(1−r): the same order over the flips
    apart = np.abs(t2[:, None] - t2[None, :]) > 1e-9 * t2.max()  # pairs that differ
    order_f = np.sign(f[:, None] - f[None, :])
    assert np.array_equal(order_f[apart], np.sign(t2[:, None] - t2[None, :])[apart])
    res = vector_flip_test(
        data,
        np.array([4.0]),
        np.ones((1, 1, 1), dtype=bool),
        n_permutations=1000,
        rng=np.random.default_rng(0),
        use_tfce=False,
        threads=1,
    )
    assert res.scheme.exhaustive and res.scheme.n == 32
    assert res.scheme.kind == "sign flips of each animal's vector of 2 own effects"
    # identity and all-flip give the same T² (the only such pair for generic data)
    same = int(np.sum(np.isclose(t2, t2[0], rtol=1e-9)))
    assert same == 2 == res.scheme.n_equivalent
    assert res.scheme.smallest_p == pytest.approx(2 / 32, abs=1e-15)
    assert res.p_fwe_voxel[0] == pytest.approx(p_ref, abs=1e-12)
    if shift == 3.0:  # a strong effect reaches the floor
        assert res.p_fwe_voxel[0] == pytest.approx(2 / 32, abs=1e-12)


def test_flipping_an_animal_leaves_the_null_covariance_and_the_set_of_f_unchanged():
    # exactness: T̂₀ depends on d_a d_aᵀ only, so the F of flip s applied to data flipped
    # by h equals the F of flip s·h of the original data (the orbit is the same)
    rng = np.random.default_rng(7)
    y, own, animal, _ = _runs(rng, n_vox=4)
    s2 = rng.uniform(0.01, 0.2, y.shape)  # unequal sampling covariances
    U = np.array([[0.0, 1, 0], [0, 0, 1]])
    data = animal_effect_vectors(y, s2, own, U, animal, np.full(4, VAR_RUN))
    h = np.array([1, -1, -1, 1, -1.0])
    flipped = type(data)(
        effect=data.effect * h[None, :, None], covariance=data.covariance, valid=data.valid
    )
    np.testing.assert_allclose(
        null_between_covariance(flipped), null_between_covariance(data), rtol=1e-12
    )
    signs = _flips(5)
    np.testing.assert_allclose(
        vector_f(flipped, signs), vector_f(data, signs * h[None, :]), rtol=1e-10
    )


def test_an_animal_without_a_condition_takes_no_part():
    rng = np.random.default_rng(3)
    y, own, animal, cond = _runs(rng, n_vox=2)
    keep = ~((animal == 4) & (cond == 2))  # animal 4 has no runs of condition c
    U = np.array([[0.0, 1, 0], [0, 0, 1]])
    data = animal_effect_vectors(y[keep], None, own[keep], U, animal[keep], np.full(2, VAR_RUN))
    assert data.valid.all(axis=0).tolist() == [True] * 4 + [False]
    assert estimable_animals(own[keep], animal[keep], U).tolist() == [True] * 4 + [False]
    # b − c alone is estimable without condition c? no: it needs c as well
    assert not estimable_animals(own[keep], animal[keep], np.array([[0.0, 1, -1]]))[4]
    # the F of the four valid animals equals the F with animal 4 removed
    sub = data.animals(np.arange(5) < 4)
    np.testing.assert_allclose(
        vector_f(data, np.ones((1, 5)))[0], vector_f(sub, np.ones((1, 4)))[0], rtol=1e-12
    )


def test_bad_arguments_are_refused():
    rng = np.random.default_rng(0)
    y, own, animal, _ = _runs(rng)
    with pytest.raises(ArgumentError, match="targets need 3 weights"):
        animal_effect_vectors(y, None, own, np.eye(2), animal, np.full(1, VAR_RUN))
    data = animal_effect_vectors(y, None, own, np.array([[0.0, 1, 0]]), animal, np.full(1, VAR_RUN))
    with pytest.raises(ArgumentError, match="upper tail"):
        vector_flip_test(
            data, 4.0, np.ones((1, 1, 1), bool), n_permutations=10, rng=rng, sided="two"
        )


def test_null_covariance_per_group_and_chunks(monkeypatch):
    # reference: the moment formula written out per group with numpy
    rng = np.random.default_rng(5)
    y, own, animal, _ = _runs(rng, n_vox=5)
    U = np.array([[0.0, 1, 0], [0, 0, 1]])
    data = animal_effect_vectors(y, None, own, U, animal, np.full(5, 0.3))
    groups = np.array([0, 0, 1, 1, 1])
    T = null_between_covariance(data, groups)
    for g in (0, 1):
        sel = groups == g
        d, S = data.effect[:, sel], data.covariance[:, sel]
        moment = (np.einsum("vai,vaj->vij", d, d) - S.sum(axis=1)) / sel.sum()
        vals, vecs = np.linalg.eigh(moment)
        ref = np.einsum("vij,vj,vkj->vik", vecs, np.clip(vals, 0, None), vecs)
        for a in np.flatnonzero(sel):
            np.testing.assert_allclose(T[:, a], ref, rtol=1e-12, atol=1e-14)
    # voxel chunks give the same F as one piece
    signs = _flips(5)[:7]
    whole = vector_f(data, signs, groups)
    monkeypatch.setattr("grouplevel.inference.vector_flips._EFFECT_CHUNK_VOXELS", 2)
    np.testing.assert_allclose(vector_f(data, signs, groups), whole, rtol=1e-13)
