"""Per-animal sums of the REML score and information from low-rank component matrices.

Every component matrix of the mixed model (:mod:`grouplevel.model.mixed`) is, within one
animal's block, a short sum of outer products of a few fixed columns plus a multiple
of the identity:

    G_j = Σ_e c_e b_α(e) b_β(e)ᵀ + d_j I,

with the columns ``b`` of the animal's *basis*: the random-effect regressors ``z``
(intercept and slopes; ``T[a, b]`` contributes ``z_a z_bᵀ + z_b z_aᵀ``) and one
indicator column per session (the session variance contributes ``Σ_s 1_s 1_sᵀ``); the
run variance is the identity. With ``Ã`` the animal's inverse covariance block, ``E =
ÃX`` and ``a = Ã r`` (= P y), every trace of a product of ``Ã`` and two ``G``
reduces to the small matrices ``W = BᵀÃB``, ``BᵀÃÃB``, ``BᵀE``, ``BᵀÃE``, ``Bᵀa`` and
``BᵀÃa`` of the basis ``B`` (w × K), e.g. for two entries ``(α, β)`` and ``(γ, δ)``

    tr(Ã b_α b_βᵀ Ã b_γ b_δᵀ) = W[β, γ] W[δ, α],

so an animal with ``w`` runs costs ``O(w² K)`` instead of the ``O(J w³)`` of dense
products per component. The sums are exact rearrangements of the dense ones (equal up
to rounding).

References
----------
Harville, D. A. (1977). Maximum likelihood approaches to variance component estimation
and to related problems. Journal of the American Statistical Association 72:320–338.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from grouplevel.compiled import lazy_njit


@dataclass(frozen=True)
class LowRankComponents:
    """The component matrices of the animal blocks as basis columns and entries.

    Build it with :func:`low_rank_components`.

    Attributes
    ----------
    basis : ndarray, shape (m, w, K)
        Basis columns of each animal's block (zero rows in the padding).
    starts : ndarray of int, shape (J + 1,)
        Entries of component ``j`` are ``starts[j]:starts[j + 1]`` of the arrays below.
    rows, cols : ndarray of int, shape (n_entries,)
        Basis columns ``α`` and ``β`` of each entry.
    coefs : ndarray, shape (n_entries,)
        Coefficient ``c`` of each entry (``G_j`` gets ``c b_α b_βᵀ``).
    identity : ndarray, shape (J,)
        Multiple of the identity in each component.
    used : ndarray of bool, shape (J, m)
        Whether component ``j`` has a (non-zero) block in animal ``k``.
    pairs : ndarray of int, shape (n_terms, 6)
        Every product of an entry of ``G_i`` and an entry of ``G_j`` (i ≥ j) that the
        sums over pairs of components need: ``(i, j, α, β, γ, δ)``.
    pair_coefs : ndarray, shape (n_terms,)
        The product of the two entries' coefficients.
    """

    basis: np.ndarray
    starts: np.ndarray
    rows: np.ndarray
    cols: np.ndarray
    coefs: np.ndarray
    identity: np.ndarray
    used: np.ndarray
    pairs: np.ndarray
    pair_coefs: np.ndarray

    @property
    def n_components(self) -> int:
        return self.identity.shape[0]

    def dense(self) -> np.ndarray:
        """The component matrices as dense blocks, shape (J, m, w, w) (for checks)."""
        m, w, _ = self.basis.shape
        J = self.n_components
        out = np.zeros((J, m, w, w))
        for j in range(J):  # loop over components and entries, not voxels
            for e in range(self.starts[j], self.starts[j + 1]):
                b1 = self.basis[:, :, self.rows[e]]
                b2 = self.basis[:, :, self.cols[e]]
                out[j] += self.coefs[e] * b1[:, :, None] * b2[:, None, :]
            out[j] += self.identity[j] * np.eye(w)
        return out * self.used[:, :, None, None]


def low_rank_components(
    basis: np.ndarray,
    entries: list[list[tuple[int, int, float]]],
    identity,
    used: np.ndarray,
) -> LowRankComponents:
    """Component matrices ``G_j = Σ_e c_e b_α b_βᵀ + identity[j] I`` per animal block.

    Parameters
    ----------
    basis : ndarray, shape (m, w, K)
        Basis columns of each animal's block.
    entries : list of J lists of (α, β, c)
        The entries of each component; each component's entries must describe a
        symmetric matrix (``(β, α, c)`` present with every ``(α, β, c)``, α ≠ β).
    identity : sequence of float, length J
    used : ndarray of bool, shape (J, m)
        Whether component ``j`` has a block in animal ``k``.

    Returns
    -------
    LowRankComponents
    """
    basis = np.ascontiguousarray(basis, dtype=np.float64)
    K = basis.shape[2]
    J = len(entries)
    for j, es in enumerate(entries):
        pairs_j = {(a, b): c for a, b, c in es}
        if any(not (0 <= a < K and 0 <= b < K) for a, b in pairs_j):
            raise ValueError(f"low_rank_components: entry of component {j} outside the basis.")
        if any(pairs_j.get((b, a)) != c for (a, b), c in pairs_j.items()):
            raise ValueError(f"low_rank_components: entries of component {j} not symmetric.")
    flat = [e for es in entries for e in es]
    terms, term_coefs = [], []
    for i in range(J):  # loop over pairs of components and their entries, not voxels
        for j in range(i + 1):
            for a, b, ci in entries[i]:
                for g, d, cj in entries[j]:
                    terms.append((i, j, a, b, g, d))
                    term_coefs.append(ci * cj)
    return LowRankComponents(
        basis=basis,
        starts=np.cumsum([0] + [len(es) for es in entries]).astype(np.int64),
        rows=np.array([e[0] for e in flat], dtype=np.int64),
        cols=np.array([e[1] for e in flat], dtype=np.int64),
        coefs=np.array([e[2] for e in flat], dtype=np.float64),
        identity=np.asarray(identity, dtype=np.float64).reshape(J),
        used=np.ascontiguousarray(used, dtype=np.bool_),
        pairs=np.array(terms, dtype=np.int64).reshape(-1, 6),
        pair_coefs=np.array(term_coefs, dtype=np.float64),
    )


def block_sums(A, E, a, Minv, comp: LowRankComponents, index=None):
    """Sums over animals of the products that the REML score and information need.

    Parameters
    ----------
    A : ndarray, shape (c, m, w, w)
        Inverse covariance block of each animal at each voxel (zero rows and columns
        where a run is missing or padding).
    E : ndarray, shape (c, m, w, p)
        ``ÃX`` per animal.
    a : ndarray, shape (c, m, w)
        ``Ã r`` per animal (``Py`` in Harville's notation).
    Minv : ndarray, shape (c, p, p)
        ``(XᵀV⁻¹X)⁻¹``.
    comp : LowRankComponents
    index : ndarray of int, shape (n,), optional
        The voxels (rows of the arrays above) to sum for, in this order; all by
        default. Outputs then have ``n`` rows (no copy of the blocks is made).

    Returns
    -------
    tr_ag : ndarray, shape (c, J)
        ``tr(Ã G_j)``.
    tr_bb : ndarray, shape (c, J, J)
        ``tr(Ã G_i Ã G_j)``.
    Q : ndarray, shape (c, J, p, p)
        ``XᵀÃ G_j Ã X``.
    tr_mr : ndarray, shape (c, J, J)
        ``tr(M⁻¹ XᵀÃ G_i Ã G_j Ã X)``.
    W1 : ndarray, shape (c, J, J)
        ``aᵀ G_i Ã G_j a``.
    EGa : ndarray, shape (c, J, p)
        ``XᵀÃ G_j a``.
    gaa : ndarray, shape (c, J)
        ``aᵀ G_j a``.

    References
    ----------
    Harville, D. A. (1977). Journal of the American Statistical Association 72:320–338.
    """
    c, m, w, p = E.shape
    index = np.arange(c) if index is None else np.asarray(index, dtype=np.int64)
    c = index.shape[0]
    J = comp.n_components
    tr_ag = np.empty((c, J))
    tr_bb = np.empty((c, J, J))
    Q = np.empty((c, J, p, p))
    tr_mr = np.empty((c, J, J))
    W1 = np.empty((c, J, J))
    EGa = np.empty((c, J, p))
    gaa = np.empty((c, J))
    _nb_low_rank_sums(
        np.ascontiguousarray(A, dtype=np.float64),
        np.ascontiguousarray(E, dtype=np.float64),
        np.ascontiguousarray(a, dtype=np.float64),
        np.ascontiguousarray(Minv, dtype=np.float64),
        index,
        comp.basis,
        comp.starts,
        comp.rows,
        comp.cols,
        comp.coefs,
        comp.identity,
        comp.used,
        comp.pairs,
        comp.pair_coefs,
        tr_ag,
        tr_bb,
        Q,
        tr_mr,
        W1,
        EGa,
        gaa,
    )
    return tr_ag, tr_bb, Q, tr_mr, W1, EGa, gaa


# strict IEEE arithmetic: reassociation gained nothing measurable here and compiles slower
@lazy_njit(cache=True, nogil=True, error_model="numpy")
def _nb_low_rank_sums(
    A, E, a, Minv, index, basis, starts, rows, cols, coefs, ident, used, pairs, pair_coefs,
    tr_ag, tr_bb, Q, tr_mr, W1, EGa, gaa,
):  # fmt: skip
    """Compiled loop over voxels and animals of :func:`block_sums` (outputs zeroed here)."""
    _, m, w, _ = A.shape
    c = index.shape[0]
    p = E.shape[3]
    K = basis.shape[2]
    J = ident.shape[0]
    any_ident = False
    for j in range(J):
        if ident[j] != 0.0:
            any_ident = True
    n_terms = pairs.shape[0]
    AB = np.zeros((w, K))
    sw2 = np.zeros(J)
    sh2 = np.zeros(J)
    sf2 = np.zeros(J)
    W = np.zeros((K, K))
    W2 = np.zeros((K, K))
    F = np.zeros((K, p))
    F2 = np.zeros((K, p))
    FM = np.zeros((K, p))
    FMF = np.zeros((K, K))
    F2MF = np.zeros((K, K))
    h = np.zeros(K)
    h2 = np.zeros(K)
    Aa = np.zeros(w)
    Ea = np.zeros(p)
    EE = np.zeros((p, p))
    AE = np.zeros((w, p))
    for t in range(c):
        v = index[t]
        Mt = Minv[v]
        for j in range(J):
            tr_ag[t, j] = 0.0
            gaa[t, j] = 0.0
            for q1 in range(p):
                EGa[t, j, q1] = 0.0
                for q2 in range(p):
                    Q[t, j, q1, q2] = 0.0
            for i in range(J):
                tr_bb[t, j, i] = 0.0
                tr_mr[t, j, i] = 0.0
                W1[t, j, i] = 0.0
        for k in range(m):
            Ak = A[v, k]
            Ek = E[v, k]
            ak = a[v, k]
            Bk = basis[k]
            # reduced products of the basis
            for r in range(w):
                for x in range(K):
                    acc = 0.0
                    for u in range(w):
                        acc += Ak[r, u] * Bk[u, x]
                    AB[r, x] = acc
            for x in range(K):
                for y in range(x + 1):
                    acc = 0.0
                    acc2 = 0.0
                    for r in range(w):
                        acc += Bk[r, x] * AB[r, y]
                        acc2 += AB[r, x] * AB[r, y]
                    W[x, y] = acc
                    W[y, x] = acc
                    W2[x, y] = acc2
                    W2[y, x] = acc2
                for q in range(p):
                    acc = 0.0
                    acc2 = 0.0
                    for r in range(w):
                        acc += Bk[r, x] * Ek[r, q]
                        acc2 += AB[r, x] * Ek[r, q]
                    F[x, q] = acc
                    F2[x, q] = acc2
                acc = 0.0
                acc2 = 0.0
                for r in range(w):
                    acc += Bk[r, x] * ak[r]
                    acc2 += AB[r, x] * ak[r]
                h[x] = acc
                h2[x] = acc2
            for x in range(K):
                for q in range(p):
                    acc = 0.0
                    for u in range(p):
                        acc += F[x, u] * Mt[u, q]
                    FM[x, q] = acc
            for x in range(K):
                for y in range(K):
                    acc = 0.0
                    acc2 = 0.0
                    for q in range(p):
                        acc += F[x, q] * FM[y, q]
                        acc2 += F2[x, q] * FM[y, q]
                    FMF[x, y] = acc
                    F2MF[x, y] = acc2
            # the identity's terms (run variance)
            tr_a = 0.0
            tr_aa = 0.0
            aa = 0.0
            a_aa = 0.0
            tr_meae = 0.0
            if any_ident:
                for r in range(w):
                    tr_a += Ak[r, r]
                    aa += ak[r] * ak[r]
                    acc = 0.0
                    for u in range(w):
                        tr_aa += Ak[r, u] * Ak[r, u]
                        acc += Ak[r, u] * ak[u]
                    Aa[r] = acc
                    a_aa += ak[r] * acc
                    for q in range(p):
                        acc = 0.0
                        for u in range(w):
                            acc += Ak[r, u] * Ek[u, q]
                        AE[r, q] = acc
                for q1 in range(p):
                    acc = 0.0
                    for r in range(w):
                        acc += Ek[r, q1] * ak[r]
                    Ea[q1] = acc
                    for q2 in range(p):
                        acc = 0.0
                        acc2 = 0.0
                        for r in range(w):
                            acc += Ek[r, q1] * Ek[r, q2]
                            acc2 += Ek[r, q1] * AE[r, q2]
                        EE[q1, q2] = acc
                        tr_meae += Mt[q2, q1] * acc2
            # one component at a time
            for j in range(J):
                if not used[j, k]:
                    continue
                dj = ident[j]
                s_ag = dj * tr_a
                s_aa = dj * aa
                s_w2 = 0.0
                s_h2 = 0.0
                s_f2 = 0.0
                for e in range(starts[j], starts[j + 1]):
                    al = rows[e]
                    be = cols[e]
                    ce = coefs[e]
                    s_ag += ce * W[al, be]
                    s_aa += ce * h[al] * h[be]
                    s_w2 += ce * W2[be, al]
                    s_h2 += ce * h[al] * h2[be]
                    s_f2 += ce * F2MF[be, al]
                    for q1 in range(p):
                        EGa[t, j, q1] += ce * F[al, q1] * h[be]
                        for q2 in range(p):
                            Q[t, j, q1, q2] += ce * F[al, q1] * F[be, q2]
                if dj != 0.0:
                    for q1 in range(p):
                        EGa[t, j, q1] += dj * Ea[q1]
                        for q2 in range(p):
                            Q[t, j, q1, q2] += dj * EE[q1, q2]
                tr_ag[t, j] += s_ag
                gaa[t, j] += s_aa
                sw2[j] = s_w2  # tr(Ã G_j Ã), aᵀG_jÃa, tr(M⁻¹XᵀG_jÃÃX) (with symmetric G_j)
                sh2[j] = s_h2
                sf2[j] = s_f2
            # pairs of components: products of their entries (a flat list) ...
            for n in range(n_terms):
                i = pairs[n, 0]
                j = pairs[n, 1]
                if not (used[i, k] and used[j, k]):
                    continue
                al = pairs[n, 2]
                be = pairs[n, 3]
                ga = pairs[n, 4]
                de = pairs[n, 5]
                cw = pair_coefs[n] * W[be, ga]
                tr_bb[t, i, j] += cw * W[de, al]
                W1[t, i, j] += cw * h[al] * h[de]
                tr_mr[t, i, j] += cw * FMF[de, al]
            # ... and the terms of the identity
            if any_ident:
                for i in range(J):
                    if not used[i, k]:
                        continue
                    di = ident[i]
                    for j in range(i + 1):
                        if not used[j, k]:
                            continue
                        dj = ident[j]
                        if di == 0.0 and dj == 0.0:
                            continue
                        tr_bb[t, i, j] += dj * sw2[i] + di * sw2[j] + di * dj * tr_aa
                        W1[t, i, j] += dj * sh2[i] + di * sh2[j] + di * dj * a_aa
                        tr_mr[t, i, j] += dj * sf2[i] + di * sf2[j] + di * dj * tr_meae
        for i in range(J):
            for j in range(i):
                tr_bb[t, j, i] = tr_bb[t, i, j]
                W1[t, j, i] = W1[t, i, j]
                tr_mr[t, j, i] = tr_mr[t, i, j]
