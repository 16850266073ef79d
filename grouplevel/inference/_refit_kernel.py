"""Compiled kernel: REML refit of the animal-level model at every voxel.

For one voxel, animal a contributes its precision-weighted mean ``ybar_a`` with
sampling precision ``prec_a`` (the sum of its runs' weights ``1/(σ² + s_k²)``; 0 when
the animal has no data there). With σ² held fixed, the run-within-animal REML model for
an animal-level design reduces exactly to

    ybar_a = x_aᵀβ + u_a + ē_a,   Var = τ² + 1/prec_a,

whose REML estimate of τ² is found here by Newton steps (Fisher scoring where the
observed information is not positive), clamped at τ² ≥ 0, followed by
the GLS estimate of β and the t statistic of its first coefficient. The loop over
voxels is compiled (numba) because each voxel iterates to its own convergence.
"""

from __future__ import annotations

import numpy as np

from grouplevel.compiled import lazy_njit

# Limits of the one-parameter REML refit: the start is the method-of-moments estimate
# of the permuted data, so a few iterations suffice; tolerance relative to τ² + mean
# sampling variance (our own choice, far below the precision that a t statistic needs).
# A scoring step stops the iteration when it changes τ² by at most ``tol`` of that
# scale; a Newton step when it changes τ² by at most ``√tol``: Newton converges
# quadratically near the optimum (error after a step ≈ c · step², c of order 1), so the
# τ² it leaves is within about ``tol`` of the optimum without the step that would show
# it (checked against refits to 1e-13 on the permutation benchmark's data: τ² within
# 2.2e-8 of the scale, t within 5e-8).
REFIT_MAX_ITER = 50
REFIT_TOL = 1e-8
# The first iteration is a Fisher-scoring step, Newton steps after (common practice for
# REML: scoring is robust far from the optimum, Newton fast near it). From a start far
# below the optimum with tiny sampling variances (e.g. a moment estimate of 0, one run
# per animal) Newton alone creeps up at the scale of those variances.
REFIT_FISHER_STEPS = 1


@lazy_njit(cache=True, nogil=True)
def _solve_spd(C: np.ndarray, Cinv: np.ndarray, p: int, A: np.ndarray) -> bool:
    """Invert a small symmetric positive definite matrix by Gauss–Jordan; False if singular.

    ``A`` is a (p, 2p) workspace.
    """
    if p == 1:
        if C[0, 0] <= 1e-300:
            return False
        Cinv[0, 0] = 1.0 / C[0, 0]
        return True
    for i in range(p):
        for j in range(p):
            A[i, j] = C[i, j]
            A[i, p + j] = 1.0 if i == j else 0.0
    for col in range(p):
        piv = col
        best = abs(A[col, col])
        for r in range(col + 1, p):
            if abs(A[r, col]) > best:
                best = abs(A[r, col])
                piv = r
        if best <= 1e-300:
            return False
        if piv != col:
            for j in range(2 * p):
                tmp = A[col, j]
                A[col, j] = A[piv, j]
                A[piv, j] = tmp
        d = A[col, col]
        for j in range(2 * p):
            A[col, j] /= d
        for r in range(p):
            if r != col:
                f = A[r, col]
                if f != 0.0:
                    for j in range(2 * p):
                        A[r, j] -= f * A[col, j]
    for i in range(p):
        for j in range(p):
            Cinv[i, j] = A[i, p + j]
    return True


@lazy_njit(cache=True, nogil=True)
def _moment_start(y, prec, X, tau2):
    """Method-of-moments start for τ² in the intercept-only case (DerSimonian & Laird
    1986, Control Clin Trials 7:177); other designs start from the given τ²."""
    m, p = X.shape
    if p != 1:
        return tau2
    sw = 0.0
    sw2 = 0.0
    swy = 0.0
    n = 0
    for a in range(m):
        if prec[a] > 0.0:
            w = prec[a] * X[a, 0] * X[a, 0]
            sw += w
            sw2 += w * w
            swy += prec[a] * X[a, 0] * y[a]
            n += 1
    if sw <= 0.0:
        return tau2
    mu = swy / sw
    q = 0.0
    for a in range(m):
        if prec[a] > 0.0:
            r = y[a] - X[a, 0] * mu
            q += prec[a] * r * r
    denom = sw - sw2 / sw
    if denom <= 0.0:
        return tau2
    est = (q - (n - 1)) / denom
    return est if est > 0.0 else 0.0


