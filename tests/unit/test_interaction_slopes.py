"""Three-way interactions of within-animal and animal-level columns get the right random
slope, fit and df (grouplevel.intake.design.random_effects, grouplevel.model.fit_mixed).

Outside references used here:
- statsmodels ``MixedLM`` (REML; Seabold & Perktold 2010) with the same random effects:
  an intercept and slopes for drug, time and drug:time per animal with a full
  (unstructured) covariance (``re_formula="1 + d + t + d:t"``); β and its SE to 1e-4
  relative;
- the containment rule for an animal-level moderation of a random slope: animals −
  rank of the slope's animal-level design (intercept and genotype): 12 − 2 = 10
  (Pinheiro & Bates 2000, Mixed-Effects Models in S and S-PLUS, §2.4.2; section from
  memory).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from statsmodels.regression.mixed_linear_model import MixedLM

from grouplevel.intake.design import (
    CONTRAST_SLOPE,
    build_design,
    contrast_kind,
    random_effects,
    slope_design,
)
from grouplevel.model import fit_mixed
from grouplevel.model.contrasts import slope_df

FORMULA = "1 + genotype*drug*time"
ANIMALS = 12


def _runs() -> pd.DataFrame:
    rows = []
    for a in range(ANIMALS):
        for rep in range(2):
            for drug in ("vehicle", "drug"):
                for time in ("early", "late"):
                    rows.append(
                        {
                            "animal": f"r{a}",
                            "genotype": "ko" if a % 2 else "wt",
                            "drug": drug,
                            "time": time,
                            "rep": rep,
                        }
                    )
    return pd.DataFrame(rows)


def test_three_way_interaction_gets_the_interaction_slope():
    runs = _runs()
    design = build_design(runs, FORMULA)
    names = list(design.columns)
    three = next(j for j, n in enumerate(names) if n.count(":") == 2)
    two = next(j for j, n in enumerate(names) if n.startswith("drug") and ":time" in n)
    c = np.zeros(len(names))
    c[three] = 1.0
    random = random_effects(design, runs, [c])
    assert [names[j] for j in random.slope_columns] == [
        "drug[T.vehicle]",
        "time[T.late]",
        "drug[T.vehicle]:time[T.late]",
    ]
    kind, slope = contrast_kind(design, random, c)
    assert kind == CONTRAST_SLOPE and random.slope_columns[slope] == two
    G, columns = slope_design(design, random, slope)
    assert sorted(columns) == [two, three]
    present = np.ones((len(runs), 1), dtype=bool)
    # containment: animals − rank(intercept, genotype) = 12 − 2
    assert slope_df(design.matrix, design.animal, present, two, G)[0] == ANIMALS - 2


def test_three_way_interaction_fit_matches_statsmodels():
    runs = _runs()
    design = build_design(runs, FORMULA)
    c = np.zeros(len(design.columns))
    c[-1] = 1.0
    random = random_effects(design, runs, [c])
    X, animal = design.matrix, design.animal
    Z = X[:, list(random.slope_columns)]
    rng = np.random.default_rng(12)
    T = np.array(
        [
            [1.0, 0.2, 0.1, 0.0],
            [0.2, 0.8, 0.1, 0.1],
            [0.1, 0.1, 0.6, 0.1],
            [0.0, 0.1, 0.1, 0.5],
        ]
    )
    n_vox = 2
    u = np.einsum("ij,mjv->miv", np.linalg.cholesky(T), rng.normal(size=(ANIMALS, 4, n_vox)))
    Zfull = np.column_stack([np.ones(len(runs)), Z])
    y = np.einsum("nq,nqv->nv", Zfull, u[animal]) + rng.normal(size=(len(runs), n_vox)) * 0.5
    names = tuple(design.columns[j] for j in random.slope_columns)
    fit = fit_mixed(y, None, X, animal, slopes=Z, slope_names=names, tol=1e-10)
    assert fit.converged.all()
    cols = ["g", "d", "t", "gd", "gt", "dt", "gdt"]
    for v in range(n_vox):
        res = _statsmodels_fit(pd.DataFrame(X[:, 1:], columns=cols).assign(y=y[:, v], a=animal))
        # statsmodels MixedLM (REML), the same random intercept and three slopes with a
        # full covariance: β and SE to 1e-4 relative, our REML optimum not lower
        np.testing.assert_allclose(fit.beta[v], res.fe_params.to_numpy(), rtol=1e-4, atol=1e-8)
        se = np.sqrt(np.diag(fit.cov_beta[v]))
        np.testing.assert_allclose(se, res.bse_fe.to_numpy(), rtol=1e-4)
        assert fit.loglik[v] >= res.llf - 1e-8
        # T and σ²: the likelihood is flat along some directions of a 4 × 4 T from 12
        # animals, where both optimisers stop within ~1e-4 of each other (measured
        # 1.4e-4 at the worst voxel): 1e-3 relative to the diagonal's scale
        T_sm = res.cov_re.to_numpy()
        scale = np.sqrt(np.outer(np.diag(T_sm), np.diag(T_sm)))
        assert np.max(np.abs(_animal_covariance(fit, names, v) - T_sm) / scale) <= 1e-3
        assert abs(fit.var_run[v] - res.scale) <= 1e-3 * res.scale


def _statsmodels_fit(df: pd.DataFrame):
    """statsmodels MixedLM by REML, polished: L-BFGS, then BFGS restarted from its own
    optimum with a tight gradient tolerance (its defaults stop earlier on this flat
    likelihood)."""
    model = MixedLM.from_formula(
        "y ~ g + d + t + gd + gt + dt + gdt", df, groups="a", re_formula="1 + d + t + dt"
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = model.fit(reml=True, method=["lbfgs"], maxiter=20000)
        for _ in range(3):
            res = model.fit(
                reml=True,
                start_params=res.params_object,
                method=["bfgs"],
                gtol=1e-10,
                maxiter=20000,
            )
    return res


def _animal_covariance(fit, names, v):
    """T (intercept, slopes) of voxel v from the fit's named components."""
    labels = ["animal", *[f"slope[{n}]" for n in names]]
    q = len(labels)
    T = np.zeros((q, q))
    for i in range(q):
        T[i, i] = fit.components[labels[i]][v]
    for i in range(q):
        for k in range(i + 1, q):
            a = "" if i == 0 else names[i - 1]
            b = names[k - 1]
            key = f"cov[{b}]" if i == 0 else f"cov[{a},{b}]"
            if key not in fit.components:
                key = f"cov[{b},{a}]"
            T[i, k] = T[k, i] = fit.components[key][v]
    return T


@pytest.mark.parametrize("slopes", [("drug",), "none"])
def test_without_both_slopes_the_interaction_has_none(slopes):
    runs = _runs()
    design = build_design(runs, FORMULA)
    c = np.zeros(len(design.columns))
    c[-1] = 1.0
    random = random_effects(design, runs, [c], random_slopes=slopes)
    assert len(random.slope_columns) == (1 if slopes != "none" else 0)
    assert contrast_kind(design, random, c)[0] == "within"
