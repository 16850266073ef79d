"""Designs beyond one random intercept: within-animal effects with random slopes,
sessions nested in animals, per-group between-animal variances — from the study file
to the maps, checked against statsmodels and exact enumerations.

Every study here is tiny and invented; each voxel is an independent data set.
"""

from __future__ import annotations

import itertools
import json
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import optimize, stats

from grouplevel.cli import main
from grouplevel.design import build_design, column_levels, random_effects
from grouplevel.errors import UserError
from grouplevel.intake.description import design_description
from grouplevel.pipeline import fit_study, load_study, write_outputs
from tests.conftest import write_study

CONTRAST_DRUG = '\n[[contrast]]\nname = "drug"\nweights = { drug = 1 }\n'
NO_PERMUTATIONS = "\n[inference]\npermutations = 0\n"


def _study(
    folder: Path,
    y: np.ndarray,
    animal: np.ndarray,
    shape: tuple[int, int, int],
    *,
    columns: dict[str, list],
    model: str,
    extra: str = NO_PERMUTATIONS + CONTRAST_DRUG,
    variances: np.ndarray | None = None,
) -> Path:
    """A study whose run k holds the maps ``y[k]`` (runs × voxels, C order)."""
    n = y.shape[0]
    return write_study(
        folder,
        y.reshape(n, *shape),
        [f"a{a}" for a in animal],
        variances=None if variances is None else variances.reshape(n, *shape),
        shape=shape,
        columns=columns,
        model=model,
        toml_extra=extra,
    )


def _fit(toml: Path):
    study = load_study(toml)
    maps, warns = fit_study(study)
    return study, {gm.contrast: gm for gm in maps}, warns


