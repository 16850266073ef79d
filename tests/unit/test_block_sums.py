"""The low-rank block sums and the compiled GLS evaluation of the mixed model.

Outside references, each named beside its check:
- the dense definitions of the REML score and information pieces (Harville 1977, JASA
  72:320): tr(Ã G_j), tr(Ã G_i Ã G_j), XᵀÃG_jÃX, tr(M⁻¹XᵀÃG_iÃG_jÃX), aᵀG_iÃG_ja,
  XᵀÃG_ja, aᵀG_ja, computed here with numpy on the dense component matrices;
- the textbook REML log-likelihood ℓ = −½[log|V| + log|XᵀV⁻¹X| + rᵀV⁻¹r + (n − p) log 2π]
  (Harville 1977) on the dense n × n covariance of the runs with data (numpy.linalg).
"""

from __future__ import annotations

import numpy as np
import pytest

import grouplevel.model.mixed as mm
from grouplevel.model.block_sums import block_sums, low_rank_components

RTOL = 1e-12  # the sums are rearrangements of the same products: rounding only


def _structure(rng, *, session, est_run, n_slopes=2, groups=True):
    """Unbalanced animals (2 to 7 runs), sessions of one run, two animal groups."""
    runs_per_animal = [7, 2, 5, 1, 4, 6]
    animal = np.repeat(np.arange(len(runs_per_animal)), runs_per_animal)
    n = animal.size
    # sessions: animal 0 has sessions of 3, 1 and 3 runs; others one or two sessions
    sess = []
    code = 0
    for k, w in enumerate(runs_per_animal):
        cuts = {0: [3, 1, 3], 2: [1, 4], 4: [2, 2], 5: [1, 1, 4]}.get(k, [w])
        for size in cuts:
            sess += [code] * size
            code += 1
    slopes = rng.normal(size=(n, n_slopes))
    slopes[animal == 3] = 0.0  # an animal with no slope variation: no slope block
    X = np.column_stack([np.ones(n), rng.normal(size=n), slopes[:, 0]])
    group = np.array([0, 1, 0, 1, 0, 1]) if groups else np.zeros(6, dtype=np.int64)
    names = ("a", "b") if groups else ()
    slope_names = tuple(f"s{j}" for j in range(n_slopes))
    st = mm._Structure(
        X,
        animal,
        slopes,
        slope_names,
        np.array(sess) if session else None,
        group,
        names,
        est_run,
    )
    return st, X, animal


def _random_blocks(rng, st, c):
    """SPD inverse blocks with zero rows and columns at missing runs and padding."""
    m, w, p = st.m, st.width, st.p
    pres = np.zeros((c, m, w))
    pres[:, st.animal, st.slot] = 1.0
    pres[rng.random(pres.shape) < 0.15] = 0.0  # missing runs at some voxels
    R = rng.normal(size=(c, m, w, w))
    A = R @ np.swapaxes(R, -1, -2) + w * np.eye(w)
    A *= pres[..., :, None] * pres[..., None, :]
    E = A @ st.X
    r = rng.normal(size=(c, m, w)) * pres
    a = (A @ r[..., None])[..., 0]
    S = rng.normal(size=(c, p, p))
    Minv = S @ np.swapaxes(S, 1, 2) + np.eye(p)
    return A, E, a, Minv


def _dense_sums(G, A, E, a, Minv):
    """The seven sums from their definitions, dense G (J, m, w, w)."""
    AG = np.einsum("cmrs,jmsu->cjmru", A, G)  # Ã G_j
    tr_ag = np.einsum("cjmrr->cj", AG)
    tr_bb = np.einsum("cimrs,cjmsr->cij", AG, AG)
    Q = np.einsum("cmrp,jmrs,cmsq->cjpq", E, G, E)
    GE = np.einsum("jmrs,cmsq->cjmrq", G, E)
    AGE = np.einsum("cmrs,cjmsq->cjmrq", A, GE)
    tr_mr = np.einsum("cimrp,cjmrq,cqp->cij", GE, AGE, Minv)
    Ga = np.einsum("jmrs,cms->cjmr", G, a)
    AGa = np.einsum("cmrs,cjms->cjmr", A, Ga)
    W1 = np.einsum("cimr,cjmr->cij", Ga, AGa)
    EGa = np.einsum("cmrp,cjmr->cjp", E, Ga)
    gaa = np.einsum("cjmr,cmr->cj", Ga, a)
    return tr_ag, tr_bb, Q, tr_mr, W1, EGa, gaa


@pytest.mark.parametrize(
    ("session", "est_run", "groups"),
    [(True, True, True), (True, False, True), (False, True, False), (False, False, True)],
)
def test_low_rank_sums_equal_dense_sums(session, est_run, groups):
    rng = np.random.default_rng(11)
    st, _, _ = _structure(rng, session=session, est_run=est_run, groups=groups)
    # the low-rank form rebuilds the dense component matrices exactly
    np.testing.assert_allclose(st.low_rank.dense(), st.G, rtol=0, atol=1e-15)
    A, E, a, Minv = _random_blocks(rng, st, 7)
    got = block_sums(A, E, a, Minv, st.low_rank)
    want = _dense_sums(st.G, A, E, a, Minv)
    names = ("tr_ag", "tr_bb", "Q", "tr_mr", "W1", "EGa", "gaa")
    for name, x, y in zip(names, got, want, strict=True):
        scale = np.max(np.abs(y))
        assert scale > 0, name
        np.testing.assert_allclose(x, y, rtol=RTOL, atol=RTOL * scale, err_msg=name)
    # a selection of voxels (repeats allowed) gives the same rows
    pick = np.array([4, 0, 4, 6])
    for x, y in zip(block_sums(A, E, a, Minv, st.low_rank, pick), got, strict=True):
        np.testing.assert_array_equal(x, y[pick])