@lazy_njit(cache=True, nogil=True)
def _refit_voxel(y, prec, X, tau2, max_iter, tol, C, Cinv, G2, G3, beta, rhs, A, wk):
    m, p = X.shape
    n_present = 0
    vbar = 0.0
    for a in range(m):
        if prec[a] > 0.0:
            n_present += 1
            vbar += 1.0 / prec[a]
    if n_present <= p:
        return np.nan, tau2
    vbar /= n_present
    newton_tol = np.sqrt(tol)  # see REFIT_TOL
    tau2 = _moment_start(y, prec, X, tau2)
    for _it in range(max_iter):
        for a in range(m):
            wk[a] = prec[a] / (1.0 + tau2 * prec[a]) if prec[a] > 0.0 else 0.0
        for i in range(p):
            rhs[i] = 0.0
            for j in range(p):
                C[i, j] = 0.0
                G2[i, j] = 0.0
                G3[i, j] = 0.0
        sum_w = 0.0
        sum_w2 = 0.0
        for a in range(m):
            w = wk[a]
            if w <= 0.0:
                continue
            sum_w += w
            sum_w2 += w * w
            for i in range(p):
                rhs[i] += w * X[a, i] * y[a]
                for j in range(p):
                    xx = X[a, i] * X[a, j]
                    C[i, j] += w * xx
                    G2[i, j] += w * w * xx
                    G3[i, j] += w * w * w * xx
        if not _solve_spd(C, Cinv, p, A):
            return np.nan, tau2
        for i in range(p):
            beta[i] = 0.0
            for j in range(p):
                beta[i] += Cinv[i, j] * rhs[j]
        # score, expected and observed information of the REML log-likelihood in τ²
        # (Py = Ωr; observed information = yᵀP³y − ½ tr(P²))
        quad = 0.0
        q_p_q = 0.0
        for i in range(p):
            rhs[i] = 0.0  # reused: Xᵀ Ω q with q = Ω r
        for a in range(m):
            w = wk[a]
            if w <= 0.0:
                continue
            r = y[a]
            for i in range(p):
                r -= X[a, i] * beta[i]
            q = w * r
            quad += q * q
            q_p_q += w * q * q
            for i in range(p):
                rhs[i] += X[a, i] * w * q
        for i in range(p):
            for j in range(p):
                q_p_q -= rhs[i] * Cinv[i, j] * rhs[j]
        tr_c_g2 = 0.0
        tr_c_g3 = 0.0
        tr_cg2_sq = 0.0
        for i in range(p):
            for j in range(p):
                tr_c_g2 += Cinv[i, j] * G2[j, i]
                tr_c_g3 += Cinv[i, j] * G3[j, i]
        for i in range(p):
            for j in range(p):
                # (C⁻¹G2)_{ij} (C⁻¹G2)_{ji}
                aij = 0.0
                aji = 0.0
                for k in range(p):
                    aij += Cinv[i, k] * G2[k, j]
                    aji += Cinv[j, k] * G2[k, i]
                tr_cg2_sq += aij * aji
        trace_p = sum_w - tr_c_g2
        trace_pp = sum_w2 - 2.0 * tr_c_g3 + tr_cg2_sq
        score = 0.5 * (quad - trace_p)
        info = 0.5 * trace_pp
        observed = q_p_q - 0.5 * trace_pp
        expected = info
        newton = observed > info * 1e-3 and _it >= REFIT_FISHER_STEPS
        if newton:
            info = observed  # Newton where the likelihood is locally concave
        if info <= 0.0:
            break
        step = score / info
        new = tau2 + step
        if new < 0.0 and expected > 0.0:
            # a Newton step past the boundary: take the Fisher-scoring step instead
            # (clamping at 0 would leave τ² to creep back at the scale of the sampling
            # variances, which takes far more iterations than allowed when those are tiny)
            new = tau2 + score / expected
            newton = False
        if new < 0.0:
            new = 0.0
        change = abs(new - tau2)
        tau2 = new
        if change <= (newton_tol if newton else tol) * (tau2 + vbar):
            break  # a Newton step within √tol: see REFIT_TOL
    # final GLS at the converged τ²
    for i in range(p):
        rhs[i] = 0.0
        for j in range(p):
            C[i, j] = 0.0
    for a in range(m):
        if prec[a] <= 0.0:
            continue
        w = prec[a] / (1.0 + tau2 * prec[a])
        for i in range(p):
            rhs[i] += w * X[a, i] * y[a]
            for j in range(p):
                C[i, j] += w * X[a, i] * X[a, j]
    if not _solve_spd(C, Cinv, p, A):
        return np.nan, tau2
    b0 = 0.0
    for j in range(p):
        b0 += Cinv[0, j] * rhs[j]
    if Cinv[0, 0] <= 0.0:
        return np.nan, tau2
    return b0 / np.sqrt(Cinv[0, 0]), tau2