def _drug_within(rng, m, per, n_vox, *, mean_drug=0.4, slope_sd=0.9):
    """Runs alternating drug/vehicle within every animal; the drug effect differs
    between animals (a random slope)."""
    animal = np.repeat(np.arange(m), per)
    drug = np.tile([0.0, 1.0], m * per // 2)
    u0 = rng.normal(0, 1.0, (m, n_vox))
    u1 = rng.normal(0, slope_sd, (m, n_vox))
    y = 2.0 + mean_drug * drug[:, None] + u0[animal] + drug[:, None] * u1[animal]
    return animal, drug, y + rng.normal(0, 0.7, y.shape)


# --- levels of the design (formulaic model matrices; common practice) ---------------


def test_levels_animal_session_run():
    runs = pd.DataFrame(
        {
            "animal": list("aaaabbbbcccc"),
            "session": ["1", "1", "2", "2"] * 3,
            "group": list("xxxxyyyyxxxx"),
            "drug": [0.0, 0.0, 1.0, 1.0] * 3,
            "motion": [0.1, 0.3, 0.2, 0.5, 0.4, 0.1, 0.2, 0.3, 0.6, 0.2, 0.1, 0.0],
        }
    )
    d = build_design(runs, "1 + group + drug + motion")
    assert d.columns == ("Intercept", "group[T.y]", "drug", "motion")
    assert d.level == ("animal", "animal", "session", "run")
    # sessions nested in animals: session "1" of a and of b are two sessions
    assert d.session.tolist() == [0, 0, 1, 1, 2, 2, 3, 3, 4, 4, 5, 5]
    assert d.session_ids == ("a/1", "a/2", "b/1", "b/2", "c/1", "c/2")
    X = np.array([[1, 0], [1, 1], [1, 0], [1, 1]], float)
    assert column_levels(X, np.array([0, 0, 1, 1]), np.array([0, 0, 1, 1])) == (
        "animal",
        "run",
    )


def _runs(m, per, **cols):
    animal = np.repeat(np.arange(m), per)
    frame = pd.DataFrame({"animal": [f"a{a}" for a in animal], **cols})
    return frame


def test_auto_slopes_only_for_tested_within_animal_columns():
    m, per = 6, 4
    rng = np.random.default_rng(0)
    runs = _runs(
        m,
        per,
        drug=np.tile([0.0, 1.0], m * per // 2),
        motion=rng.normal(size=m * per),
        group=np.repeat(["c", "t"], m * per // 2),
    )
    d = build_design(runs, "1 + group * drug + motion")
    on_drug = np.array([0, 0, 1, 0, 0], float)
    on_group = np.array([0, 1, 0, 0, 0], float)
    re = random_effects(d, runs, [on_drug])
    assert [d.columns[j] for j in re.slope_columns] == ["drug"]
    # the drug-by-group column is the drug slope times the group indicator
    inter = d.columns.index("group[T.t]:drug")
    assert re.terms[inter].slope == 0
    assert re.terms[inter].moderator.tolist() == [0, 0, 0, 1, 1, 1]
    assert re.terms[d.columns.index("motion")] is None  # nuisance: no slope
    assert random_effects(d, runs, [on_group]).slope_columns == ()
    assert random_effects(d, runs, [on_drug], random_slopes="none").slope_columns == ()
    listed = random_effects(d, runs, [on_group], random_slopes=("motion",))
    assert [d.columns[j] for j in listed.slope_columns] == ["motion"]
    with pytest.raises(UserError, match="not a formula variable that varies within"):
        random_effects(d, runs, [on_drug], random_slopes=("group",))


# --- (a) drug within animals against statsmodels MixedLM ----------------------------


def test_within_animal_effect_matches_statsmodels_random_slope(tmp_path):
    # statsmodels MixedLM (REML) with re_formula="1 + drug": the same model, fitted
    # voxel by voxel; df = animals - 1 (containment rule, Pinheiro & Bates 2000,
    # section from memory).
    rng = np.random.default_rng(11)
    m, per, shape = 7, 6, (2, 2, 1)
    animal, drug, y = _drug_within(rng, m, per, 4)
    toml = _study(
        tmp_path / "s", y, animal, shape, columns={"drug": drug}, model='formula = "1 + drug"'
    )
    _, maps, _ = _fit(toml)
    gm = maps["drug"]
    assert gm.tested_level == "slope"
    assert "slope[drug]" in gm.components and "cov[drug]" in gm.components
    np.testing.assert_array_equal(gm.df, m - 1)
    for v in range(4):
        data = pd.DataFrame({"y": y[:, v], "drug": drug, "animal": animal})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = smf.mixedlm("y ~ drug", data, groups="animal", re_formula="1 + drug").fit(
                reml=True, method=["lbfgs"], gtol=1e-10
            )
        np.testing.assert_allclose(gm.effect[v], ref.fe_params["drug"], rtol=1e-4)
        np.testing.assert_allclose(gm.se[v], ref.bse_fe["drug"], rtol=1e-4)
        np.testing.assert_allclose(
            gm.components["slope[drug]"][v], ref.cov_re.iloc[1, 1], rtol=1e-3
        )


# --- (b) null calibration of the whole path -----------------------------------------


@pytest.mark.slow
def test_within_animal_null_calibration(tmp_path):
    # Each of 2048 voxels is an independent null study (no mean drug effect, but the
    # effect differs between animals). At alpha = 0.05 the false-positive rate must lie
    # in the 95% acceptance region of the exact binomial test of 0.05
    # (scipy.stats.binomtest); without the random slope it must not (the
    # anti-conservative case the slope exists for). Measured with this generator on four
    # seeds (2024, 1, 2, 3): 0.042, 0.046, 0.045, 0.053 with the slope — slightly
    # conservative on average; seed 1 sits at the average, away from the interval's
    # edges.
    rng = np.random.default_rng(1)
    m, per, shape = 8, 4, (16, 16, 8)
    n_vox = int(np.prod(shape))
    animal, drug, _ = _drug_within(rng, m, per, 1)
    s2 = rng.uniform(0.05, 0.4, (m * per, n_vox))
    y = (
        rng.normal(0, 1.0, (m, n_vox))[animal]
        + drug[:, None] * rng.normal(0, 0.8, (m, n_vox))[animal]
        + rng.normal(0, np.sqrt(0.2 + s2))
    )
    rates = {}
    for slopes in ("auto", "none"):
        toml = _study(
            tmp_path / slopes,
            y,
            animal,
            shape,
            columns={"drug": drug},
            model=f'formula = "1 + drug"\nrandom_slopes = "{slopes}"',
            variances=s2,
        )
        _, maps, _ = _fit(toml)
        p = maps["drug"].p
        assert p.size == n_vox and np.isfinite(p).all()
        k = int((p < 0.05).sum())
        rates[slopes] = (k, stats.binomtest(k, n_vox, 0.05).pvalue)
    k_auto, p_auto = rates["auto"]
    assert p_auto > 0.05, f"FPR {k_auto / n_vox:.4f} outside the binomial interval of 0.05"
    k_none, p_none = rates["none"]
    assert k_none / n_vox > 0.05 and p_none < 0.05  # too many false positives


# --- (c) sessions nested in animals against statsmodels variance components ----------


def test_session_variance_matches_statsmodels_vc_formula(tmp_path):
    # statsmodels MixedLM (REML) with re_formula="1" and vc_formula={"session":
    # "0 + C(session)"}: a random intercept per animal and a variance component for
    # sessions within animals. Tolerance 1e-3: statsmodels' optimiser stops within a
    # few 1e-4 of the optimum (our REML log-likelihood is the higher one there).
    rng = np.random.default_rng(5)
    m, n_sess, per, shape = 6, 3, 3, (4, 3, 2)
    n_vox = 24
    animal = np.repeat(np.arange(m), n_sess * per)
    session = np.tile(np.repeat(np.arange(n_sess), per), m)
    code = animal * n_sess + session
    y = (
        1.0
        + rng.normal(0, 1.0, (m, n_vox))[animal]
        + rng.normal(0, 0.8, (m * n_sess, n_vox))[code]
        + rng.normal(0, 0.5, (m * n_sess * per, n_vox))
    )
    toml = _study(
        tmp_path / "s",
        y,
        animal,
        shape,
        columns={"session": [f"d{s}" for s in session]},
        model='formula = "1"',
        extra=NO_PERMUTATIONS,
    )
    study, maps, _ = _fit(toml)
    assert study.first_levels[0].random.sessions
    gm = maps["mean"]
    out = write_outputs(study, list(maps.values()), tmp_path / "out")
    var_session = np.asarray(nib.load(str(out / "mean" / "var_session.nii.gz")).dataobj)
    summary = json.loads((out / "summary.json").read_text())["results"]["mean"]
    assert summary["variance_components"]["session"]["map"] == "var_session.nii.gz"
    assert summary["sessions"] == m * n_sess and summary["design_levels"] == {"Intercept": "animal"}
    assert "a session level" in summary["random_effects"]
    assert "a session level" in (out / "methods.md").read_text()
    var_session = var_session.reshape(-1)  # the mask is the whole grid, C order
    for v in range(3):
        data = pd.DataFrame({"y": y[:, v], "animal": animal, "session": session})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = smf.mixedlm(
                "y ~ 1",
                data,
                groups="animal",
                re_formula="1",
                vc_formula={"session": "0 + C(session)"},
            ).fit(reml=True, method=["lbfgs"], gtol=1e-10)
        np.testing.assert_allclose(var_session[v], ref.vcomp[0], rtol=1e-3)
        np.testing.assert_allclose(gm.var_animal[v], ref.cov_re.iloc[0, 0], rtol=1e-3)
        np.testing.assert_allclose(gm.var_run[v], ref.scale, rtol=1e-3)
        np.testing.assert_allclose(gm.se[v], ref.bse_fe["Intercept"], rtol=1e-3)
    # the effect's df stays animals - 1
    np.testing.assert_array_equal(gm.df, m - 1)


def test_single_session_per_level_leaves_sessions_out():
    # one drug and one vehicle session per animal with a random drug slope: the
    # session variance is not identified apart from the slope (our own rule,
    # docs/model.md), so "auto" leaves it out and "model" says why.
    m = 4
    runs = _runs(
        m,
        4,
        session=np.tile(["v", "v", "d", "d"], m),
        drug=np.tile([0.0, 0.0, 1.0, 1.0], m),
    )
    d = build_design(runs, "1 + drug")
    on_drug = np.array([0.0, 1.0])
    assert not random_effects(d, runs, [on_drug]).sessions
    assert random_effects(d, runs, [on_drug], random_slopes="none").sessions
    with pytest.raises(UserError, match='sessions = "model" needs an animal with two'):
        random_effects(d, runs, [on_drug], sessions="model")


# --- (d) sign flips of whole animals' own effects -----------------------------------


def _reml_one_sample(b: np.ndarray, v: np.ndarray) -> float:
    """t of the mean of b_a ~ N(mu, tau2 + v_a), tau2 by REML (written for this test)."""

    def negative(tau2: float) -> float:
        w = 1.0 / (tau2 + v)
        mu = np.sum(w * b) / np.sum(w)
        return 0.5 * (np.sum(np.log(tau2 + v)) + np.log(np.sum(w)) + np.sum(w * (b - mu) ** 2))

    hi = 100.0 * (np.var(b) + v.max())
    res = optimize.minimize_scalar(
        negative, bounds=(0.0, hi), method="bounded", options={"xatol": 1e-12}
    )
    tau2 = res.x if negative(res.x) < negative(0.0) else 0.0
    w = 1.0 / (tau2 + v)
    return float(np.sum(w * b) / np.sqrt(np.sum(w)))


def test_within_animal_sign_flips_equal_brute_force(tmp_path):
    # Exhaustive sign flips of 5 animals' own drug effects (2^5 = 32), enumerated here
    # by brute force: per animal, the weighted least-squares drug effect of its runs
    # with weights 1/(var_run + s_k^2); the one-sample REML t of those effects; z at
    # equal p on animals - 1 df (Winkler et al. 2015, NeuroImage 123:253, for the
    # scheme; scipy.optimize for the REML).
    rng = np.random.default_rng(8)
    m, per, shape = 5, 4, (2, 1, 1)
    animal, drug, y = _drug_within(rng, m, per, 2, mean_drug=0.8)
    s2 = rng.uniform(0.1, 0.4, y.shape)
    extra = "\n[inference]\npermutations = 1000\ntfce = false\n" + CONTRAST_DRUG
    toml = _study(
        tmp_path / "s",
        y,
        animal,
        shape,
        columns={"drug": drug},
        model='formula = "1 + drug"',
        extra=extra,
        variances=s2,
    )
    _, maps, _ = _fit(toml)
    gm = maps["drug"]
    perm = gm.inference.permutation
    assert perm.scheme.exhaustive and perm.scheme.n == 2**m and perm.scheme.kind == "sign flips"
    effects = np.zeros((2, m))
    var = np.zeros((2, m))
    for v in range(2):
        w = 1.0 / (gm.var_run[v] + s2[:, v])
        for a in range(m):
            rows = animal == a
            Xa = np.column_stack([np.ones(rows.sum()), drug[rows]])
            M = Xa.T @ (w[rows, None] * Xa)
            coef = np.linalg.solve(M, Xa.T @ (w[rows] * y[rows, v]))
            effects[v, a] = coef[1]
            var[v, a] = np.linalg.inv(M)[1, 1]
    df = m - 1
    null_max = []
    for signs in itertools.product([1.0, -1.0], repeat=m):
        t = [_reml_one_sample(np.array(signs) * effects[v], var[v]) for v in range(2)]
        z = np.abs(stats.norm.isf(stats.t.sf(np.abs(t), df)))
        null_max.append(z.max())
    null_max = np.array(null_max)
    np.testing.assert_allclose(np.sort(perm.null_max_stat), np.sort(null_max), atol=2e-3)
    observed = np.abs(
        stats.norm.isf(
            stats.t.sf(np.abs([_reml_one_sample(effects[v], var[v]) for v in range(2)]), df)
        )
    )
    brute_p = [(null_max >= o - 1e-6).mean() for o in observed]
    np.testing.assert_array_equal(perm.p_fwe_voxel, brute_p)


# --- (e) a run-level nuisance covariate ----------------------------------------------


def test_run_level_nuisance_gets_no_slope_and_keeps_the_animal_df(tmp_path):
    # A run's motion, tested by no contrast, stays a fixed effect: the group contrast
    # keeps animals - 2 df (containment rule, Pinheiro & Bates 2000, from memory) and
    # equals statsmodels MixedLM "y ~ group + motion" with a random intercept.
    rng = np.random.default_rng(3)
    m, per, shape = 8, 4, (2, 2, 1)
    animal = np.repeat(np.arange(m), per)
    group = np.where(animal < 4, "c", "t")
    motion = rng.normal(0, 1, m * per)
    y = (
        1.0
        + 0.5 * (group == "t")[:, None]
        + 0.3 * motion[:, None]
        + rng.normal(0, 1, (m, 4))[animal]
        + rng.normal(0, 0.6, (m * per, 4))
    )
    extra = NO_PERMUTATIONS + '\n[[contrast]]\nname = "t_vs_c"\nweights = { "group[T.t]" = 1 }\n'
    toml = _study(
        tmp_path / "s",
        y,
        animal,
        shape,
        columns={"group": list(group), "motion": motion},
        model='formula = "1 + group + motion"',
        extra=extra,
    )
    study, maps, _ = _fit(toml)
    assert study.first_levels[0].random.slope_columns == ()
    assert study.first_levels[0].design.level[-1] == "run"
    gm = maps["t_vs_c"]
    np.testing.assert_array_equal(gm.df, m - 2)
    for v in range(4):
        data = pd.DataFrame({"y": y[:, v], "group": group, "motion": motion, "animal": animal})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = smf.mixedlm("y ~ group + motion", data, groups="animal").fit(
                reml=True, method=["lbfgs"], gtol=1e-10
            )
        np.testing.assert_allclose(gm.effect[v], ref.fe_params["group[T.t]"], rtol=1e-4)
        np.testing.assert_allclose(gm.se[v], ref.bse_fe["group[T.t]"], rtol=1e-4)
    # the same study without motion: same df
    toml2 = _study(
        tmp_path / "s2",
        y,
        animal,
        shape,
        columns={"group": list(group)},
        model='formula = "1 + group"',
        extra=extra,
    )
    _, maps2, _ = _fit(toml2)
    np.testing.assert_array_equal(maps2["t_vs_c"].df, gm.df)


# --- (f) clear refusals at check time ------------------------------------------------


def _check(toml: Path, capsys) -> tuple[int, str]:
    code = main(["check", str(toml)])
    out = capsys.readouterr()
    return code, out.out + out.err


def _small(tmp_path, model: str, extra: str, **cols) -> Path:
    rng = np.random.default_rng(1)
    m, per = 6, 4
    animal = np.repeat(np.arange(m), per)
    columns = {
        "drug": np.tile([0.0, 1.0], m * per // 2),
        "group": list(np.where(animal < 3, "c", "t")),
        **cols,
    }
    y = rng.normal(size=(m * per, 2))
    return _study(tmp_path / "s", y, animal, (2, 1, 1), columns=columns, model=model, extra=extra)


@pytest.mark.parametrize(
    ("model", "extra", "expected"),
    [
        (
            'formula = "1 + group"\nvariance_groups = "group"',
            "min_coverage = 0.8\n\n[inference]\npermutations = 100\n",
            "[inference] permutations = 100 with [model] variance_groups = 'group' needs data",
        ),
        (
            'formula = "1 + drug"\nrandom_slopes = "none"',
            "\n[inference]\npermutations = 100\n" + CONTRAST_DRUG,
            "have no random slope, so animals' own effects cannot be exchanged",
        ),
        (
            'formula = "1 + drug"',
            '\n[inference]\npermutations = 100\n[[contrast]]\nname = "on_drug"\n'
            "weights = { Intercept = 1, drug = 1 }\n",
            "mixes animal-level and within-animal columns",
        ),
        (
            'formula = "1 + drug"\nrandom_slopes = ["group"]',
            NO_PERMUTATIONS,
            "random_slopes names 'group', which is not a formula variable",
        ),
        (
            'formula = "1 + drug"\nsessions = "model"',
            NO_PERMUTATIONS,
            'sessions = "model" needs an animal with two or more sessions',
        ),
        (
            'formula = "1"\nvariance_groups = "drug"',
            NO_PERMUTATIONS,
            "the column varies within animal a0",
        ),
        (
            'formula = "1"\nrandom_slopes = "some"',
            NO_PERMUTATIONS,
            '[model] random_slopes: must be "auto", "none" or a list',
        ),
    ],
)
def test_refusals_name_the_key_and_the_fix(tmp_path, capsys, model, extra, expected):
    code, text = _check(_small(tmp_path, model, extra), capsys)
    assert code == 2, text
    assert expected in text


def test_no_slope_on_a_tested_within_effect_is_cautioned(tmp_path, capsys):
    toml = _small(
        tmp_path, 'formula = "1 + drug"\nrandom_slopes = "none"', NO_PERMUTATIONS + CONTRAST_DRUG
    )
    code, text = _check(toml, capsys)
    assert code == 0, text
    assert "without a random slope per animal" in text and "anti-conservative" in text


def test_check_names_the_random_effects_it_will_fit(tmp_path, capsys):
    # `check` says which random effects `run` fits: with the default random_slopes =
    # "auto", the tested within-animal drug effect gets its slope per animal
    toml = _small(tmp_path, 'formula = "1 + drug"', NO_PERMUTATIONS + CONTRAST_DRUG)
    code, text = _check(toml, capsys)
    assert code == 0, text
    (line,) = [x for x in text.splitlines() if x.startswith("  random ")]
    assert "a random intercept per animal" in line and "drug" in line and "slope" in line
    assert "random intercept per animal, run variance" not in text  # no blanket claim


# --- per-group between-animal variances ----------------------------------------------


def _two_groups(rng, n_vox, sd_small, sd_large):
    m_small, m_large, per = 4, 8, 3
    m = m_small + m_large
    animal = np.repeat(np.arange(m), per)
    group = np.where(animal < m_small, "few", "many")
    sd = np.where(np.arange(m) < m_small, sd_small, sd_large)
    u = rng.normal(0, 1, (m, n_vox)) * sd[:, None]
    y = u[animal] + rng.normal(0, 0.5, (m * per, n_vox))
    return animal, group, y


def test_unequal_group_variability_warns_and_variance_groups_fit(tmp_path):
    # The smaller group is twice as variable (SD): run warns and suggests the setting;
    # with it, one variance per group is fitted and written, and the group difference's
    # df follows Satterthwaite's (Welch-type) approximation, below the pooled
    # animals - 2 (Welch 1947, Biometrika 34:28).
    rng = np.random.default_rng(4)
    shape = (8, 8, 4)
    animal, group, y = _two_groups(rng, int(np.prod(shape)), 2.0, 1.0)
    contrast = '\n[[contrast]]\nname = "diff"\nweights = { "group[T.many]" = 1 }\n'
    toml = _study(
        tmp_path / "a",
        y,
        animal,
        shape,
        columns={"group": list(group)},
        model='formula = "1 + group"',
        extra=NO_PERMUTATIONS + contrast,
    )
    _, _, warns = _fit(toml)
    assert any('variance_groups = "group"' in w for w in warns), warns
    toml = _study(
        tmp_path / "b",
        y,
        animal,
        shape,
        columns={"group": list(group)},
        model='formula = "1 + group"\nvariance_groups = "group"',
        extra=NO_PERMUTATIONS + contrast,
    )
    study, maps, warns = _fit(toml)
    assert not any("variance_groups" in w for w in warns)
    gm = maps["diff"]
    assert {"animal[few]", "animal[many]"} <= set(gm.components)
    assert np.median(gm.components["animal[few]"]) > np.median(gm.components["animal[many]"])
    assert np.all(gm.df <= 10) and np.median(gm.df) < 10
    out = write_outputs(study, list(maps.values()), tmp_path / "out")
    assert (out / "diff" / "var_animal_few.nii.gz").is_file()


def test_equal_group_variability_does_not_warn(tmp_path):
    rng = np.random.default_rng(6)
    shape = (8, 8, 2)
    animal, group, y = _two_groups(rng, int(np.prod(shape)), 1.0, 1.0)
    toml = _study(
        tmp_path / "a",
        y,
        animal,
        shape,
        columns={"group": list(group)},
        model='formula = "1 + group"',
        extra=NO_PERMUTATIONS,
    )
    _, _, warns = _fit(toml)
    assert not any("variance_groups" in w for w in warns), warns


# --- the per-animal reduction behind within-animal permutations ----------------------


def test_animal_effect_data_equals_dense_gls_per_animal():
    # Each animal's own GLS estimate and precision, against the textbook GLS formulas
    # with the dense covariance diag(sigma2 + s2) + omega2 * same-session (common
    # practice: b = (X'V^-1 X)^-1 X'V^-1 y, Var b = (X'V^-1 X)^-1), with a run missing.
    from grouplevel.inference.permutation import animal_effect_data, animal_level_data

    rng = np.random.default_rng(21)
    m, per, n_vox = 4, 6, 5
    animal = np.repeat(np.arange(m), per)
    session = animal * 2 + np.tile([0, 0, 0, 1, 1, 1], m)
    drug = np.tile([0.0, 1.0, 1.0, 0.0, 1.0, 0.0], m)
    y = rng.normal(size=(m * per, n_vox))
    s2 = rng.uniform(0.1, 0.5, y.shape)
    y[3, 2] = np.nan
    var_run = rng.uniform(0.1, 0.3, n_vox)
    omega = rng.uniform(0.05, 0.4, n_vox)
    G = np.ones((m, 1))
    data = animal_effect_data(
        y,
        s2,
        drug[:, None],
        1,
        animal,
        G,
        var_run,
        np.ones(n_vox),
        session=session,
        var_session=omega,
    )
    for a in range(m):
        for v in range(n_vox):
            rows = np.flatnonzero((animal == a) & np.isfinite(y[:, v]))
            X = np.column_stack([np.ones(rows.size), drug[rows]])
            same = session[rows][:, None] == session[rows][None, :]
            V = np.diag(var_run[v] + s2[rows, v]) + omega[v] * same
            Vi = np.linalg.inv(V)
            cov = np.linalg.inv(X.T @ Vi @ X)
            b = cov @ X.T @ Vi @ y[rows, v]
            np.testing.assert_allclose(data.mean[v, a], b[1], rtol=1e-10)
            np.testing.assert_allclose(data.precision[v, a], 1.0 / cov[1, 1], rtol=1e-10)
    # without slopes and sessions, the animal's intercept is the precision-weighted mean
    # of its runs: the same numbers as the random-intercept reduction
    ones = np.ones((m * per, 1))
    plain = animal_effect_data(y, s2, np.zeros((m * per, 0)), 0, animal, G, var_run, np.ones(n_vox))
    ref = animal_level_data(y, s2, ones, animal, var_run, np.ones(n_vox))
    np.testing.assert_allclose(plain.mean, ref.mean, rtol=1e-10)
    np.testing.assert_allclose(plain.precision, ref.precision, rtol=1e-10)


def test_drug_by_group_interaction_matches_statsmodels(tmp_path):
    # A drug effect that differs between groups of animals: the interaction column is
    # the drug slope times the group indicator, so it is judged against the animals'
    # own drug effects with animals - 2 df. Reference: statsmodels MixedLM (REML),
    # "y ~ group * drug" with re_formula="1 + drug" (Nelder-Mead then BFGS: its
    # default L-BFGS stops up to 3e-4 short of the optimum in the SE here).
    rng = np.random.default_rng(12)
    m, per, shape = 8, 4, (2, 2, 1)
    animal, drug, y = _drug_within(rng, m, per, 4)
    group = np.where(animal < 4, "c", "t")
    extra = (
        NO_PERMUTATIONS
        + '\n[[contrast]]\nname = "drug_by_group"\nweights = { "group[T.t]:drug" = 1 }\n'
    )
    toml = _study(
        tmp_path / "s",
        y,
        animal,
        shape,
        columns={"drug": drug, "group": list(group)},
        model='formula = "1 + group * drug"',
        extra=extra,
    )
    study, maps, _ = _fit(toml)
    random = study.first_levels[0].random
    assert [study.first_levels[0].design.columns[j] for j in random.slope_columns] == ["drug"]
    gm = maps["drug_by_group"]
    assert gm.tested_level == "slope"
    np.testing.assert_array_equal(gm.df, m - 2)
    for v in range(4):
        data = pd.DataFrame({"y": y[:, v], "drug": drug, "group": group, "animal": animal})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = smf.mixedlm("y ~ group * drug", data, groups="animal", re_formula="1 + drug").fit(
                reml=True, method=["nm", "bfgs"], gtol=1e-12, maxiter=5000
            )
        name = "group[T.t]:drug"
        np.testing.assert_allclose(gm.effect[v], ref.fe_params[name], rtol=1e-4)
        np.testing.assert_allclose(gm.se[v], ref.bse_fe[name], rtol=1e-4)


def test_chunked_general_fit_equals_one_fit():
    # compute._concatenate joins voxel chunks of the general model (its dict of
    # components too): the same numbers as one fit of all voxels (each voxel is fitted
    # on its own; common practice).
    from grouplevel.compute import _concatenate
    from grouplevel.model.mixed import fit_mixed

    rng = np.random.default_rng(2)
    animal, drug, y = _drug_within(rng, 6, 4, 12)
    X = np.column_stack([np.ones(drug.size), drug])
    kw = {"slopes": drug[:, None], "slope_names": ("drug",)}
    whole = fit_mixed(y, None, X, animal, **kw)
    parts = _concatenate(
        [fit_mixed(y[:, :5], None, X, animal, **kw), fit_mixed(y[:, 5:], None, X, animal, **kw)]
    )
    np.testing.assert_allclose(parts.beta, whole.beta, rtol=1e-12)
    assert set(parts.components) == set(whole.components)
    for name, values in whole.components.items():
        np.testing.assert_allclose(parts.components[name], values, rtol=1e-12)


def test_satterthwaite_df_of_a_slope_in_a_balanced_design(tmp_path):
    # In a balanced design REML equals ANOVA at interior estimates, and the drug
    # effect's variance is the animal-by-drug mean square over animals, with animals - 1
    # df: Satterthwaite's df is exactly that (common practice for balanced designs).
    rng = np.random.default_rng(12)
    m, per, shape = 7, 6, (2, 2, 1)
    animal, drug, y = _drug_within(rng, m, per, 4)
    toml = _study(
        tmp_path / "s",
        y,
        animal,
        shape,
        columns={"drug": drug},
        model='formula = "1 + drug"\ndf = "satterthwaite"',
    )
    _, maps, _ = _fit(toml)
    assert np.all(maps["drug"].components["slope[drug]"] > 0)
    np.testing.assert_allclose(maps["drug"].df, m - 1, rtol=1e-6)


def test_variance_group_permutations_equal_brute_force_welch(tmp_path):
    # With variance groups, whole animals are sign-flipped (symmetric errors need no
    # equal variances) and the statistic is the G statistic, for two group means the
    # Aspin-Welch v (Winkler et al. 2014, NeuroImage 92:381, Appendix A; Welch 1947,
    # Biometrika 34:28). Brute force here: the 2^6 flips of the animals' deviations
    # from the overall mean, Welch's v written out, z at equal p on the map's df.
    rng = np.random.default_rng(31)
    m, per, shape = 6, 3, (2, 1, 1)
    animal = np.repeat(np.arange(m), per)
    group = np.where(animal < 3, "few", "many")
    sd = np.where(np.arange(m) < 3, 2.0, 1.0)
    y = (
        0.8 * (group == "many")[:, None]
        + (rng.normal(0, 1, (m, 2)) * sd[:, None])[animal]
        + rng.normal(0, 0.5, (m * per, 2))
    )
    s2 = rng.uniform(0.1, 0.3, y.shape)
    extra = (
        "\n[inference]\npermutations = 1000\ntfce = false\n"
        '\n[[contrast]]\nname = "diff"\nweights = { "group[T.many]" = 1 }\n'
    )
    toml = _study(
        tmp_path / "s",
        y,
        animal,
        shape,
        columns={"group": list(group)},
        model='formula = "1 + group"\nvariance_groups = "group"',
        extra=extra,
        variances=s2,
    )
    _, maps, _ = _fit(toml)
    gm = maps["diff"]
    perm = gm.inference.permutation
    assert perm.scheme.kind == "sign flips" and perm.scheme.n == 2**m
    means = np.zeros((2, m))
    for v in range(2):
        w = 1.0 / (gm.var_run[v] + s2[:, v])
        for a in range(m):
            rows = animal == a
            means[v, a] = np.sum(w[rows] * y[rows, v]) / np.sum(w[rows])
    few = np.arange(m) < 3

    def welch_z(b: np.ndarray, df: float) -> float:
        v = (b[~few].mean() - b[few].mean()) / np.sqrt(
            b[few].var(ddof=1) / few.sum() + b[~few].var(ddof=1) / (~few).sum()
        )
        return float(stats.norm.isf(stats.t.sf(abs(v), df)))

    null_max = []
    for signs in itertools.product([1.0, -1.0], repeat=m):
        z = []
        for v in range(2):
            centre = means[v].mean()
            z.append(welch_z(centre + np.array(signs) * (means[v] - centre), gm.df[v]))
        null_max.append(max(z))
    null_max = np.array(null_max)
    np.testing.assert_allclose(np.sort(perm.null_max_stat), np.sort(null_max), atol=2e-3)
    observed = [welch_z(means[v], gm.df[v]) for v in range(2)]
    np.testing.assert_array_equal(
        perm.p_fwe_voxel, [(null_max >= o - 1e-6).mean() for o in observed]
    )


@pytest.mark.slow
def test_variance_groups_equal_welch_and_null_rates(tmp_path):
    # 4 vs 8 animals with 3 runs each, the small group's between-animal SD twice the
    # other's, no group difference; 2048 independent null voxels. With variance groups
    # the group difference is Welch's test of the animal means: t and df equal
    # scipy.stats.ttest_ind(equal_var=False) wherever both groups' variances are
    # estimated inside the parameter space (balanced data: REML equals ANOVA there), and
    # the false-positive rate at 0.05 is Welch's (itself slightly liberal with 4 animals
    # in a group: about 0.06-0.07 here). With one pooled variance it is far higher.
    rng = np.random.default_rng(99)
    shape = (16, 16, 8)
    n_vox = int(np.prod(shape))
    animal, group, y = _two_groups(rng, n_vox, 2.0, 1.0)
    contrast = '\n[[contrast]]\nname = "diff"\nweights = { "group[T.many]" = 1 }\n'
    maps = {}
    for key, setting in (("pooled", ""), ("groups", 'variance_groups = "group"')):
        toml = _study(
            tmp_path / key,
            y,
            animal,
            shape,
            columns={"group": list(group)},
            model='formula = "1 + group"\n' + setting,
            extra=NO_PERMUTATIONS + contrast,
        )
        maps[key] = _fit(toml)[1]["diff"]
    m = int(animal.max()) + 1
    means = np.stack([y[animal == a].mean(axis=0) for a in range(m)])
    many = np.array([group[animal == a][0] == "many" for a in range(m)])
    welch = stats.ttest_ind(means[many], means[~many], equal_var=False, axis=0)
    gm = maps["groups"]
    interior = (gm.components["animal[few]"] > 1e-6) & (gm.components["animal[many]"] > 1e-6)
    assert interior.mean() > 0.9
    np.testing.assert_allclose(gm.t[interior], welch.statistic[interior], rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(gm.df[interior], welch.df[interior], rtol=1e-5)
    rate = {key: float((g.p < 0.05).mean()) for key, g in maps.items()}
    assert abs(rate["groups"] - float((welch.pvalue < 0.05).mean())) <= 0.002, rate
    k_pooled = int(round(rate["pooled"] * n_vox))
    assert stats.binomtest(k_pooled, n_vox, 0.05).pvalue < 0.05 and rate["pooled"] > 0.09, rate
    assert rate["groups"] < rate["pooled"] - 0.03, rate


def test_animal_without_the_condition_takes_no_part(tmp_path):
    # An animal with vehicle runs only carries no information on the drug effect: the
    # df count the 5 informative animals (5 - 1), and the exhaustive sign flips are the
    # 2^5 of those animals, not 2^6 (flipping an animal without information changes
    # nothing; counting it would halve the smallest attainable p). Counting rule:
    # common practice for exact permutation tests.
    rng = np.random.default_rng(40)
    m, per, shape = 6, 4, (2, 1, 1)
    animal, drug, y = _drug_within(rng, m, per, 2)
    drug[animal == 0] = 0.0
    extra = "\n[inference]\npermutations = 1000\ntfce = false\n" + CONTRAST_DRUG
    toml = _study(
        tmp_path / "s",
        y,
        animal,
        shape,
        columns={"drug": drug},
        model='formula = "1 + drug"',
        extra=extra,
    )
    study, maps, _ = _fit(toml)
    gm = maps["drug"]
    np.testing.assert_array_equal(gm.df, 4)
    scheme = gm.inference.permutation.scheme
    assert scheme.exhaustive and scheme.n == 2**5
    assert scheme.smallest_p == pytest.approx(2 / 2**5)
    # what `check` prints (and summary.json's design section) is the scheme run uses
    (told,) = design_description(study, study.first_levels[0])["contrasts"]
    assert told["permutation"]["kind"] == "sign flips"
    assert told["permutation"]["permutations"] == 2**5
    assert told["permutation"]["smallest_attainable_p"] == pytest.approx(2 / 2**5)


def test_difference_of_two_conditions_within_animals(tmp_path):
    # Three conditions alternated within every animal, each non-reference level with a
    # random slope. "b minus c" combines two slopes: df = animals - 1, and in this
    # balanced design its t equals the one-sample t of the animals' own b - c
    # differences (scipy.stats.ttest_1samp) wherever the 3 x 3 random-effects
    # covariance is estimated inside the parameter space (REML equals ANOVA there;
    # common practice). Its permutations flip the signs of the animals' own b - c
    # differences (2^10, exhaustive). (statsmodels MixedLM does not reach the REML
    # optimum of this 3 x 3 covariance reliably, so it is not the reference here.)
    rng = np.random.default_rng(17)
    m, per, shape = 10, 6, (3, 2, 1)
    n_vox = 6
    animal = np.repeat(np.arange(m), per)
    cond = np.tile(["a", "b", "c"], m * per // 3)
    level = np.searchsorted(["a", "b", "c"], cond)
    y = (
        rng.normal(0, 1, (m, n_vox))[animal]
        + rng.normal(0, 1.0, (m, 3, n_vox))[animal, level]
        + rng.normal(0, 0.6, (m * per, n_vox))
    )
    extra = (
        "\n[inference]\npermutations = 2000\ntfce = false\n"
        '\n[[contrast]]\nname = "b_vs_c"\nweights = { "cond[T.b]" = 1, "cond[T.c]" = -1 }\n'
    )
    toml = _study(
        tmp_path / "s",
        y,
        animal,
        shape,
        columns={"cond": list(cond)},
        model='formula = "1 + cond"',
        extra=extra,
    )
    _, maps, _ = _fit(toml)
    gm = maps["b_vs_c"]
    assert gm.tested_level == "slopes"
    np.testing.assert_array_equal(gm.df, m - 1)
    scheme = gm.inference.permutation.scheme
    assert scheme.kind == "sign flips" and scheme.exhaustive and scheme.n == 2**m
    k = gm.components
    T = np.array(
        [
            [k["animal"], k["cov[cond[T.b]]"], k["cov[cond[T.c]]"]],
            [k["cov[cond[T.b]]"], k["slope[cond[T.b]]"], k["cov[cond[T.b],cond[T.c]]"]],
            [k["cov[cond[T.c]]"], k["cov[cond[T.b],cond[T.c]]"], k["slope[cond[T.c]]"]],
        ]
    ).transpose(2, 0, 1)
    interior = np.linalg.eigvalsh(T)[:, 0] > 1e-6
    assert interior.sum() >= 3
    diff = np.stack(
        [
            y[(animal == a) & (cond == "b")].mean(axis=0)
            - y[(animal == a) & (cond == "c")].mean(axis=0)
            for a in range(m)
        ]
    )
    ref = stats.ttest_1samp(diff, 0.0, axis=0)
    np.testing.assert_allclose(gm.effect, diff.mean(axis=0), rtol=1e-6)
    np.testing.assert_allclose(gm.t[interior], ref.statistic[interior], rtol=1e-5)
