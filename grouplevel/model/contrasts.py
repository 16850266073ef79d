"""Tests of contrasts cᵀβ after a REML fit: t, degrees of freedom, z and p.

The statistic is ``t = cᵀβ̂ / √(cᵀ Φ̂ c)`` with the model-based covariance
``Φ̂ = (XᵀV̂⁻¹X)⁻¹`` at the REML estimates. Two degrees-of-freedom rules are offered:

* the between-animal (containment) rule, the conservative default: a contrast of
  animal-level columns (constant within every animal) is judged against the number of
  animals, a contrast touching a run-level column against the within-animal residual
  degrees of freedom (Pinheiro & Bates 2000, §2.4.2);
* Satterthwaite's approximation, from the inverse expected information of the variance
  parameters and the derivatives of Φ (Satterthwaite 1946; Giesbrecht & Burns 1985).

``z`` is the standard normal value with the same two-sided p as ``t``, computed from the
log survival function so that it stays finite for very large ``|t|``.

References
----------
Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS. Springer,
§2.4.2 (section from memory).

Satterthwaite, F. E. (1946). An approximate distribution of estimates of variance
components. Biometrics Bulletin 2:110–114.

Giesbrecht, F. G., & Burns, J. C. (1985). Two-stage analysis based on a mixed model:
large-sample asymptotic theory and small-sample simulation results. Biometrics
41:477–486.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from grouplevel.distributions import t_logsf, t_sf
from grouplevel.errors import ArgumentError
from grouplevel.model.reml import MixedFit, presence_patterns

# A design column counts as constant within an animal when its range there is at most
# this multiple of the column's overall scale (common practice for floating-point data).
CONSTANT_TOLERANCE = 1e-10


@dataclass(frozen=True)
class ContrastResult:
    """A contrast tested at every voxel.

    Attributes
    ----------
    effect, se, t, df, z, p : ndarray, shape (V,)
        ``cᵀβ̂``, its standard error, the t statistic, its degrees of freedom, the
        equal-p standard normal value and the two-sided p-value. NaN where the voxel
        was not fitted or the degrees of freedom are not positive.
    """

    effect: np.ndarray
    se: np.ndarray
    t: np.ndarray
    df: np.ndarray
    z: np.ndarray
    p: np.ndarray


def _as_contrast(c, p: int) -> np.ndarray:
    c = np.asarray(c, dtype=np.float64).ravel()
    if c.shape != (p,):
        raise ArgumentError(
            f"contrast has {c.size} weights but the design has {p} columns; give one "
            "weight per design column."
        )
    if not np.all(np.isfinite(c)) or not np.any(c != 0):
        raise ArgumentError("contrast weights must be finite and not all zero.")
    return c


def t_to_z(t: np.ndarray, df: np.ndarray | float) -> np.ndarray:
    """Standard normal value with the same two-sided p-value as ``t`` on ``df``.

    Computed in log space, ``z = sign(t) · Φ⁻¹(exp(log S_t(|t|)))`` with the inverse of
    ``log Φ`` (scipy.special.ndtri_exp), so it stays finite for huge ``|t|``. Infinite
    ``df`` gives ``z = t``.

    Parameters
    ----------
    t : array_like
    df : array_like or float
        Degrees of freedom, broadcast against ``t``.

    Returns
    -------
    ndarray
        NaN where ``t`` or ``df`` is NaN or ``df ≤ 0``.
    """
    t = np.asarray(t, dtype=np.float64)
    df = np.broadcast_to(np.asarray(df, dtype=np.float64), t.shape)
    out = np.full(t.shape, np.nan)
    finite_df = np.isfinite(df) & (df > 0)
    ok = finite_df & ~np.isnan(t)
    if np.any(ok):
        logsf = t_logsf(np.abs(t[ok]), df[ok])
        out[ok] = -np.sign(t[ok]) * special.ndtri_exp(logsf)
    inf_df = np.isposinf(df)
    out[inf_df] = t[inf_df]
    return out


def test_contrast(fit: MixedFit, c, df) -> ContrastResult:
    """t, z and two-sided p of the contrast ``cᵀβ`` at every voxel.

    Parameters
    ----------
    fit : MixedFit
    c : array_like, shape (p,)
        Contrast weights, one per design column.
    df : array_like, shape (V,), or float
        Degrees of freedom (e.g. from :func:`between_animal_df` or
        :func:`satterthwaite_df`).

    Returns
    -------
    ContrastResult

    References
    ----------
    Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS.
    Springer.
    """
    c = _as_contrast(c, fit.beta.shape[1])
    n_vox = fit.beta.shape[0]
    df = np.broadcast_to(np.asarray(df, dtype=np.float64), (n_vox,)).copy()
    effect = fit.beta @ c
    var = np.einsum("p,vpq,q->v", c, fit.cov_beta, c)
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.sqrt(var)
        t = effect / se
    bad = ~(df > 0)
    df[bad] = np.nan
    t = np.where(bad, np.nan, t)
    p = np.full(n_vox, np.nan)
    ok = ~np.isnan(t)
    p[ok] = 2.0 * t_sf(np.abs(t[ok]), df[ok])
    z = t_to_z(t, df)
    return ContrastResult(effect=effect, se=se, t=t, df=df, z=z, p=p)


def animal_level_columns(X: np.ndarray, animal: np.ndarray) -> np.ndarray:
    """Columns of ``X`` that are constant within every animal (animal-level columns).

    Parameters
    ----------
    X : ndarray, shape (n_runs, p)
    animal : ndarray of int, shape (n_runs,)

    Returns
    -------
    ndarray of bool, shape (p,)
    """
    X = np.asarray(X, dtype=np.float64)
    animal = np.asarray(animal, dtype=np.int64)
    m = int(animal.max()) + 1
    hi = np.full((m, X.shape[1]), -np.inf)
    lo = np.full((m, X.shape[1]), np.inf)
    np.maximum.at(hi, animal, X)
    np.minimum.at(lo, animal, X)
    used = np.bincount(animal, minlength=m) > 0
    spread = (hi - lo)[used].max(axis=0)
    scale = np.maximum(np.abs(X).max(axis=0), 1.0)
    return spread <= CONSTANT_TOLERANCE * scale


def between_animal_df(X: np.ndarray, animal: np.ndarray, present: np.ndarray, c) -> np.ndarray:
    """Between-animal (containment) degrees of freedom of a contrast at every voxel.

    A contrast that weights only animal-level columns (constant within every animal)
    gets ``animals with data − rank(animal-level design of those animals)``. A contrast
    that weights a run-level column gets ``runs with data − animals with data −
    (rank(X_v) − rank(animal-level part of X_v))``. Ranks are computed once per distinct
    presence pattern.

    Parameters
    ----------
    X : ndarray, shape (n_runs, p)
    animal : ndarray of int, shape (n_runs,)
    present : ndarray of bool, shape (n_runs, V)
        Runs with data at each voxel.
    c : array_like, shape (p,)

    Returns
    -------
    ndarray, shape (V,)
        Degrees of freedom (float; may be ≤ 0 where too few animals or runs have data,
        which :func:`test_contrast` turns into NaN results).

    References
    ----------
    Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS.
    Springer, §2.4.2 (section from memory).
    """
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    animal = np.asarray(animal, dtype=np.int64)
    present = np.asarray(present, dtype=bool)
    if present.ndim == 1:
        present = present[:, None]
    if present.shape[0] != X.shape[0] or animal.shape != (X.shape[0],):
        raise ArgumentError(
            f"between_animal_df: design has {X.shape[0]} runs, animal codes "
            f"{animal.shape[0]} and the presence mask {present.shape[0]}; they must agree."
        )
    c = _as_contrast(c, X.shape[1])
    level = animal_level_columns(X, animal)
    animal_contrast = bool(np.all(level[c != 0]))
    patterns, inverse = presence_patterns(present)
    df_pattern = np.zeros(len(patterns))
    xa = X[:, level]
    for i, pat in enumerate(patterns):  # loop over distinct patterns, not voxels
        n_v = int(pat.sum())
        m_v = np.unique(animal[pat]).size
        rank_a = np.linalg.matrix_rank(xa[pat]) if xa.shape[1] and n_v else 0
        if animal_contrast:
            df_pattern[i] = m_v - rank_a
        else:
            rank_x = np.linalg.matrix_rank(X[pat]) if n_v else 0
            df_pattern[i] = n_v - m_v - (rank_x - rank_a)
    return df_pattern[inverse]


def session_df(
    X: np.ndarray, animal: np.ndarray, session: np.ndarray, present: np.ndarray, c
) -> np.ndarray:
    """Session-level (containment) degrees of freedom of a contrast at every voxel.

    With a session variance level in the model, an effect that is constant within every
    session but varies between the sessions of an animal (drug on one day, vehicle on
    another) without a random slope is judged against the scatter of sessions within
    animals: ``sessions with data − animals with data − (rank of the session-level
    design − rank of its animal-level part)``, the within-animal stratum of the nested
    analysis of variance. Columns constant within every session (animal- and
    session-level) make the session-level design. Ranks are computed once per distinct
    presence pattern.

    Parameters
    ----------
    X : ndarray, shape (n_runs, p)
    animal : ndarray of int, shape (n_runs,)
    session : ndarray of int, shape (n_runs,)
        Session codes unique across animals (sessions are nested in animals).
    present : ndarray of bool, shape (n_runs, V)
    c : array_like, shape (p,)
        Must weight only columns constant within sessions, at least one of them varying
        within an animal.

    Returns
    -------
    ndarray, shape (V,)

    Raises
    ------
    ArgumentError
        For a contrast on a column that varies within sessions, or only on animal-level
        columns (:func:`between_animal_df` covers those).

    References
    ----------
    Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS.
    Springer, §2.4.2 (containment rule for nested levels; section from memory).
    """
    X = np.asarray(X, dtype=np.float64)
    animal = np.asarray(animal, dtype=np.int64)
    session = np.asarray(session, dtype=np.int64)
    present = np.asarray(present, dtype=bool)
    if present.ndim == 1:
        present = present[:, None]
    if animal.shape != (X.shape[0],) or session.shape != (X.shape[0],):
        raise ArgumentError(
            f"session_df: design has {X.shape[0]} runs, animal codes {animal.shape[0]} and "
            f"session codes {session.shape[0]}; they must agree."
        )
    c = _as_contrast(c, X.shape[1])
    level_a = animal_level_columns(X, animal)
    level_s = animal_level_columns(X, session)
    weighted = c != 0
    if not np.all(level_s[weighted]) or np.all(level_a[weighted]):
        raise ArgumentError(
            "session_df: the contrast must weight only columns constant within sessions, "
            "at least one of them varying within an animal."
        )
    patterns, inverse = presence_patterns(present)
    df_pattern = np.zeros(len(patterns))
    xs, xa = X[:, level_s], X[:, level_a]
    for i, pat in enumerate(patterns):  # loop over distinct patterns, not voxels
        if not pat.any():
            continue
        n_s = np.unique(session[pat]).size
        m_v = np.unique(animal[pat]).size
        rank_a = np.linalg.matrix_rank(xa[pat]) if xa.shape[1] else 0
        df_pattern[i] = n_s - m_v - (np.linalg.matrix_rank(xs[pat]) - rank_a)
    return df_pattern[inverse]


def slope_df(
    X: np.ndarray,
    animal: np.ndarray,
    present: np.ndarray,
    slope_column: int,
    slope_design: np.ndarray,
) -> np.ndarray:
    """Between-animal degrees of freedom of a within-animal effect with a random slope.

    With a random slope per animal, a within-animal effect is judged against the spread
    of the animals' own effects, an animal-level quantity: ``animals informative on the
    slope − rank(the slope's animal-level design on those animals)``. An animal is
    informative at a voxel when the slope column takes at least two values over its
    runs with data there. The slope's animal-level design has the intercept (the mean
    effect) and one column per animal-level moderator that the formula crosses with the
    slope (e.g. a group for a drug-by-group interaction). Ranks are computed once per
    distinct presence pattern.

    Parameters
    ----------
    X : ndarray, shape (n_runs, p)
    animal : ndarray of int, shape (n_runs,)
    present : ndarray of bool, shape (n_runs, V)
    slope_column : int
        The column of ``X`` that carries the random slope.
    slope_design : ndarray, shape (m, r)
        One row per animal.

    Returns
    -------
    ndarray, shape (V,)

    References
    ----------
    Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects Models in S and S-PLUS.
    Springer, §2.4.2 (containment rule; section from memory).
    """
    X = np.asarray(X, dtype=np.float64)
    animal = np.asarray(animal, dtype=np.int64)
    present = np.asarray(present, dtype=bool)
    if present.ndim == 1:
        present = present[:, None]
    G = np.asarray(slope_design, dtype=np.float64).reshape(int(animal.max()) + 1, -1)
    z = X[:, slope_column]
    patterns, inverse = presence_patterns(present)
    df_pattern = np.zeros(len(patterns))
    for i, pat in enumerate(patterns):  # loop over distinct patterns, not voxels
        informative = [a for a in np.unique(animal[pat]) if np.ptp(z[pat & (animal == a)]) > 0]
        rank = np.linalg.matrix_rank(G[informative]) if informative else 0
        df_pattern[i] = len(informative) - rank
    return df_pattern[inverse]


def satterthwaite_df(fit: MixedFit, c) -> np.ndarray:
    """Satterthwaite degrees of freedom of a contrast at every voxel.

    ``df = 2 (cᵀΦc)² / (gᵀ C g)`` with ``g_j = cᵀ (∂Φ/∂θ_j) c`` and ``C`` the inverse
    expected information of θ = (τ², σ²). Components estimated at the boundary 0 (or
    not estimated) are dropped. When every component is dropped Φ is known and the
    degrees of freedom are infinite.

    Parameters
    ----------
    fit : MixedFit
    c : array_like, shape (p,)

    Returns
    -------
    ndarray, shape (V,)

    References
    ----------
    Satterthwaite, F. E. (1946). Biometrics Bulletin 2:110–114.
    Giesbrecht, F. G., & Burns, J. C. (1985). Biometrics 41:477–486.
    """
    c = _as_contrast(c, fit.beta.shape[1])
    phi = np.einsum("p,vpq,q->v", c, fit.cov_beta, c)
    g = np.einsum("p,vjpq,q->vj", c, fit.dcov_beta, c)
    keep = np.stack([fit.var_animal > 0, fit.var_run > 0], axis=1)
    if not fit.estimate_run_variance:
        keep[:, 1] = False
    g = np.where(keep, g, 0.0)
    var_phi = np.einsum("vi,vij,vj->v", g, fit.cov_theta, g)
    with np.errstate(divide="ignore", invalid="ignore"):
        df = 2.0 * phi * phi / var_phi
    df = np.where(np.isnan(phi), np.nan, df)
    df = np.where((var_phi <= 0) & ~np.isnan(phi), np.inf, df)
    return df


# The name begins with "test" because it tests a contrast; keep pytest from collecting it
# when a test module imports it.
test_contrast.__test__ = False  # type: ignore[attr-defined]
