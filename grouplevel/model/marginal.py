"""The covariance of each animal's runs under a fitted model, and what follows from it.

A fit of :func:`grouplevel.model.reml.fit_reml` (one random intercept per animal) or of
:func:`grouplevel.model.mixed.fit_mixed` (random slopes, sessions, variance groups)
implies, at every voxel, the marginal covariance of the runs of one animal

    V_a = Z_a T_g(a) Z_aᵀ + ω² S_a + diag(σ² + s_k²),

with ``Z_a`` the animal's intercept and slope values, ``T_g`` its group's animal
covariance, ``S_a`` the same-session indicator and ``s_k²`` the first-level variances.
The later steps that need the model (the standardised residuals of the smoothness
estimate, the leave-one-animal-out maps, the per-animal GLS pieces) take it from here,
so that they use the model the contrast was fitted with rather than the random
intercept alone.

The components are read by the names :class:`grouplevel.model.mixed.MixedModelFit`
uses (``animal``, ``slope[x]``, ``cov[x]``, ``session``, ``run``, with ``[group]``
suffixes); a random-intercept fit has ``animal`` and ``run`` only.

Pure: arrays in, arrays out.

References
----------
Laird, N. M., & Ware, J. H. (1982). Random-effects models for longitudinal data.
Biometrics 38:963–974 (the marginal covariance ``Z T Zᵀ + R``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from grouplevel.errors import ArgumentError
from grouplevel.model.mixed import (
    _check_groups,
    _check_session,
    _check_slopes,
    _cholesky_inverse,
    _layout,
    _Structure,
    fit_mixed,
)
from grouplevel.model.reml import fit_reml

#: ``model_df(fit, present, c) -> df``: a group map's degrees-of-freedom rule, applied to
#: a refit of the same model (region values, mirrored maps); ``present`` is the
#: ``(runs, columns)`` mask of the refitted data.
ModelDf = Callable[[Any, np.ndarray, np.ndarray], np.ndarray]


@dataclass(frozen=True)
class RandomTerms:
    """The random effects of a fitted model, as :func:`fit_mixed` takes them.

    The default (no slopes, no sessions, no variance groups) is the random-intercept
    model of :func:`grouplevel.model.reml.fit_reml`.
    """

    slopes: np.ndarray | None = None
    slope_names: tuple[str, ...] = ()
    session: np.ndarray | None = None
    animal_group: np.ndarray | None = None
    group_names: tuple[str, ...] = ()

    @property
    def extended(self) -> bool:
        """True beyond one random intercept per animal."""
        return (
            self.slopes is not None or self.session is not None or (self.animal_group is not None)
        )

    def subset(self, rows: np.ndarray, animals: np.ndarray) -> RandomTerms:
        """The terms of the runs ``rows`` (bool, per run) of the animals ``animals``
        (bool, per animal; the animal codes are renumbered in order)."""
        groups = None if self.animal_group is None else np.asarray(self.animal_group)[animals]
        names = self.group_names
        if groups is not None:
            kept = np.unique(groups)
            groups = np.searchsorted(kept, groups)
            names = tuple(names[g] for g in kept) if names else ()
        return RandomTerms(
            slopes=None if self.slopes is None else np.asarray(self.slopes)[rows],
            slope_names=self.slope_names,
            session=None if self.session is None else np.asarray(self.session)[rows],
            animal_group=groups,
            group_names=names,
        )


def model_structure(X: np.ndarray, animal: np.ndarray, terms: RandomTerms | None) -> _Structure:
    """The fixed layout of a model (per-animal blocks, one matrix per component)."""
    terms = terms or RandomTerms()
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    animal = np.asarray(animal, dtype=np.int64).reshape(-1)
    n = X.shape[0]
    if animal.shape != (n,):
        raise ArgumentError(f"model_structure: {animal.size} animal codes for {n} design rows.")
    m = int(animal.max()) + 1
    slopes, slope_names = _check_slopes(terms.slopes, terms.slope_names, n)
    groups, group_names = _check_groups(terms.animal_group, terms.group_names, m)
    session = _check_session(terms.session, animal, n)
    return _Structure(X, animal, slopes, slope_names, session, groups, group_names, True)


def _theta(st: _Structure, components: dict[str, np.ndarray], n_vox: int) -> np.ndarray:
    """(V, J) the components in the structure's order (a missing ``run`` is 0)."""
    theta = np.zeros((n_vox, st.J))
    for j, name in enumerate(st.names):
        if name in components:
            theta[:, j] = np.asarray(components[name], dtype=float).reshape(-1)
        elif name != "run":
            raise ArgumentError(
                f"the fit has no variance component {name!r} (it has {sorted(components)}); "
                "give the random terms the model was fitted with"
            )
    return theta