#: Voxels refitted side by side by :func:`_refit_mean_lanes`: the sums over animals run
#: over this many voxels at once, which the compiler turns into vector instructions
#: (32 rather than 64: a block iterates until its slowest voxel has converged, and
#: fewer voxels per block wait less for it; 6 % less time on the permutation
#: benchmark's box data).
LANES = 32


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _lane_sums(P, Y, tau, acc, m, nl):
    """The eight weighted sums of one Newton step for ``nl`` lanes (see below).

    ``P`` and ``Y`` hold animal ``a`` of lane ``k`` at ``a * LANES + k``; ``acc`` holds sum
    ``j`` of lane ``k`` at ``j * LANES + k``. One written array and lanes innermost: the
    loop compiles to vector instructions. Animals with no data have weight 0.
    """
    L = LANES
    for j in range(8 * L):
        acc[j] = 0.0
    for a in range(m):
        base = a * L
        for k in range(nl):
            pa = P[base + k]
            w = pa / (1.0 + tau[k] * pa)
            w2 = w * w
            w3 = w2 * w
            ya = Y[base + k]
            acc[k] += w
            acc[L + k] += w2
            acc[2 * L + k] += w3
            acc[3 * L + k] += w * ya
            acc[4 * L + k] += w2 * ya
            acc[5 * L + k] += w3 * ya
            acc[6 * L + k] += w2 * ya * ya
            acc[7 * L + k] += w3 * ya * ya


