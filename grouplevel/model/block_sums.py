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
    """

    basis: np.ndarray
    starts: np.ndarray
    rows: np.ndarray
    cols: np.ndarray
    coefs: np.ndarray
    identity: np.ndarray
    used: np.ndarray

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


def block_sums(A, E, a, Minv, comp: LowRankComponents):
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
        comp.basis,
        comp.starts,
        comp.rows,
        comp.cols,
        comp.coefs,
        comp.identity,
        comp.used,
        tr_ag,
        tr_bb,
        Q,
        tr_mr,
        W1,
        EGa,
        gaa,
    )
    return tr_ag, tr_bb, Q, tr_mr, W1, EGa, gaa


# reassociation and fused multiply-add only: NaN and infinity keep their meaning
@lazy_njit(cache=True, nogil=True, error_model="numpy", fastmath={"reassoc", "contract"})
def _nb_low_rank_sums(
    A, E, a, Minv, basis, starts, rows, cols, coefs, ident, used,
    tr_ag, tr_bb, Q, tr_mr, W1, EGa, gaa,
):  # fmt: skip
    """Compiled loop over voxels and animals of :func:`block_sums` (outputs zeroed here)."""
    c, m, w, _ = A.shape
    p = E.shape[3]
    K = basis.shape[2]
    J = ident.shape[0]
    any_ident = False
    for j in range(J):
        if ident[j] != 0.0:
            any_ident = True
    AB = np.zeros((w, K))
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
        Mt = Minv[t]
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
            Ak = A[t, k]
            Ek = E[t, k]
            ak = a[t, k]
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
                for e in range(starts[j], starts[j + 1]):
                    al = rows[e]
                    be = cols[e]
                    ce = coefs[e]
                    s_ag += ce * W[al, be]
                    s_aa += ce * h[al] * h[be]
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
            # pairs of components
            for i in range(J):
                if not used[i, k]:
                    continue
                di = ident[i]
                for j in range(i + 1):
                    if not used[j, k]:
                        continue
                    dj = ident[j]
                    s_bb = 0.0
                    s_w1 = 0.0
                    s_mr = 0.0
                    for e in range(starts[i], starts[i + 1]):
                        al = rows[e]
                        be = cols[e]
                        ce = coefs[e]
                        for f in range(starts[j], starts[j + 1]):
                            ga = rows[f]
                            de = cols[f]
                            cf = ce * coefs[f]
                            s_bb += cf * W[be, ga] * W[de, al]
                            s_w1 += cf * h[al] * W[be, ga] * h[de]
                            s_mr += cf * W[be, ga] * FMF[de, al]
                        if dj != 0.0:  # G_i Ã (dj I)
                            s_bb += ce * dj * W2[be, al]
                            s_w1 += ce * dj * h[al] * h2[be]
                            s_mr += ce * dj * F2MF[be, al]
                    if di != 0.0:  # (di I) Ã G_j
                        for f in range(starts[j], starts[j + 1]):
                            ga = rows[f]
                            de = cols[f]
                            cf = di * coefs[f]
                            s_bb += cf * W2[de, ga]
                            s_w1 += cf * h2[ga] * h[de]
                            s_mr += cf * F2MF[ga, de]
                        if dj != 0.0:
                            s_bb += di * dj * tr_aa
                            s_w1 += di * dj * a_aa
                            s_mr += di * dj * tr_meae
                    tr_bb[t, i, j] += s_bb
                    W1[t, i, j] += s_w1
                    tr_mr[t, i, j] += s_mr
        for i in range(J):
            for j in range(i):
                tr_bb[t, j, i] = tr_bb[t, i, j]
                W1[t, j, i] = W1[t, i, j]
                tr_mr[t, j, i] = tr_mr[t, i, j]