def marginal_run_variance(
    components: dict[str, np.ndarray],
    X: np.ndarray,
    animal: np.ndarray,
    terms: RandomTerms | None = None,
    variance: np.ndarray | None = None,
) -> np.ndarray:
    """``(n_runs, V)`` marginal variance of every run under the fitted model.

    ``z_kᵀ T_g z_k + ω² + σ² + s_k²``: the diagonal of ``V_a`` (module docstring). With
    the random-intercept model it is ``τ² + σ² + s_k²``.
    """
    st = model_structure(X, animal, terms)
    n_vox = np.asarray(next(iter(components.values()))).size
    theta = _theta(st, components, n_vox)
    diag = st.G[:, st.animal, st.slot, st.slot]  # (J, n)
    out = diag.T @ theta.T  # (n, V)
    if variance is not None:
        out = out + np.asarray(variance, dtype=float)
    return out


def animal_gls_pieces(
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    components: dict[str, np.ndarray],
    terms: RandomTerms | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Each animal's share of the GLS normal equations at fixed components.

    Returns
    -------
    A, b
        ``(V, m, p, p)`` ``X_aᵀV_a⁻¹X_a`` and ``(V, m, p)`` ``X_aᵀV_a⁻¹y_a``, with runs
        missing at a voxel (NaN effect or variance) left out exactly. Summed over animals
        they give the GLS estimate ``β = (Σ A_a)⁻¹ Σ b_a``; without an animal's term, the
        estimate without that animal at the same components.
    """
    st = model_structure(X, animal, terms)
    y = np.asarray(y, dtype=float)
    n_vox = y.shape[1]
    theta = _theta(st, components, n_vox)
    present = np.isfinite(y)
    if variance is not None:
        present &= np.isfinite(variance)
    idx = np.arange(n_vox)
    pres = _layout(st, present.astype(float), idx, 0.0)
    yc = np.where(pres > 0, _layout(st, y, idx, 0.0), 0.0)
    s2 = np.zeros_like(yc) if variance is None else _layout(st, variance, idx, 0.0)
    s2 = np.where(pres > 0, s2, 0.0)
    pp = pres[..., :, None] * pres[..., None, :]
    V = (np.nan_to_num(theta) @ st.G_flat).reshape(n_vox, st.m, st.width, st.width) * pp
    w = np.arange(st.width)
    V[..., w, w] += s2 * pres + (1.0 - pres)
    W, _, ok = _cholesky_inverse(V)
    W = np.where(ok[..., None, None], W * pp, np.nan)
    E = W @ st.X  # (V, m, w, p)
    A = np.swapaxes(st.X, 1, 2)[None] @ E
    b = np.einsum("vmwp,vmw->vmp", E, yc)
    bad = ~np.isfinite(theta).all(axis=1)
    A[bad] = np.nan
    b[bad] = np.nan
    return A, b


def fit_terms(
    y: np.ndarray,
    variance: np.ndarray | None,
    X: np.ndarray,
    animal: np.ndarray,
    terms: RandomTerms | None = None,
    *,
    estimate_run_variance: bool = True,
    max_iter: int = 100,
):
    """Fit ``y`` with the model of ``terms``: :func:`grouplevel.model.reml.fit_reml` for
    the random intercept, :func:`grouplevel.model.mixed.fit_mixed` beyond it.

    The refits of the questions (region values, mirrored maps, an animal left out) call
    this, so that they use the model the contrast was fitted with. Both fits have
    ``beta`` and ``cov_beta`` for :func:`grouplevel.model.contrasts.test_contrast`.
    """
    terms = terms or RandomTerms()
    if not terms.extended:
        return fit_reml(
            y, variance, X, animal, estimate_run_variance=estimate_run_variance, max_iter=max_iter
        )
    return fit_mixed(
        y,
        variance,
        X,
        animal,
        slopes=terms.slopes,
        slope_names=terms.slope_names,
        session=terms.session,
        animal_group=terms.animal_group,
        group_names=terms.group_names,
        estimate_run_variance=estimate_run_variance,
        max_iter=max_iter,
    )