#: Largest |δ| · max precision for which a lane's t is taken from the sums of its last
#: pass (at τ² − δ) carried to its final τ² by the second-order expansion of
#: w(τ² + δ) = w / (1 + δ w) = w (1 − δ w + δ² w² − …): each term of the sums then
#: misses at most (δ w)³ / (1 − δ w) ≤ 1.001e-9 of itself, since w ≤ precision (our own
#: choice, below the convergence tolerance's effect on t). A lane past it is summed
#: again at its final τ² (on the permutation benchmark's data: about 0.1 % of voxels).
TAYLOR_LIMIT = 1e-3


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _lane_steps(acc, tau, vbar, active, nl, it, tol, carried):
    """One Newton (or Fisher-scoring) step of τ² in every active lane, from the sums.

    From the sums: score ½(Σ(wr)² − tr P), expected information ½ tr P², observed
    Σw³r² − (Σw²r)²/Σw − ½ tr P² (Newton after ``REFIT_FISHER_STEPS`` scoring steps
    where it is positive; a Newton step past 0 is replaced by the scoring step, then
    clamped at 0). A lane stops when its step is within ``tol`` (scoring) or ``√tol``
    (Newton) of τ² + mean sampling variance (see ``REFIT_TOL``); Σw and Σwy at its
    final τ², from this pass's sums carried over the last step δ (see
    ``TAYLOR_LIMIT``), and |δ| then go to ``carried`` (lane ``k`` at ``k``,
    ``LANES + k`` and ``2 * LANES + k``). Written with selections instead of branches
    so that the lanes compile to vector instructions; inactive lanes keep their τ² and
    what they carried.
    """
    L = LANES
    newton_tol = np.sqrt(tol)  # see REFIT_TOL
    for k in range(nl):
        sw = acc[k]
        sw2 = acc[L + k]
        sw3 = acc[2 * L + k]
        swy = acc[3 * L + k]
        sw2y = acc[4 * L + k]
        t = tau[k]
        inv = 1.0 / sw  # one division for the five quotients by Σw
        mu = swy * inv
        quad = acc[6 * L + k] - 2.0 * mu * sw2y + mu * mu * sw2
        cube = acc[7 * L + k] - 2.0 * mu * acc[5 * L + k] + mu * mu * sw3
        w2r = sw2y - mu * sw2
        ratio = sw2 * inv
        trace_p = sw - ratio
        trace_pp = sw2 - 2.0 * sw3 * inv + ratio * ratio
        score = 0.5 * (quad - trace_p)
        expected = 0.5 * trace_pp
        observed = cube - w2r * w2r * inv - 0.5 * trace_pp
        newton = observed > expected * 1e-3 and it >= REFIT_FISHER_STEPS
        info = observed if newton else expected
        new = t + score / info
        past = new < 0.0 and expected > 0.0
        new = t + score / expected if past else new
        new = 0.0 if new < 0.0 else new
        moving = active[k] and info > 0.0
        final = new if moving else t
        tau[k] = final
        limit = newton_tol if (newton and not past) else tol
        going_on = moving and abs(new - t) > limit * (new + vbar[k])
        stopping = active[k] and not going_on
        # Σw and Σwy at the final τ² = t + d from the sums at t: w(t + d) = w − d w² + d² w³ − …
        d = final - t
        s0 = sw - d * sw2 + d * d * sw3
        s1 = swy - d * sw2y + d * d * acc[5 * L + k]
        carried[k] = s0 if stopping else carried[k]
        carried[L + k] = s1 if stopping else carried[L + k]
        carried[2 * L + k] = abs(d) if stopping else carried[2 * L + k]
        active[k] = going_on


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _lane_load(mean, prec, sign, order, v0, nl, m, Y, P):
    """Copy the permuted animal values and precisions of voxels ``v0 .. v0 + nl - 1``
    side by side (animal ``a`` of lane ``k`` at ``a * LANES + k``); 0 and 0 where an
    animal has no data."""
    L = LANES
    for k in range(nl):
        v = v0 + k
        for a in range(m):
            oa = order[a]
            pa = prec[v, oa]
            present = pa > 0.0
            value = sign[a] * mean[v, oa]
            Y[a * L + k] = value if present else 0.0
            P[a * L + k] = pa if present else 0.0


