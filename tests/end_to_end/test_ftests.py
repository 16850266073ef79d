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


def test_a_default_f_test_on_several_slopes_stays_parametric(tmp_path, capsys):
    # three stimuli within every animal: the default F-test's rows are two random
    # slopes, which the permutation engine does not exchange jointly. The default
    # F-test must not make the study invalid (a warning, parametric only); the same
    # rows declared as [[ftest]] are refused, naming the block.
    rng = np.random.default_rng(2)
    animals = [f"m{i}" for i in range(6) for _ in range(3)]
    stim = ["a", "b", "c"] * 6
    extra = (
        '\n[inference]\npermutations = 100\n\n[[contrast]]\nname = "b-vs-c"\n'
        'weights = { "stim[T.b]" = 1, "stim[T.c]" = -1 }\n'
    )
    toml = write_study(
        tmp_path / "s",
        rng.normal(size=18),
        animals,
        columns={"stim": stim},
        model='formula = "1 + stim"',
        toml_extra=extra,
    )
    assert main(["check", str(toml)]) == 0
    out = capsys.readouterr().out
    assert "'stim-any-difference' (a default F-test) is tested parametrically only" in out
    with toml.open("a") as f:
        f.write('\n[[ftest]]\nname = "stim-all"\ncontrasts = ["b-minus-a", "c-minus-a"]\n')
    assert main(["check", str(toml)]) == 2
    err = capsys.readouterr().err
    assert "F-test 'stim-all': [inference] permutations = 100: its rows are differences" in err