def test_low_rank_sums_skip_animals_without_a_block():
    rng = np.random.default_rng(12)
    st, _, _ = _structure(rng, session=True, est_run=True)
    A, E, a, Minv = _random_blocks(rng, st, 3)
    # animal 3 has no slope variation: the slope components have no block there
    slope_j = [j for j, name in enumerate(st.names) if name.startswith("slope[s0]")]
    assert slope_j and not st.used[slope_j, 3].any()
    A2 = A.copy()
    A2[:, 3] *= 7.0  # changing that animal's block moves only the components it has
    tr_ag, *_ = block_sums(A2, E, a, Minv, st.low_rank)
    tr_ag0, *_ = block_sums(A, E, a, Minv, st.low_rank)
    np.testing.assert_allclose(tr_ag[:, slope_j], tr_ag0[:, slope_j], rtol=RTOL)


def _dense_reml(st, theta, y, s2, pres):
    """Textbook REML (Harville 1977) on the dense covariance of the runs with data."""
    m, w = st.m, st.width
    keep = pres.reshape(-1) > 0
    V = np.zeros((m * w, m * w))
    for k in range(m):  # block diagonal over animals
        blk = np.einsum("j,jrs->rs", theta, st.G[:, k])
        V[k * w : (k + 1) * w, k * w : (k + 1) * w] = blk
    V = V + np.diag(s2.reshape(-1))
    V, X, yv = V[np.ix_(keep, keep)], st.X_flat[keep], y.reshape(-1)[keep]
    Vi = np.linalg.inv(V)
    M = X.T @ Vi @ X
    beta = np.linalg.solve(M, X.T @ Vi @ yv)
    r = yv - X @ beta
    n, p = X.shape
    ll = -0.5 * (
        np.linalg.slogdet(V)[1] + np.linalg.slogdet(M)[1] + r @ Vi @ r + (n - p) * np.log(2 * np.pi)
    )
    return ll, beta, np.linalg.inv(M), Vi


def test_compiled_evaluation_equals_dense_reml():
    rng = np.random.default_rng(13)
    st, _, _ = _structure(rng, session=True, est_run=True)
    c = 4
    pres = np.zeros((c, st.m, st.width))
    pres[:, st.animal, st.slot] = 1.0
    pres[1, 0, [2, 5]] = 0.0  # missing runs, and a whole missing animal
    pres[2, 3] = 0.0
    y = rng.normal(size=pres.shape) * pres
    s2 = rng.uniform(0.1, 0.5, size=pres.shape) * pres
    phi = rng.normal(size=(c, st.J)) * 0.6
    ev = mm._evaluate(st, phi, y, s2, pres, pres.sum(axis=(1, 2)))
    for v in range(c):
        ll, beta, Minv, Vi = _dense_reml(st, ev["theta"][v], y[v], s2[v], pres[v])
        np.testing.assert_allclose(ev["ll"][v], ll, rtol=1e-12)
        np.testing.assert_allclose(ev["beta"][v], beta, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(ev["Minv"][v], Minv, rtol=1e-10, atol=1e-12)
        # the inverse blocks: V⁻¹ of the runs with data, zero elsewhere
        keep = pres[v].reshape(-1) > 0
        full = np.zeros((st.m * st.width,) * 2)
        for k in range(st.m):
            full[k * st.width : (k + 1) * st.width, k * st.width : (k + 1) * st.width] = ev["A"][
                v, k
            ]
        np.testing.assert_allclose(full[np.ix_(keep, keep)], Vi, rtol=1e-10, atol=1e-12)
        assert not full[~keep].any() and not full[:, ~keep].any()


def test_compiled_evaluation_flags_a_covariance_that_is_not_positive_definite():
    rng = np.random.default_rng(14)
    st, _, _ = _structure(rng, session=False, est_run=True, groups=False)
    pres = np.zeros((2, st.m, st.width))
    pres[:, st.animal, st.slot] = 1.0
    y = rng.normal(size=pres.shape) * pres
    s2 = np.zeros_like(y)
    s2[1, 0, 0] = -100.0  # a diagonal entry far below zero: V is indefinite
    phi = np.ones((2, st.J))
    ev = mm._evaluate(st, phi, y, s2, pres, pres.sum(axis=(1, 2)))
    assert np.isfinite(ev["ll"][0]) and ev["ll"][1] == -np.inf


def test_low_rank_components_refuse_entries_that_are_not_symmetric():
    basis = np.ones((2, 3, 2))
    used = np.ones((1, 2), dtype=bool)
    with pytest.raises(ValueError, match="not symmetric"):
        low_rank_components(basis, [[(0, 1, 1.0)]], [0.0], used)
    with pytest.raises(ValueError, match="outside the basis"):
        low_rank_components(basis, [[(0, 2, 1.0), (2, 0, 1.0)]], [0.0], used)
    comp = low_rank_components(basis, [[(0, 1, 2.0), (1, 0, 2.0)]], [1.0], used)
    np.testing.assert_allclose(comp.dense()[0, 0], 4.0 * np.ones((3, 3)) + np.eye(3))