#: Columns of :func:`flip_invariant_sums`.
SUMS = 6


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def flip_invariant_sums(mean, prec):
    """The sums of an intercept-only refit that no permutation changes, per voxel.

    Over the animals with data (precision > 0) at voxel ``v``, ``out[v]`` holds their
    number, Σp, Σp², Σ1/p, Σp·y² (y the animal mean) and the largest p. A sign flip
    leaves y² as it is and a reordering of the animals only reorders the terms, so these
    are computed once for all permutations, not once per permutation.
    """
    V, m = mean.shape
    out = np.zeros((V, SUMS))
    for v in range(V):
        n = 0.0
        sw = 0.0
        sw2 = 0.0
        inv = 0.0
        syy = 0.0
        top = 0.0
        for a in range(m):
            pa = prec[v, a]
            if pa > 0.0:
                ya = mean[v, a]
                n += 1.0
                sw += pa
                sw2 += pa * pa
                inv += 1.0 / pa
                syy += pa * ya * ya
                top = max(top, pa)
        out[v, 0] = n
        out[v, 1] = sw
        out[v, 2] = sw2
        out[v, 3] = inv
        out[v, 4] = syy
        out[v, 5] = top
    return out


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _permuted_voxel(nuisance, Z, mean, prec, sign, order, v, y, pr, fit):
    """The permuted animal-level data of voxel ``v`` into ``y`` and ``pr``:
    ``fit[a] + sign[a] * (mean[v, order[a]] − fit[order[a]])`` with the nuisance fit
    ``fit = Z γ_v`` (``γ_v = nuisance[v]``; no columns: no nuisance, fit = 0) and
    precision ``prec[v, order[a]]`` (Freedman–Lane).

    The fitted values and residuals are formed here for one voxel at a time, so that no
    (voxels, animals) array of them is held beside the means."""
    m = y.size
    q = Z.shape[1]
    for a in range(m):
        f = 0.0
        for j in range(q):
            f += nuisance[v, j] * Z[a, j]
        fit[a] = f
    for a in range(m):  # q = 0: fit is 0.0, so y is sign · mean exactly
        oa = order[a]
        y[a] = fit[a] + sign[a] * (mean[v, oa] - fit[oa])
        pr[a] = prec[v, oa]


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _lane_start(P, Y, m, swy, sums, tau2_start, v0, nl, tau, vbar, live, active, pmax):
    """Per lane: live or not, mean sampling variance and the start of τ².

    The start is the method-of-moments estimate of :func:`_moment_start` (its fallback
    to ``tau2_start`` included), from the permutation's ``Σ p y`` (summed here into
    ``swy``, lanes innermost) and the voxel's :func:`flip_invariant_sums`; the weighted
    sum of squares about the mean is expanded as Σp·y² − (Σp y)²/Σp (only the start
    depends on it: the iterations that follow converge to the same τ²). A lane with
    fewer than two animals is not live. ``pmax`` gets each lane's largest precision.
    """
    L = LANES
    for k in range(nl):
        swy[k] = 0.0
    for a in range(m):  # absent animals hold p = 0 and y = 0: they add 0
        base = a * L
        for k in range(nl):
            swy[k] += P[base + k] * Y[base + k]
    for k in range(nl):
        v = v0 + k
        n = sums[v, 0]
        sw = sums[v, 1]
        sw2 = sums[v, 2]
        q = sums[v, 4] - swy[k] * swy[k] / sw
        denom = sw - sw2 / sw
        est = (q - (n - 1.0)) / denom
        est = est if est > 0.0 else 0.0
        start = tau2_start[v] if (sw <= 0.0 or denom <= 0.0) else est
        ok = n >= 2.0
        live[k] = ok
        active[k] = ok
        tau[k] = start if (ok and start > 0.0) else 0.0
        vbar[k] = sums[v, 3] / n if ok else 0.0
        pmax[k] = sums[v, 5]


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _lane_t(P, Y, tau, live, nl, m, exact, work):
    """t = μ̂ / SE(μ̂) of each lane at its τ², summed afresh, into ``exact``; NaN where the
    lane is not live."""
    L = LANES
    s0 = work[0:L]
    s1 = work[L : 2 * L]
    for k in range(nl):
        s0[k] = 0.0
        s1[k] = 0.0
    for a in range(m):
        base = a * L
        for k in range(nl):
            pa = P[base + k]
            w = pa / (1.0 + tau[k] * pa)
            s0[k] += w if pa > 0.0 else 0.0
            s1[k] += w * Y[base + k] if pa > 0.0 else 0.0
    for k in range(nl):
        exact[k] = (s1[k] / s0[k]) * np.sqrt(s0[k]) if live[k] else np.nan


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _refit_mean_lanes(mean, prec, sign, order, tau2_start, sums, out_t, max_iter, tol):
    """Intercept-only refit (p = 1, x = 1) of every voxel, ``LANES`` voxels side by side.

    Per voxel: τ² starts from the moment estimate (:func:`_lane_start`, from the
    permutation's Σ p y and the voxel's :func:`flip_invariant_sums` ``sums``), then each
    iteration takes one pass of eight weighted sums over the animals
    (:func:`_lane_sums`; the residuals r = y − μ̂ are expanded around the GLS mean) and
    one Newton or Fisher-scoring step (:func:`_lane_steps`, the same rules as
    :func:`_refit_voxel`); t = μ̂ / SE(μ̂) at the converged τ², from the sums of the
    lane's last pass carried over its last step (``TAYLOR_LIMIT``; else summed afresh by
    :func:`_lane_t`). A lane that has converged keeps its τ² and its t while the others
    go on, so each voxel's result does not depend on its neighbours in the block: the
    animals' values of ``LANES`` voxels are only copied side by side so that every sum
    runs over the lanes innermost (vector instructions), and every per-lane step is
    written with selections rather than branches for the same reason.
    """
    V, m = mean.shape
    L = LANES
    Y = np.zeros(m * L)
    P = np.zeros(m * L)
    acc = np.zeros(8 * L)
    work = np.zeros(2 * L)
    swy = np.zeros(L)
    tau = np.zeros(L)
    vbar = np.zeros(L)
    live = np.zeros(L, dtype=np.bool_)
    active = np.zeros(L, dtype=np.bool_)
    pmax = np.zeros(L)
    carried = np.zeros(3 * L)
    exact = np.zeros(L)
    fresh = np.zeros(L, dtype=np.bool_)
    for v0 in range(0, V, L):
        nl = min(L, V - v0)
        _lane_load(mean, prec, sign, order, v0, nl, m, Y, P)
        _lane_start(P, Y, m, swy, sums, tau2_start, v0, nl, tau, vbar, live, active, pmax)
        for it in range(max_iter):
            n_active = 0
            for k in range(nl):
                n_active += active[k]
            if n_active == 0:
                break
            _lane_sums(P, Y, tau, acc, m, nl)
            _lane_steps(acc, tau, vbar, active, nl, it, tol, carried)
        # lanes that reached max_iter, or whose last step was too long to carry the
        # sums over (TAYLOR_LIMIT), are summed afresh at their final τ²
        again = 0
        for k in range(nl):
            fresh[k] = live[k] and (active[k] or carried[2 * L + k] * pmax[k] > TAYLOR_LIMIT)
            again += fresh[k]
        if again:
            _lane_t(P, Y, tau, live, nl, m, exact, work)
        for k in range(nl):
            s0 = carried[k]
            value = exact[k] if fresh[k] else (carried[L + k] / s0) * np.sqrt(s0)
            out_t[v0 + k] = value if live[k] else np.nan


