"""F-tests from the command line: a study with a three-level factor.

Sources:
- statsmodels OLS ``f_test`` on the animals' values (one run per animal and no
  first-level variances: the random-intercept model is ordinary least squares);
- the NIfTI-1 standard's intent code NIFTI_INTENT_FTEST (4) with the numerator and
  denominator degrees of freedom as its two parameters (nibabel.nifti1.intent_codes);
- textbook combinatorics: 9!/(3!3!3!) = 1680 distinct assignments of 9 animals to three
  doses of 3 (Feller 1968, vol. 1, ch. II).
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest
import statsmodels.api as sm

from grouplevel.cli import main
from grouplevel.outputs.folder import foreign_reason
from tests.conftest import write_study

SHAPE = (4, 3, 2)
DOSES = ["none", "low", "high"]


def _study(folder, toml_extra: str = "", seed: int = 5):
    rng = np.random.default_rng(seed)
    animals = [f"m{i}" for i in range(9)]
    dose = [DOSES[i % 3] for i in range(9)]
    shift = np.array([{"none": 0.0, "low": 0.4, "high": 1.6}[d] for d in dose])
    effects = rng.normal(size=(9, *SHAPE)) + shift[:, None, None, None]
    toml = write_study(
        folder,
        effects,
        animals,
        shape=SHAPE,
        columns={"dose": dose},
        model='formula = "1 + dose"\nreference = { dose = "none" }',
        toml_extra=toml_extra,
    )
    return toml, effects, dose


def test_check_shows_the_default_f_test(tmp_path, capsys):
    toml, _, _ = _study(tmp_path / "s", "\n[inference]\npermutations = 5000\n")
    assert main(["check", str(toml)]) == 0
    out = capsys.readouterr().out
    assert "dose-any-difference: any difference between the 3 levels of dose" in out
    assert "row        high-minus-none: 1 x dose[T.high]" in out
    assert "row        low-minus-none: 1 x dose[T.low]" in out
    assert "df         2; animals − rank of the animal-level design = 9 − 3 = 6" in out
    # all 1680 assignments are enumerated; the 3! relabellings of the three equal
    # groups give F back, so the smallest attainable p is 6/1680
    assert "1680 exhaustive animal permutations (6 of them give the observed F back)" in out
    assert "smallest attainable p 0.00357" in out


def test_run_writes_the_f_test_maps(tmp_path):
    # one [[contrast]] keeps the run short; the default F-test stays (its rows are the
    # design's default contrasts)
    toml, effects, dose = _study(
        tmp_path / "s",
        '\n[inference]\npermutations = 40\n\n[[contrast]]\nname = "high-minus-none"\n'
        'weights = { "dose[T.high]" = 1 }\n',
    )
    out = tmp_path / "out"
    assert main(["run", str(toml), "--out", str(out), "--quiet"]) == 0
    folder = out / "dose-any-difference"
    f_img = nib.load(folder / "f.nii.gz")
    assert f_img.header.get_intent() == ("f test", (2.0, 6.0), "F")
    f = np.asarray(f_img.dataobj)
    p = np.asarray(nib.load(folder / "p.nii.gz").dataobj)
    X = np.column_stack(
        [np.ones(9), [d == "high" for d in dose], [d == "low" for d in dose]]
    ).astype(float)
    L = np.array([[0.0, 1, 0], [0, 0, 1]])
    for idx in [(0, 0, 0), (3, 2, 1), (1, 2, 0)]:
        ref = sm.OLS(effects[(slice(None), *idx)], X).fit().f_test(L)
        # maps are float32: rtol 1e-5
        assert f[idx] == pytest.approx(float(np.squeeze(ref.fvalue)), rel=1e-5)
        assert p[idx] == pytest.approx(float(ref.pvalue), rel=1e-4, abs=1e-7)
    for stem in ("z", "q", "df", "p_fwe_voxel", "p_fwe_tfce", "null_max"):
        assert any(x.name.startswith(stem + ".") for x in folder.iterdir()), stem
    summary = json.loads((out / "summary.json").read_text())
    entry = summary["ftests"]["dose-any-difference"]
    assert [r["contrast"] for r in entry["rows"]] == ["high-minus-none", "low-minus-none"]
    assert entry["df_numerator"] == 2 and entry["df_denominator_range"] == [6.0, 6.0]
    assert entry["inference"]["sided"] == "positive"
    assert entry["inference"]["permutation"]["kind"] == "animal permutations"
    assert entry["questions"]["asked"] is False
    assert "not which or in which direction" in entry["questions"]["why"]
    assert "dose-any-difference" in (out / "report.html").read_text()
    # the F-test's folder counts as grouplevel's own (so --force may replace the output)
    assert foreign_reason(out) is None


@pytest.mark.parametrize(
    ("block", "words"),
    [
        (
            'name = "dose-any"\ncontrasts = ["high-minus-none", "mid-minus-none"]',
            "[ftest 1] contrasts: 'mid-minus-none' is not a contrast of this design",
        ),
        (
            'name = "dose-any"\ncontrasts = ["high-minus-none", "low-minus-none", "mean-none",'
            ' "mean-high"]',
            "[ftest 1] contrasts: the 4 contrasts are linearly dependent (rank 3)",
        ),
        (
            'name = "dose-any"\ncontrasts = ["high-minus-none", "high-minus-none"]',
            "[ftest 1] contrasts: names 'high-minus-none' more than once",
        ),
        ('name = "dose-any"\ncontrasts = "high-minus-none"', "[ftest 1] contrasts"),
        ('name = "a/b"\ncontrasts = ["high-minus-none"]', "[ftest 1] name"),
        (
            'name = "Mean-None"\ncontrasts = ["high-minus-none", "low-minus-none"]',
            "[ftest 1] name: 'Mean-None' is the name of a group contrast tested",
        ),
        ('name = "x"\nrows = ["high-minus-none"]', "rows"),
    ],
)
def test_a_bad_ftest_block_exits_2_naming_the_key(tmp_path, capsys, block, words):
    toml, _, _ = _study(tmp_path / "s", f"\n[[ftest]]\n{block}\n")
    assert main(["check", str(toml)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "Traceback" not in err
    assert words in err


def test_a_declared_ftest_is_checked_and_listed(tmp_path, capsys):
    toml, _, _ = _study(
        tmp_path / "s",
        '\n[inference]\npermutations = 0\n\n[[ftest]]\nname = "any-dose-mean"\n'
        'contrasts = ["mean-none", "mean-low", "mean-high"]\n',
    )
    assert main(["check", str(toml)]) == 0
    out = capsys.readouterr().out
    assert "any-dose-mean: any of mean-none, mean-low, mean-high differs from zero" in out
    assert "dose-any-difference" in out  # the default F-test stays


def test_within_animal_f_test_matches_statsmodels_random_slopes(tmp_path):
    # three stimuli alternated within every animal, a random slope per stimulus
    # difference (random_slopes "auto"): statsmodels MixedLM (REML) with
    # re_formula="1 + stim" is the same model; its f_test of both differences uses the
    # same model-based covariance (rtol 1e-3: optimiser tolerance; measured below 2e-4
    # against the better of two optimisers). df: the slope df,
    # animals − 1 = 7.
    import warnings

    import pandas as pd
    import statsmodels.formula.api as smf

    import grouplevel

    rng = np.random.default_rng(3)
    shape, m, runs = (2, 1, 1), 8, 6
    animals = [f"m{i}" for i in range(m) for _ in range(runs)]
    stim = np.array([["a", "b", "c"][k % 3] for _ in range(m) for k in range(runs)])
    a = np.repeat(np.arange(m), runs)
    mu = (
        rng.normal(0, 1, m)[a]
        + np.where(stim == "b", 0.3 + rng.normal(0, 0.5, m)[a], 0.0)
        + np.where(stim == "c", rng.normal(0, 0.7, m)[a], 0.0)
    )
    effects = mu[:, None, None, None] + rng.normal(0, 0.5, (m * runs, *shape))
    toml = write_study(
        tmp_path / "s",
        effects,
        animals,
        shape=shape,
        columns={"stim": list(stim)},
        model='formula = "1 + stim"',
        toml_extra='\n[inference]\npermutations = 0\n\n[[contrast]]\nname = "b-minus-a"\n'
        'weights = { "stim[T.b]" = 1 }\n',
    )
    maps, _ = grouplevel.fit_study(grouplevel.load_study(toml))
    (fm,) = [x for x in maps if x.name == "stim-any-difference"]
    np.testing.assert_array_equal(fm.df, 7.0)
    for v, idx in enumerate(np.argwhere(fm.mask)):
        data = pd.DataFrame({"y": effects[(slice(None), *idx)], "stim": stim, "animal": animals})
        model = smf.mixedlm("y ~ stim", data, groups="animal", re_formula="1 + stim")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            # the REML surface of a 3 × 3 random-effects covariance is flat: one
            # optimiser may stop early, so the reference is the better of two
            fits = [model.fit(reml=True, method=k, maxiter=5000) for k in ("lbfgs", "nm")]
        ref = max(fits, key=lambda r: r.llf)
        L = np.zeros((2, len(ref.params)))
        L[0, 1] = L[1, 2] = 1.0
        assert fm.f[v] == pytest.approx(float(np.squeeze(ref.f_test(L).fvalue)), rel=1e-3)


def _stimulus_study(folder, toml_extra, shape=(2, 2, 1), formula="1 + stim", columns=None):
    """6 animals, each with 2 runs of three stimuli (a, b, c) alternated; every animal
    has its own b − a and c − a responses (a random slope each), small run noise."""
    rng = np.random.default_rng(8)
    m, per = 6, 6
    stim = np.array([["a", "b", "c"][k % 3] for _ in range(m) for k in range(per)])
    animal = np.repeat(np.arange(m), per)
    own_b = rng.normal(0.0, 1.0, (m, *shape))[animal]
    own_c = 0.5 * own_b + rng.normal(0.0, 1.0, (m, *shape))[animal]
    effects = (
        rng.normal(0.0, 1.0, (m, *shape))[animal]
        + (stim == "b")[:, None, None, None] * own_b
        + (stim == "c")[:, None, None, None] * own_c
        + rng.normal(0.0, 0.05, (m * per, *shape))
    )
    toml = write_study(
        folder,
        effects,
        [f"m{a}" for a in animal],
        shape=shape,
        columns={"stim": list(stim), **(columns or {})},
        model=f'formula = "{formula}"',
        toml_extra=toml_extra,
    )
    return toml, effects, stim, animal


def test_check_prints_the_vector_flips_of_a_within_animal_f_test(tmp_path, capsys):
    # three stimuli within every animal: the F-test's rows are two random slopes, and
    # its permutations flip each animal's vector of both own effects; all 2⁶ flips are
    # enumerated, the identity and the flip of every animal give F back: p ≥ 2/64
    extra = (
        '\n[inference]\npermutations = 100\n\n[[contrast]]\nname = "b-vs-c"\n'
        'weights = { "stim[T.b]" = 1, "stim[T.c]" = -1 }\n'
        '\n[[ftest]]\nname = "stim-all"\ncontrasts = ["b-minus-a", "b-vs-c"]\n'
    )
    toml, *_ = _stimulus_study(tmp_path / "s", extra)
    assert main(["check", str(toml)]) == 0
    out = capsys.readouterr().out
    scheme = (
        "64 exhaustive sign flips of each animal's vector of 2 own effects (2 of them give "
        "the observed F back); smallest attainable p 0.0312"
    )
    assert out.count(scheme) == 2  # the default F-test and the declared one
    assert "tested parametrically only" not in out


def test_run_permutes_a_within_animal_f_test_as_hotelling_brute_force(tmp_path):
    # reference: per voxel, each animal's own differences of condition means (what the
    # GLS of its own runs gives with equal run variances), Hotelling's T² recomputed for
    # all 2⁶ flips with numpy (common practice; Hotelling 1931, Ann Math Stat 2:360),
    # turned into the engine's F = m·r/q with r = T²/(m − 1 + T²) (equal sampling
    # covariances, see grouplevel/inference/vector_flips.py) and into z on (2, 5) df with
    # scipy.stats; the FWE p of a voxel is the share of flips whose maximum z over the
    # voxels reaches its observed z.
    from scipy import stats

    # one [[contrast]] keeps the run short (the default F-test stays)
    extra = (
        '\n[inference]\npermutations = 100\n\n[[contrast]]\nname = "b-minus-a"\n'
        'weights = { "stim[T.b]" = 1 }\n'
    )
    toml, effects, stim, animal = _stimulus_study(tmp_path / "s", extra)
    out = tmp_path / "out"
    assert main(["run", str(toml), "--out", str(out), "--quiet"]) == 0
    folder = out / "stim-any-difference"
    p_fwe = np.asarray(nib.load(folder / "p_fwe_voxel.nii.gz").dataobj)
    for stem in ("f", "z", "p", "q", "p_fwe_tfce", "p_fwe_cluster", "tfce", "null_max"):
        assert any(x.name.startswith(stem + ".") for x in folder.iterdir()), stem
    m = 6
    bits = (np.arange(2**m)[:, None] >> np.arange(m)[None, :]) & 1
    signs = 1 - 2 * bits
    voxels = [tuple(v) for v in np.argwhere(np.ones(effects.shape[1:], bool))]
    z = np.empty((signs.shape[0], len(voxels)))
    for j, idx in enumerate(voxels):
        y = effects[(slice(None), *idx)]
        means = np.array([[y[(animal == a) & (stim == c)].mean() for c in "abc"] for a in range(m)])
        d = means[:, 1:] - means[:, :1]
        for k, s in enumerate(signs):
            e = s[:, None] * d
            t2 = m * e.mean(0) @ np.linalg.solve(np.cov(e, rowvar=False), e.mean(0))
            f = m * (t2 / (m - 1 + t2)) / 2
            z[k, j] = stats.norm.isf(stats.f.sf(f, 2, m - 1))
    for j, idx in enumerate(voxels):
        p_ref = np.mean(z.max(axis=1) >= z[0, j] - 1e-6)
        # maps are float32: abs 1e-6
        assert p_fwe[idx] == pytest.approx(p_ref, abs=1e-6), idx
    summary = json.loads((out / "summary.json").read_text())
    perm = summary["ftests"]["stim-any-difference"]["inference"]["permutation"]
    assert perm["kind"] == "sign flips of each animal's vector of 2 own effects"
    assert perm["permutations"] == 64 and perm["equivalent_to_identity"] == 2
    assert perm["smallest_attainable_p"] == pytest.approx(2 / 64, abs=1e-12)
    cautions = " ".join(summary["ftests"]["stim-any-difference"]["cautions"])
    assert "as likely as its negative" in cautions
    methods = (out / "methods.md").read_text()
    assert "sign-flipped as a whole (Winkler et al. 2015)" in methods
    assert "Multi-level block permutation. NeuroImage 123:253" in methods


def test_a_within_animal_f_test_of_moderated_slopes_is_refused_with_permutations(tmp_path, capsys):
    # stimulus × genotype: the stimulus slopes differ between genotypes, so the animals'
    # vectors would need the genotype removed first (not implemented). A declared
    # F-test of both stimulus differences is refused naming the key and the block; the
    # default F-test stays parametric with a warning.
    extra = (
        '\n[inference]\npermutations = 100\n\n[[ftest]]\nname = "stim-both"\n'
        'contrasts = ["b-minus-a", "c-minus-a"]\n\n[[contrast]]\nname = "b-minus-a"\n'
        'weights = { "stim[T.b]" = 1 }\n\n[[contrast]]\nname = "c-minus-a"\n'
        'weights = { "stim[T.c]" = 1 }\n'
    )
    genotype = ["wt"] * 18 + ["ko"] * 18
    toml, *_ = _stimulus_study(
        tmp_path / "s", extra, formula="1 + stim * genotype", columns={"genotype": genotype}
    )
    assert main(["check", str(toml)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "Traceback" not in err
    assert "F-test 'stim-both': [inference] permutations = 100: its rows weight several" in err
    assert "animal-level columns moderate" in err
    # without the block, the default F-test of the same rows stays parametric (a warning)
    text = toml.read_text()
    toml.write_text(
        text.replace('[[ftest]]\nname = "stim-both"\n', "").replace(
            'contrasts = ["b-minus-a", "c-minus-a"]\n', "", 1
        )
    )
    assert main(["check", str(toml)]) == 0
    out = capsys.readouterr().out
    assert "'stim-any-difference' (a default F-test) is tested parametrically only" in out
