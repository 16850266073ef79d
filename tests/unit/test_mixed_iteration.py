"""The REML iteration of the mixed model stopped and continued, and its step halving.

Outside reference: the textbook REML log-likelihood (Harville 1977, JASA 72:320) maximised
with scipy.optimize (Nelder–Mead on the Cholesky factor and log-variances) for the
voxels that the iteration leaves to the second pass.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize

import grouplevel.model.mixed as mm


def _study(rng, n_vox):
    """8 animals × 2 sessions × 2 runs, condition crossed with session, random slope."""
    animal = np.repeat(np.arange(8), 4)
    session = np.repeat(np.arange(16), 2)
    cond = np.tile([-0.5, 0.5], 16)
    X = np.column_stack([np.ones(32), cond])
    u0 = rng.normal(size=(8, n_vox))
    u1 = rng.normal(size=(8, n_vox)) * rng.uniform(0.0, 1.0, n_vox)
    w = rng.normal(size=(16, n_vox)) * rng.uniform(0.0, 0.6, n_vox)
    y = u0[animal] + cond[:, None] * u1[animal] + w[session] + rng.normal(size=(32, n_vox))
    return y, X, animal, session, cond


def _chunk(st, y):
    idx = np.arange(y.shape[1])
    pres = mm._layout(st, np.isfinite(y), idx, 0.0)
    yc = mm._layout(st, y, idx, 0.0)
    s2 = np.zeros_like(yc)
    n_obs = pres.sum(axis=(1, 2))
    yc, s2, _, _, phi = mm._scale_and_start(st, yc, s2, pres, n_obs)
    return phi, yc, s2, pres, n_obs


def test_stopping_and_continuing_gives_the_one_pass_estimates():
    rng = np.random.default_rng(3)
    y, X, animal, session, cond = _study(rng, 200)
    st = mm._Structure(X, animal, cond[:, None], ("c",), session, np.zeros(8, int), (), True)
    phi0, *data = _chunk(st, y)
    phi_a, conv_a, its_a, left_a = mm._iterate(st, phi0.copy(), *data, 100, 1e-8)
    assert not left_a.any()
    phi_b, conv_b, its_b, left_b = mm._iterate(st, phi0.copy(), *data, 100, 1e-8, leave=20)
    assert 0 < left_b.sum() <= 20  # the slow voxels are handed back unfinished
    sel = np.nonzero(left_b)[0]
    phi_c, conv_c, its_c, left_c = mm._iterate(
        st, phi_b[sel], *(a[sel] for a in data), 100, 1e-8, n_iter=its_b[sel]
    )
    assert not left_c.any()
    phi_b[sel], conv_b[sel], its_b[sel] = phi_c, conv_c, its_c
    np.testing.assert_array_equal(its_b, its_a)
    np.testing.assert_array_equal(conv_b, conv_a)
    np.testing.assert_allclose(phi_b, phi_a, rtol=1e-12, atol=1e-14)


def test_iteration_budget_counts_the_first_pass():
    rng = np.random.default_rng(4)
    y, X, animal, session, cond = _study(rng, 40)
    st = mm._Structure(X, animal, cond[:, None], ("c",), session, np.zeros(8, int), (), True)
    phi0, *data = _chunk(st, y)
    its0 = np.full(40, 3)
    _, conv, its, left = mm._iterate(st, phi0.copy(), *data, 4, 1e-8, n_iter=its0)
    assert not left.any() and its.max() <= 4 and its.min() >= 3
    # voxels that already had their whole budget are not iterated again
    _, conv, its, _ = mm._iterate(st, phi0.copy(), *data, 4, 1e-8, n_iter=np.full(40, 4))
    assert (its == 4).all() and not conv.any()


def _dense_reml(params, y, X, animal, session, cond):
    """−REML log-likelihood (Harville 1977) of one voxel, dense, for scipy.optimize."""
    l11, l21, l22, log_w, log_s = params
    L = np.array([[l11, 0.0], [l21, l22]])
    T = L @ L.T
    Z = np.column_stack([np.ones_like(cond), cond])
    same_animal = animal[:, None] == animal[None, :]
    V = (Z @ T @ Z.T) * same_animal
    V = V + np.exp(log_w) * (session[:, None] == session[None, :]) + np.exp(log_s) * np.eye(32)
    Vi = np.linalg.inv(V)
    M = X.T @ Vi @ X
    b = np.linalg.solve(M, X.T @ Vi @ y)
    r = y - X @ b
    ll = -0.5 * (
        np.linalg.slogdet(V)[1] + np.linalg.slogdet(M)[1] + r @ Vi @ r + 30 * np.log(2 * np.pi)
    )
    return -ll


def test_fit_with_slow_voxels_reaches_the_dense_reml_maximum():
    """Slow voxels, continued in the second pass, converge to scipy's dense maximum."""
    rng = np.random.default_rng(5)
    y, X, animal, session, cond = _study(rng, 300)
    fit = mm.fit_mixed(y, None, X, animal, slopes=cond, session=session)
    # the slowest converged voxels: those finished in the second pass
    order = np.argsort(np.where(fit.converged, fit.n_iter, 0))[::-1][:3]
    assert (fit.n_iter[order] > 10).all()
    for v in order:
        best = np.inf
        for start in ([1.0, 0.0, 0.5, -1.0, 0.0], [0.5, 0.3, 0.1, -3.0, -0.5]):
            res = optimize.minimize(
                _dense_reml,
                start,
                args=(y[:, v], X, animal, session, cond),
                method="Nelder-Mead",
                options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20000, "maxfev": 20000},
            )
            best = min(best, res.fun)
        # ours at least as high as the dense optimum found by scipy (to 1e-6)
        assert fit.loglik[v] >= -best - 1e-6


def test_pseudo_inverse_of_the_information_equals_numpy_pinv():
    """numpy.linalg.pinv (hermitian) on well-conditioned, singular and non-finite stacks."""
    rng = np.random.default_rng(6)
    R = rng.normal(size=(60, 5, 5))
    A = R @ np.swapaxes(R, 1, 2) + 0.1 * np.eye(5)
    A[:20, :, 0] = A[:20, 0, :] = 0.0  # a component on the boundary: singular
    A[20, 1, 1] = np.nan
    got = mm._pinv_stack(A)
    assert np.isnan(got[20]).all()
    keep = np.arange(60) != 20
    want = np.linalg.pinv(A[keep], hermitian=True)
    scale = np.abs(want).max(axis=(1, 2), keepdims=True)
    np.testing.assert_allclose(got[keep] / scale, want / scale, rtol=0, atol=1e-10)