@lazy_njit(cache=True, nogil=True)
def intercept_only(X, Z):
    """True when the design is the column of ones alone and there is no nuisance: the
    refit then takes the side-by-side path (:func:`_refit_mean_lanes`)."""
    if X.shape[1] != 1 or Z.shape[1] != 0:
        return False
    for a in range(X.shape[0]):
        if X[a, 0] != 1.0:
            return False
    return True


@lazy_njit(cache=True, nogil=True)
def refit_t_permuted(
    nuisance, Z, mean, prec, sign, order, X, tau2_start, sums, out_t, max_iter, tol
):
    """t of the first coefficient after one permutation, at every voxel.

    The permuted animal-level data are ``fit[a] + sign[a] * r[order[a]]`` with the
    nuisance fit ``fit = Z nuisance[v]`` of each voxel (Freedman–Lane; ``nuisance`` is
    (V, q) coefficients on the (m, q) nuisance columns ``Z``, q = 0 without nuisance),
    the residuals ``r = mean[v] − fit`` and precision ``prec[v, order[a]]``
    (:func:`_permuted_voxel`). Intercept-only designs take the side-by-side path
    (:func:`_refit_mean_lanes`), which reads :func:`flip_invariant_sums` of ``mean`` and
    ``prec`` from ``sums`` (computed here when ``sums`` has not one row per voxel: pass
    them to reuse them across permutations).
    """
    V, m = mean.shape
    p = X.shape[1]
    y = np.empty(m)
    pr = np.empty(m)
    fit = np.empty(m)
    C = np.empty((p, p))
    Cinv = np.empty((p, p))
    G2 = np.empty((p, p))
    G3 = np.empty((p, p))
    beta = np.empty(p)
    rhs = np.empty(p)
    A = np.empty((p, 2 * p))
    wk = np.empty(m)
    if intercept_only(X, Z):
        if sums.shape[0] != V:
            sums = flip_invariant_sums(mean, prec)
        _refit_mean_lanes(mean, prec, sign, order, tau2_start, sums, out_t, max_iter, tol)
        return
    for v in range(V):
        _permuted_voxel(nuisance, Z, mean, prec, sign, order, v, y, pr, fit)
        t, _tau2 = _refit_voxel(
            y, pr, X, tau2_start[v], max_iter, tol, C, Cinv, G2, G3, beta, rhs, A, wk
        )
        out_t[v] = t


