"""Permutation inference on the run-within-animal model, checked against outside sources.

Sources:
- nilearn ``permuted_ols`` (nilearn.mass_univariate), sign flipping of an intercept-only
  OLS model, on identical flips;
- the REML fit of the project's model (``fit_reml`` + ``test_contrast``), itself checked
  against statsmodels MixedLM in tests/unit/test_reml.py, refitted from scratch per permutation;
- Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014), NeuroImage 92:381-397,
  Table 2 (Freedman–Lane: permute the residuals of the nuisance-only model, add back its
  fitted values);
- Nichols TE, Holmes AP (2002), Hum Brain Mapp 15:1-25 (FWE p from the distribution of
  the maximum, the identity counted);
- textbook combinatorics: 2^m sign flips, C(m, m1) distinct two-group assignments
  (Feller W, 1968, An Introduction to Probability Theory and Its Applications, vol. 1,
  ch. II).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from grouplevel.inference import permutation as perm_mod
from grouplevel.inference.permutation import (
    PermutationScheme,
    _fwe_p,
    animal_level_data,
    partition_design,
    permutation_test,
    plan_permutations,
)
from grouplevel.model import between_animal_df, fit_reml, t_to_z, test_contrast
from grouplevel.pipeline import run_study
from tests.conftest import write_study

GRID = (5, 4, 3)  # 60 voxels: enough for clusters, small enough to stay fast
V = int(np.prod(GRID))


def _study(
    rng: np.random.Generator,
    runs: list[int],
    *,
    variances: bool,
    effect: float = 0.0,
    columns: tuple[np.ndarray, ...] = (),
    n_vox: int = V,
    tau: float = 0.8,
    sigma: float = 0.6,
):
    """Runs × voxels data from the model, with animal-level design columns."""
    animal = np.repeat(np.arange(len(runs)), runs)
    n = animal.size
    X = np.column_stack([np.ones(n), *[np.asarray(c, float)[animal] for c in columns]])
    u = rng.normal(0.0, tau, (len(runs), n_vox))
    s2 = rng.uniform(0.1, 0.5, (n, n_vox)) if variances else None
    noise = rng.normal(0.0, sigma, (n, n_vox))
    if s2 is not None:
        noise += rng.normal(0.0, 1.0, (n, n_vox)) * np.sqrt(s2)
    y = effect + u[animal] + noise
    return y, s2, X, animal


def _fit(y, s2, X, animal, c):
    fit = fit_reml(y, s2, X, animal)
    df = between_animal_df(X, animal, np.isfinite(y), c)
    data = animal_level_data(y, s2, X, animal, fit.var_run, fit.var_animal)
    return fit, df, data


def _mask() -> np.ndarray:
    return np.ones(GRID, dtype=bool)


def _run(data, c, df, n_perm, seed=0, **kw):
    kw.setdefault("use_tfce", False)
    kw.setdefault("threads", 1)
    return permutation_test(
        data,
        np.asarray(c, float),
        df,
        _mask(),
        n_permutations=n_perm,
        rng=np.random.default_rng(seed),
        **kw,
    )


def _with_flips(monkeypatch, signs: np.ndarray) -> None:
    """Make permutation_test use exactly these sign flips (row 0 must be the identity)."""
    m = signs.shape[1]

    def fixed(x_interest, nuisance, n_requested, rng, sided="two"):
        return PermutationScheme(
            "sign flips",
            signs.astype(np.int8),
            np.tile(np.arange(m), (signs.shape[0], 1)),
            False,
            2.0**m,
            1.0 / signs.shape[0],
        )

    monkeypatch.setattr(perm_mod, "plan_permutations", fixed)


# --------------------------------------------------------------------------------------
# 1. One run per animal, no first-level variances: nilearn's OLS sign flipping
# --------------------------------------------------------------------------------------


def _nilearn_flips(seed: int, n_perm: int, n: int) -> np.ndarray:
    """The flips that nilearn's permuted_ols (n_jobs=1) applies, reproduced from its seed.

    permuted_ols draws one chunk seed from ``RandomState(seed)``; the chunk then multiplies
    the data in place by a fresh ±1 vector per permutation, so permutation k applies the
    product of the first k draws (nilearn 0.14, permuted_least_squares.py).
    """
    outer = np.random.RandomState(seed)
    inner = np.random.RandomState(outer.randint(1, np.iinfo(np.int32).max - 1))
    current = np.ones(n, dtype=int)
    out = np.empty((n_perm, n), dtype=int)
    for k in range(n_perm):
        current = current * (inner.randint(2, size=(n, 1)) * 2 - 1)[:, 0]
        out[k] = current
    return out


def test_one_run_per_animal_matches_nilearn_sign_flips(monkeypatch):
    from nilearn.mass_univariate import permuted_ols

    rng = np.random.default_rng(11)
    m, n_perm, seed = 9, 300, 5
    y = rng.normal(0.4, 1.0, (m, V))
    X = np.ones((m, 1))
    animal = np.arange(m)
    fit, df, data = _fit(y, None, X, animal, [1.0])
    flips = _nilearn_flips(seed, n_perm, m)
    _with_flips(monkeypatch, np.vstack([np.ones((1, m), int), flips]))
    res = _run(data, [1.0], df, n_perm + 1)

    ref = permuted_ols(
        np.ones((m, 1)),
        y,
        model_intercept=False,
        n_perm=n_perm,
        two_sided_test=True,
        random_state=seed,
        n_jobs=1,
        verbose=0,
    )
    # observed: nilearn's OLS t is the one-sample t on m - 1 df
    t_obs = ref["t"][0]
    assert np.allclose(res.statistic, t_to_z(t_obs, m - 1.0), atol=1e-5)
    # null: per permutation, nilearn's max |t| converted to z at m - 1 df (a monotone map
    # at constant df) equals the engine's max |z|. Tolerance 1e-4 in z: the engine
    # converts t to z by interpolation (error < 1e-4 by its own design).
    z_ref = t_to_z(ref["h0_max_t"][0], m - 1.0)
    assert np.allclose(res.null_max_stat[1:], z_ref, atol=1e-4, rtol=0)
    # and the FWE p-values agree with nilearn's, identity counted on both sides
    p_ref = 10.0 ** -ref["logp_max_t"][0]
    assert np.allclose(res.p_fwe_voxel, p_ref, atol=1e-12)


def test_one_run_per_animal_with_variances_is_meta_analysis_refit():
    """With s² and one run per animal σ² and τ² are confounded: the engine must not hold
    the fit's arbitrary σ̂² fixed. Reference: a from-scratch REML of the flipped data with
    σ² fixed at 0 (the random-effects meta-analysis model; DerSimonian & Laird 1986,
    Control Clin Trials 7:177, fitted by REML as in Viechtbauer 2005, J Educ Behav Stat
    30:261)."""
    rng = np.random.default_rng(3)
    m = 7
    y, s2, X, animal = _study(rng, [1] * m, variances=True, effect=0.3)
    fit, df, data = _fit(y, s2, X, animal, [1.0])
    res = _run(data, [1.0], df, 128)
    assert res.scheme.exhaustive and res.scheme.n == 128
    for k in (1, 37, 90, 127):
        yk = res.scheme.signs[k][animal][:, None] * y
        ref = fit_reml(yk, s2, X, animal, estimate_run_variance=False, tol=1e-10)
        z = t_to_z(test_contrast(ref, [1.0], df).t, df)
        assert np.abs(z).max() == pytest.approx(res.null_max_stat[k], abs=1e-4)


# --------------------------------------------------------------------------------------
# 2. The identity permutation reproduces the main fit
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("variances", [False, True])
@pytest.mark.parametrize(
    "runs",
    [[3] * 8, [2, 3, 4, 2, 5, 3, 2, 4]],
    ids=["balanced", "unbalanced"],
)
@pytest.mark.parametrize("c", [[1.0, 0.0], [0.0, 1.0]], ids=["mean", "group"])
def test_identity_reproduces_main_fit(variances, runs, c):
    # reference: the project's REML fit (itself checked against statsmodels MixedLM,
    # Pinheiro & Bates 2000) and its t -> z at equal p; tolerance 1e-5 in z
    rng = np.random.default_rng(len(runs) + sum(runs) + int(variances) + int(c[1]))
    group = np.array([0, 1] * 4, dtype=float)
    y, s2, X, animal = _study(rng, runs, variances=variances, effect=0.5, columns=(group,))
    y[:, : V // 2] += 0.7 * X[:, 1:2]  # a group effect in half of the voxels
    fit, df, data = _fit(y, s2, X, animal, c)
    res = _run(data, c, df, 20)
    ref = t_to_z(test_contrast(fit, c, df).t, df)
    assert np.all(fit.converged)
    assert np.abs(res.statistic - ref).max() <= 1e-5


# --------------------------------------------------------------------------------------
# 3. The refit shortcut (σ² fixed) against a full REML refit per permutation
# --------------------------------------------------------------------------------------


def test_shortcut_against_full_refit():
    """8 animals × 3 runs, 200 voxels, first-level variances, 30 random sign flips.

    Measured (seed 21): the engine's per-permutation max |z| and that of a from-scratch
    fit_reml + test_contrast of the flipped runs correlate at r = 0.9936, with a largest
    relative difference of 4.4 % (most permutations agree to < 0.5 %; seeds 22 and 23
    gave r = 0.9936 and 0.9981, 5.0 % and 3.5 %). The difference comes from σ²: the full
    refit re-estimates it, and its animal-level part changes with the flips, while the
    shortcut keeps the unpermuted σ̂². Bounds asserted: r > 0.99, max relative
    difference < 8 %, median relative difference < 1 %.
    """
    rng = np.random.default_rng(21)
    n_vox = 200
    runs = [3] * 8
    y, s2, X, animal = _study(rng, runs, variances=True, effect=0.2, n_vox=n_vox)
    fit, df, data = _fit(y, s2, X, animal, [1.0])
    res = permutation_test(
        data,
        np.array([1.0]),
        df,
        np.ones((10, 20, 1), dtype=bool),
        n_permutations=31,
        rng=np.random.default_rng(4),
        use_tfce=False,
        threads=1,
    )
    assert not res.scheme.exhaustive and res.scheme.n == 31
    full = np.empty(30)
    for k in range(1, 31):
        yk = res.scheme.signs[k][animal][:, None] * y
        ref = fit_reml(yk, s2, X, animal)
        full[k - 1] = np.abs(t_to_z(test_contrast(ref, [1.0], df).t, df)).max()
    short = res.null_max_stat[1:]
    r = np.corrcoef(short, full)[0, 1]
    rel = np.abs(short - full).max() / full.max()
    assert r > 0.99
    assert rel < 0.08
    assert np.median(np.abs(short - full) / full) < 0.01


# --------------------------------------------------------------------------------------
# 4. Invariants (hypothesis)
# --------------------------------------------------------------------------------------


@settings(max_examples=10, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n_animals=st.integers(4, 8))
def test_flipping_every_animal_negates_z_and_keeps_p(seed, n_animals):
    # a sign flip of every animal negates t (common practice; the model is odd in y).
    # Two-sided maxima are even in the flips, so p is unchanged both for enumerated
    # flips (up to 6 animals) and for the same random draws (7-8 animals, 2^m > 100).
    rng = np.random.default_rng(seed)
    runs = list(rng.integers(1, 4, n_animals))
    y, s2, X, animal = _study(rng, runs, variances=True, effect=0.5)
    fit, df, data = _fit(y, s2, X, animal, [1.0])
    _, _, data_neg = _fit(-y, s2, X, animal, [1.0])
    a = _run(data, [1.0], df, 100, seed=seed % 97, use_tfce=True)
    b = _run(data_neg, [1.0], df, 100, seed=seed % 97, use_tfce=True)
    assert a.scheme.exhaustive == (n_animals <= 6)
    assert np.allclose(b.statistic, -a.statistic, atol=1e-6)
    assert np.array_equal(a.p_fwe_voxel, b.p_fwe_voxel)
    assert np.array_equal(a.p_fwe_tfce, b.p_fwe_tfce)


@settings(max_examples=8, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n_animals=st.integers(4, 6))
def test_relabelling_animals_changes_nothing(seed, n_animals):
    # permuting animal order changes nothing (common practice: animals are exchangeable
    # labels); exhaustive flips make the null the same set
    rng = np.random.default_rng(seed)
    runs = list(rng.integers(1, 4, n_animals))
    y, s2, X, animal = _study(rng, runs, variances=True, effect=0.4)
    fit, df, data = _fit(y, s2, X, animal, [1.0])
    new_code = rng.permutation(n_animals)
    animal2 = new_code[animal]
    order = np.argsort(animal2, kind="stable")
    y2, s22, X2, animal2 = y[order], s2[order], X[order], animal2[order]
    _, df2, data2 = _fit(y2, s22, X2, animal2, [1.0])
    a = _run(data, [1.0], df, 2**n_animals, use_tfce=True)
    b = _run(data2, [1.0], df2, 2**n_animals, seed=seed % 101, use_tfce=True)
    assert a.scheme.exhaustive and b.scheme.exhaustive
    assert np.allclose(a.statistic, b.statistic, atol=1e-6)
    assert np.allclose(np.sort(a.null_max_stat), np.sort(b.null_max_stat), atol=1e-6)
    assert np.array_equal(a.p_fwe_voxel, b.p_fwe_voxel)
    assert np.array_equal(a.p_fwe_tfce, b.p_fwe_tfce)


@settings(max_examples=6, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), other=st.integers(0, 2**31 - 1))
def test_exhaustive_p_does_not_depend_on_seed(seed, other):
    rng = np.random.default_rng(seed)
    y, s2, X, animal = _study(rng, [2, 3, 2, 3, 2], variances=True, effect=0.6)
    fit, df, data = _fit(y, s2, X, animal, [1.0])
    a = _run(data, [1.0], df, 1000, seed=seed)
    b = _run(data, [1.0], df, 1000, seed=other)
    assert a.scheme.exhaustive and a.scheme.n == 2**5  # 2^m sign flips
    assert np.array_equal(a.p_fwe_voxel, b.p_fwe_voxel)
    assert np.array_equal(a.p_fwe_cluster_mass, b.p_fwe_cluster_mass)


@settings(max_examples=10, deadline=None)
@given(m1=st.integers(1, 5), m2=st.integers(1, 5), seed=st.integers(0, 1000))
def test_two_group_label_permutations_count(m1, m2, seed):
    # C(m, m1) distinct assignments of m animals to two groups (Feller 1968, ch. II)
    m = m1 + m2
    group = np.array([1.0] * m1 + [0.0] * m2)
    design = np.column_stack([np.ones(m), group])
    x_i, Z = partition_design(design, np.array([0.0, 1.0]))
    scheme = plan_permutations(x_i, Z, 10**6, np.random.default_rng(seed))
    assert scheme.kind == "animal permutations" and scheme.exhaustive
    assert scheme.n == math.comb(m, m1) == scheme.n_distinct
    # which animals sit in group 1 under each order: all distinct, the identity first
    members = {frozenset(int(a) for a in order[group == 1]) for order in scheme.orders}
    assert len(members) == math.comb(m, m1)
    assert np.array_equal(scheme.orders[0], np.arange(m))
    # two-sided: with equal groups, swapping the two label sets gives -t, so every
    # assignment pairs with its mirror and the smallest p is 2/C(m, m1) (common practice)
    mirror = 2.0 if m1 == m2 else 1.0
    assert scheme.n_equivalent == mirror
    assert scheme.smallest_p == pytest.approx(mirror / math.comb(m, m1))


def test_sign_flip_count_is_two_to_the_m():
    # 2^m distinct flips, all enumerated, identity first (Feller 1968, ch. II)
    for m in range(1, 9):
        scheme = plan_permutations(np.ones(m), np.zeros((m, 0)), 2**m, np.random.default_rng(0))
        assert scheme.exhaustive and scheme.n == 2**m
        assert len({tuple(row) for row in scheme.signs}) == 2**m
        assert np.all(scheme.signs[0] == 1)
    drawn = plan_permutations(np.ones(9), np.zeros((9, 0)), 100, np.random.default_rng(0))
    assert not drawn.exhaustive and drawn.n == 100 and np.all(drawn.signs[0] == 1)


# --------------------------------------------------------------------------------------
# 5. Freedman–Lane with a nuisance covariate (Winkler et al. 2014, Table 2)
# --------------------------------------------------------------------------------------


def _gls(design, y, precision, tau2):
    """Per-voxel GLS coefficients of the animal-level model at fixed τ²."""
    w = precision / (1.0 + tau2[:, None] * precision)  # (V, m)
    out = np.empty((y.shape[0], design.shape[1]))
    for v in range(y.shape[0]):  # reference code: a plain loop over a few voxels
        sw = np.sqrt(w[v])
        out[v] = np.linalg.lstsq(design * sw[:, None], y[v] * sw, rcond=None)[0]
    return out


def test_freedman_lane_by_hand():
    rng = np.random.default_rng(8)
    m = 8
    group = np.array([0, 1, 0, 1, 0, 1, 0, 1], dtype=float)
    age = rng.normal(0.0, 1.0, m)
    runs = [2, 3, 2, 3, 3, 2, 3, 2]
    y, s2, X, animal = _study(rng, runs, variances=True, columns=(group, age))
    y += 0.9 * X[:, 2:3] + 0.5 * X[:, 1:2] * (np.arange(V) < 20)  # nuisance + effect
    c = np.array([0.0, 1.0, 0.0])
    fit, df, data = _fit(y, s2, X, animal, c)
    res = _run(data, c, df, 4, seed=2)
    assert res.scheme.kind == "animal permutations" and res.scheme.n == 4

    design = data.design
    nuisance = design[:, [0, 2]]  # the reduced model: intercept + age
    gamma = _gls(nuisance, data.mean, data.precision, data.var_animal)
    fitted = gamma @ nuisance.T
    resid = data.mean - fitted
    manly = []
    for k in range(1, 4):
        order = res.scheme.orders[k]
        # Y* = H_Z Y + P R_Z Y; each permuted residual keeps its own sampling precision
        y_star = fitted + resid[:, order]
        prec = data.precision[:, order]
        # independent refit: fit_reml on the animal-level data (one "run" per animal with
        # known variance 1/precision, σ² = 0), full design, then z of the group contrast
        ref = fit_reml(y_star.T, 1.0 / prec.T, design, np.arange(m), estimate_run_variance=False)
        z = t_to_z(test_contrast(ref, c, df).t, df)
        assert np.abs(z).max() == pytest.approx(res.null_max_stat[k], abs=1e-4)
        # permuting the raw data instead (Manly) gives a different null here
        raw = fit_reml(
            data.mean[:, order].T, 1.0 / prec.T, design, np.arange(m), estimate_run_variance=False
        )
        manly.append(np.abs(t_to_z(test_contrast(raw, c, df).t, df)).max())
    assert np.max(np.abs(np.array(manly) - res.null_max_stat[1:4])) > 0.05


# --------------------------------------------------------------------------------------
# 6. FWE p-values and the smallest attainable p
# --------------------------------------------------------------------------------------


def test_fwe_p_counts_identity_and_ties():
    # p = #{k: max_k ≥ observed} / N with the identity among the N (Nichols & Holmes 2002)
    null = np.array([3.0, 1.0, 3.0, 5.0, 2.0])  # row 0 = the identity's maximum
    observed = np.array([3.0, 5.0, 0.5, 6.0, 2.0])
    p = _fwe_p(observed, null)
    assert np.allclose(p, [3 / 5, 1 / 5, 5 / 5, 0 / 5, 4 / 5])
    # the identity's own maximum always counts itself: smallest reachable p is 1/N
    assert _fwe_p(np.array([null.max()]), null)[0] == pytest.approx(1 / 5)


@pytest.mark.parametrize(("sided", "factor"), [("two", 2.0), ("positive", 1.0)])
def test_smallest_p_of_exhaustive_flips(sided, factor):
    # with every animal flipped |z| is unchanged, so a two-sided exhaustive test cannot go
    # below 2/N (Nichols & Holmes 2002); one-sided it reaches 1/N
    rng = np.random.default_rng(1)
    y, s2, X, animal = _study(rng, [2] * 6, variances=True, effect=4.0, tau=0.2)
    fit, df, data = _fit(y, s2, X, animal, [1.0])
    res = _run(data, [1.0], df, 64, sided=sided)
    assert res.scheme.smallest_p == pytest.approx(factor / 64)
    assert res.p_fwe_voxel.min() == pytest.approx(factor / 64)


def test_pipeline_warns_when_smallest_p_exceeds_alpha(tmp_path: Path):
    # 4 animals: 2^4 = 16 flips, smallest two-sided p 2/16 = 0.125 > alpha = 0.05
    rng = np.random.default_rng(2)
    shape = (4, 4, 3)
    animals = [f"a{i}" for i in range(4) for _ in range(2)]
    effects = 1.0 + rng.normal(0, 0.5, (8, *shape))
    variances = rng.uniform(0.2, 0.5, (8, *shape))
    toml = write_study(
        tmp_path / "study",
        effects,
        animals,
        variances=variances,
        shape=shape,
        toml_extra="\n[inference]\npermutations = 100\n",
    )
    out = run_study(toml, tmp_path / "out")
    summary = json.loads((out / "summary.json").read_text())
    warned = [w for w in summary["warnings"] if "smallest p" in w]
    assert len(warned) == 1
    assert "16 sign flips" in warned[0] and "0.125" in warned[0]
    text = json.dumps(summary)
    assert '"smallest_attainable_p": 0.125' in text


def test_lane_refit_equals_one_voxel_refit_and_reml_optimum():
    """The refit of many voxels side by side (intercept only) gives, bit for bit, the
    t of the one-voxel path, including voxels with missing animals and a last block that
    is not full. Outside reference: the REML optimum of τ² found by scipy's bounded
    scalar minimiser on the profiled REML log-likelihood of the random-effects model
    (Viechtbauer 2005, J Educ Behav Stat 30:261), and t = μ̂ / SE(μ̂) at it."""
    import numba
    from scipy.optimize import minimize_scalar

    from grouplevel.inference import _refit_kernel as kernel

    rng = np.random.default_rng(11)
    V, m = 2 * kernel.LANES + 13, 9
    mean = rng.normal(0.2, 1.0, (V, m)) + rng.normal(0, 0.7, (V, 1))
    prec = 1.0 / rng.uniform(0.1, 2.0, (V, m))
    prec[rng.random((V, m)) < 0.1] = 0.0  # animals without data at some voxels
    prec[5, :-1] = 0.0  # one animal left: no fit (NaN)
    mean[prec == 0.0] = np.nan
    sign = rng.choice([-1.0, 1.0], m)
    order = rng.permutation(m)
    nuisance, Z, X = np.zeros((V, 0)), np.zeros((m, 0)), np.ones((m, 1))
    tau2_start = rng.uniform(0.0, 1.0, V)
    sums = kernel.flip_invariant_sums(mean, prec)
    have = prec > 0
    np.testing.assert_array_equal(sums[:, 0], have.sum(1))
    np.testing.assert_allclose(sums[:, 1], np.where(have, prec, 0).sum(1), rtol=1e-13)
    np.testing.assert_allclose(sums[:, 2], np.where(have, prec**2, 0).sum(1), rtol=1e-13)
    inverse = np.where(have, 1 / np.where(have, prec, 1), 0).sum(1)
    np.testing.assert_allclose(sums[:, 3], inverse, rtol=1e-13)
    np.testing.assert_allclose(
        sums[:, 4], np.where(have, prec * np.nan_to_num(mean) ** 2, 0).sum(1), rtol=1e-13
    )
    np.testing.assert_array_equal(sums[:, 5], np.where(have, prec, 0).max(1))
    got = np.empty(V)
    args = (nuisance, Z, mean, prec, sign, order, X, tau2_start)
    kernel.refit_t_permuted(*args, sums, got, 50, 1e-8)
    computed_inside = np.empty(V)  # no sums passed: the kernel computes the same ones
    kernel.refit_t_permuted(*args, np.zeros((0, kernel.SUMS)), computed_inside, 50, 1e-8)
    np.testing.assert_array_equal(computed_inside, got)

    @numba.njit
    def _one_voxel_mean_refit(y, prec, y0, prec0, tau2, max_iter, tol):
        """The intercept-only refit of one voxel, written plainly (the reference of the
        side-by-side kernel): one pass of sums per iteration.

        ``y``, ``prec``: the permuted data; ``y0``, ``prec0``: the same animals in their
        own order, from which the sums that a permutation leaves alone are formed.
        Returns (t, τ²). The sums expand the residuals r = y − μ̂ around the GLS mean, so
        each iteration reads the animals once.
        """
        m = y.size
        n = 0
        vbar = 0.0
        s_p = 0.0
        s_pp = 0.0
        s_pyy = 0.0
        p_max = 0.0
        for a in range(m):
            if prec0[a] > 0.0:
                n += 1
                vbar += 1.0 / prec0[a]
                s_p += prec0[a]
                s_pp += prec0[a] * prec0[a]
                s_pyy += prec0[a] * y0[a] * y0[a]
                p_max = max(p_max, prec0[a])
        if n < 2:
            return np.nan, tau2, 3  # no fit
        vbar /= n
        s_py = 0.0
        for a in range(m):
            s_py += prec[a] * y[a] if prec[a] > 0.0 else 0.0
        # method-of-moments start (DerSimonian–Laird form), Σp(y − ȳ)² expanded
        denom = s_p - s_pp / s_p
        if denom > 0.0:
            tau2 = max((s_pyy - s_py * s_py / s_p - (n - 1)) / denom, 0.0)
        tau2 = max(tau2, 0.0)
        for _it in range(max_iter):
            sw = 0.0
            sw2 = 0.0
            sw3 = 0.0
            swy = 0.0
            sw2y = 0.0
            sw3y = 0.0
            sw2yy = 0.0
            sw3yy = 0.0
            for a in range(m):
                pa = prec[a]
                if pa <= 0.0:
                    continue
                w = pa / (1.0 + tau2 * pa)
                w2 = w * w
                w3 = w2 * w
                ya = y[a]
                sw += w
                sw2 += w2
                sw3 += w3
                swy += w * ya
                sw2y += w2 * ya
                sw3y += w3 * ya
                sw2yy += w2 * ya * ya
                sw3yy += w3 * ya * ya
            inv = 1.0 / sw  # (the quotients by Σw as the kernel forms them)
            mu = swy * inv
            quad = sw2yy - 2.0 * mu * sw2y + mu * mu * sw2  # Σ (w r)²
            cube = sw3yy - 2.0 * mu * sw3y + mu * mu * sw3  # Σ w³ r²
            w2r = sw2y - mu * sw2  # Σ w² r
            trace_p = sw - sw2 * inv
            trace_pp = sw2 - 2.0 * sw3 * inv + (sw2 * inv) ** 2
            score = 0.5 * (quad - trace_p)
            info = 0.5 * trace_pp
            observed = cube - w2r * w2r * inv - 0.5 * trace_pp
            expected = info
            newton = observed > info * 1e-3 and _it >= kernel.REFIT_FISHER_STEPS
            if newton:
                info = observed
            if info <= 0.0:
                return (swy / sw) * np.sqrt(sw), tau2, 2  # no step: the sums are at τ²
            new = tau2 + score / info
            if new < 0.0 and expected > 0.0:
                new = tau2 + score / expected  # Fisher scoring past the boundary (as above)
                newton = False
            if new < 0.0:
                new = 0.0
            d = new - tau2
            tau2 = new
            if abs(d) <= (np.sqrt(tol) if newton else tol) * (tau2 + vbar):
                # a Newton step stops within √tol (quadratic convergence); the sums at
                # τ² − d are carried to τ² by w(τ² + d) ≈ w − d w² + d² w³ when d is
                # short enough, else summed afresh below
                if abs(d) * p_max <= kernel.TAYLOR_LIMIT:
                    s0 = sw - d * sw2 + d * d * sw3
                    s1 = swy - d * sw2y + d * d * sw3y
                    return (s1 / s0) * np.sqrt(s0), tau2, 0
                break
        sw = 0.0
        swy = 0.0
        for a in range(m):
            pa = prec[a]
            if pa > 0.0:
                w = pa / (1.0 + tau2 * pa)
                sw += w
                swy += w * y[a]
        return (swy / sw) * np.sqrt(sw), tau2, 1

    @numba.njit
    def one_by_one(out, path, max_iter):
        y, pr = np.empty(m), np.empty(m)
        for v in range(V):
            for a in range(m):
                y[a] = sign[a] * mean[v, order[a]]
                pr[a] = prec[v, order[a]]
            t, _tau2, how = _one_voxel_mean_refit(
                y, pr, mean[v], prec[v], tau2_start[v], max_iter, 1e-8
            )
            out[v] = t
            path[v] = how

    want = np.empty(V)
    path = np.full(V, -1)
    one_by_one(want, path, 50)
    np.testing.assert_array_equal(got, want)
    # both ways of ending are taken here: t carried over the last step, and summed afresh
    # (a step too long for the expansion, or no convergence within max_iter)
    assert (path == 0).sum() > V // 2 and (path == 1).sum() >= 1
    few = np.empty(V)
    kernel.refit_t_permuted(*args, sums, few, 2, 1e-8)  # max_iter 2: many not converged
    one_by_one(want, path, 2)
    np.testing.assert_array_equal(few, want)
    assert (path == 1).sum() > 10
    assert np.isnan(got[5]) and np.isfinite(np.delete(got, 5)).all()

    for v in (0, 17, V - 1):
        have = prec[v, order] > 0
        y, var = (sign * mean[v, order])[have], 1.0 / prec[v, order][have]

        def neg_reml(t2, y=y, var=var):
            w = 1.0 / (t2 + var)
            mu = (w * y).sum() / w.sum()
            return 0.5 * (np.log(t2 + var).sum() + np.log(w.sum()) + (w * (y - mu) ** 2).sum())

        t2 = minimize_scalar(
            neg_reml, bounds=(0.0, 50.0), method="bounded", options={"xatol": 1e-10}
        ).x
        w = 1.0 / (t2 + var)
        t_ref = (w * y).sum() / w.sum() * np.sqrt(w.sum())
        assert got[v] == pytest.approx(t_ref, rel=1e-5)


def test_nuisance_fit_is_weighted_least_squares_chunk_by_chunk():
    """The Freedman–Lane nuisance coefficients of every voxel equal statsmodels WLS with
    the GLS weights of the animal means, w = precision / (1 + τ² precision) (a diagonal
    covariance, so GLS is WLS); fitted in chunks of 7 voxels they are the same numbers
    bit for bit as in one piece."""
    import statsmodels.api as sm

    rng = np.random.default_rng(3)
    n_vox, m = 40, 9
    mean = rng.standard_normal((n_vox, m))
    precision = rng.uniform(0.2, 3.0, (n_vox, m))
    var_animal = rng.uniform(0.0, 1.0, n_vox)
    Z = np.column_stack([np.ones(m), rng.standard_normal(m)])
    data = perm_mod.AnimalLevelData(
        mean=mean, precision=precision, design=np.ones((m, 1)), var_animal=var_animal
    )
    whole = perm_mod._nuisance_coefficients(data, Z, chunk=n_vox)
    assert np.array_equal(perm_mod._nuisance_coefficients(data, Z, chunk=7), whole)
    for v in (0, 17, 39):
        w = precision[v] / (1.0 + var_animal[v] * precision[v])
        ref = sm.WLS(mean[v], Z, weights=w).fit()
        np.testing.assert_allclose(whole[v], ref.params, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(Z @ whole[v], ref.fittedvalues, rtol=1e-10, atol=1e-12)