@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _z_from_table(t, u, tables, df_row, du):
    """Equal-p z of every t in place, from a table of z over u = asinh(|t|) on a uniform
    grid of step du (``u`` holds asinh(|t|)); row ``df_row[v]`` for voxel v. A NaN t (an
    unfittable voxel) gives z = 0."""
    n = tables.shape[1]
    for v in range(t.size):
        x = u[v] / du
        finite = np.isfinite(x)
        x = x if finite else 0.0
        i = int(x) if x < n - 1 else n - 1
        row = df_row[v]
        if i >= n - 1:
            z = tables[row, n - 1]
        else:
            f = x - i
            z = tables[row, i] * (1.0 - f) + tables[row, i + 1] * f
        z = z if t[v] >= 0.0 else -z
        t[v] = z if finite else 0.0


def refit_z_permuted(
    nuisance, Z, mean, prec, sign, order, X, tau2_start, sums, tables, df_row, du, out_z,
    max_iter, tol,
):  # fmt: skip
    """As :func:`refit_t_permuted`, then t → z (equal p) by table.

    ``tables[df_row[v]]`` holds z over the uniform grid u = asinh(|t|) = 0, du, 2 du, …
    for voxel v's degrees of freedom. NaN t (unfittable voxel) gives z = 0. The asinh runs
    as one numpy call (vector instructions), the table lookup compiled.
    """
    refit_t_permuted(
        nuisance, Z, mean, prec, sign, order, X, tau2_start, sums, out_z, max_iter, tol
    )
    u = np.abs(out_z)
    np.arcsinh(u, out=u)
    _z_from_table(out_z, u, tables, df_row, du)


@lazy_njit(cache=True, nogil=True)
def refit_f_permuted(
    nuisance, Z, mean, prec, sign, order, X, n_interest, tau2_start, out_f, max_iter, tol
):
    """Wald F of the first ``n_interest`` coefficients after one permutation, every voxel.

    The permuted data are built as in :func:`refit_t_permuted`; τ² is refitted by REML
    (:func:`_refit_voxel`), and at the converged τ² the GLS β and ``Φ = (XᵀWX)⁻¹`` give
    ``F = β_Iᵀ (Φ_II)⁻¹ β_I / q`` for the block I of the first q columns. NaN where the
    voxel cannot be fitted.
    """
    V, m = mean.shape
    p = X.shape[1]
    q = n_interest
    y = np.empty(m)
    pr = np.empty(m)
    fit = np.empty(m)
    C = np.empty((p, p))
    Cinv = np.empty((p, p))
    G2 = np.empty((p, p))
    G3 = np.empty((p, p))
    beta = np.empty(p)
    rhs = np.empty(p)
    A = np.empty((p, 2 * p))
    wk = np.empty(m)
    block = np.empty((q, q))
    block_inv = np.empty((q, q))
    Aq = np.empty((q, 2 * q))
    for v in range(V):
        _permuted_voxel(nuisance, Z, mean, prec, sign, order, v, y, pr, fit)
        t, _tau2 = _refit_voxel(
            y, pr, X, tau2_start[v], max_iter, tol, C, Cinv, G2, G3, beta, rhs, A, wk
        )
        if not np.isfinite(t):
            out_f[v] = np.nan
            continue
        # _refit_voxel leaves the final GLS in its workspaces: Cinv = (XᵀWX)⁻¹ and
        # rhs = XᵀWy at the converged τ²
        for i in range(p):
            beta[i] = 0.0
            for j in range(p):
                beta[i] += Cinv[i, j] * rhs[j]
        for i in range(q):
            for j in range(q):
                block[i, j] = Cinv[i, j]
        if not _solve_spd(block, block_inv, q, Aq):
            out_f[v] = np.nan
            continue
        f = 0.0
        for i in range(q):
            for j in range(q):
                f += beta[i] * block_inv[i, j] * beta[j]
        out_f[v] = f / q
