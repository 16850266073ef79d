"""Within-animal comparisons of first-level conditions ([[comparison]]) and the
runs table's ``condition`` column (formerly ``contrast``)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from grouplevel.cli import main
from grouplevel.errors import UserError
from grouplevel.pipeline import fit_study
from grouplevel.study import load_study
from tests.conftest import save

SHAPE = (3, 3, 2)
COMPARISON = """
[[comparison]]
name = "A-minus-B"
conditions = { A = 1, B = -1 }
"""


def _simulate(seed: int = 11, n_animals: int = 6, n_runs: int = 3):
    """Two conditions in the same runs; condition A differs from B by an animal-varying
    amount (the comparison's between-animal variance)."""
    rng = np.random.default_rng(seed)
    base = rng.normal(0.0, 1.0, (n_animals, *SHAPE))
    diff = 0.3 + rng.normal(0.0, 0.5, (n_animals, *SHAPE))
    runs = []
    for a in range(n_animals):
        for r in range(n_runs):
            b = base[a] + rng.normal(0.0, 0.6, SHAPE)
            runs.append(
                {
                    "animal": f"m{a}",
                    "run": r + 1,
                    "A": b + diff[a] + rng.normal(0.0, 0.4, SHAPE),
                    "B": b + rng.normal(0.0, 0.4, SHAPE),
                    "var_A": rng.uniform(0.05, 0.2, SHAPE),
                    "var_B": rng.uniform(0.05, 0.2, SHAPE),
                }
            )
    return runs


def _write_conditions(folder: Path, runs, *, variances=True, column="condition", extra=""):
    rows = []
    for k, run in enumerate(runs):
        for cond in ("A", "B"):
            row = {
                "animal": run["animal"],
                "session": 1,
                "run": run["run"],
                column: cond,
                "effect": str(save(folder / "maps" / f"r{k}_{cond}.nii.gz", run[cond])),
            }
            if variances:
                row["variance"] = str(
                    save(folder / "maps" / f"r{k}_{cond}_var.nii.gz", run[f"var_{cond}"])
                )
            rows.append(row)
    pd.DataFrame(rows).to_csv(folder / "runs.tsv", sep="\t", index=False)
    (folder / "study.toml").write_text('[study]\ntable = "runs.tsv"\n' + extra)
    return folder / "study.toml"


def _write_differences(folder: Path, runs, *, variances=True):
    rows = []
    for k, run in enumerate(runs):
        row = {
            "animal": run["animal"],
            "run": run["run"],
            "effect": str(save(folder / "maps" / f"d{k}.nii.gz", run["A"] - run["B"])),
        }
        if variances:
            row["variance"] = str(
                save(folder / "maps" / f"d{k}_var.nii.gz", run["var_A"] + run["var_B"])
            )
        rows.append(row)
    pd.DataFrame(rows).to_csv(folder / "runs.tsv", sep="\t", index=False)
    (folder / "study.toml").write_text('[study]\ntable = "runs.tsv"\n')
    return folder / "study.toml"


def _result(path: Path, name: str):
    maps, _ = fit_study(load_study(path))
    return next(m for m in maps if m.name == name)


def test_comparison_equals_the_table_of_run_differences(tmp_path):
    # the comparison is, by definition, the group analysis of each run's A − B map with
    # variance var_A + var_B; the same analysis from a hand-made table must agree
    runs = _simulate()
    cmp_ = _result(_write_conditions(tmp_path / "c", runs, extra=COMPARISON), "A-minus-B")
    ref = _result(_write_differences(tmp_path / "d", runs), "mean")
    for key in ("effect", "se", "t", "df", "var_animal", "var_run"):
        np.testing.assert_allclose(
            getattr(cmp_, key), getattr(ref, key), rtol=1e-5, atol=1e-7, err_msg=key
        )
    # float32 maps: A − B summed on reading vs. written as float32 differences
    assert cmp_.n_animals == 6 and cmp_.n_runs == 18
    # its questions are the mean's, asked of the run pairs' differences, and say so
    quality = cmp_.answers.run_quality.table()
    assert len(quality) == 18
    assert any("within-animal comparison (A − B)" in n for n in cmp_.answers.notes)


def test_comparison_against_statsmodels_mixedlm(tmp_path):
    # outside reference: statsmodels MixedLM (REML, random intercept per animal) fitted
    # to the per-run differences; without first-level variances the models coincide
    runs = _simulate(seed=5)
    gm = _result(
        _write_conditions(tmp_path / "c", runs, variances=False, extra=COMPARISON), "A-minus-B"
    )
    animals = [r["animal"] for r in runs]
    for flat in (0, 7, 13):
        idx = np.unravel_index(flat, SHAPE)
        d = np.array([np.float32(r["A"][idx]) - np.float32(r["B"][idx]) for r in runs])
        data = pd.DataFrame({"d": d, "animal": animals})
        fit = smf.mixedlm("d ~ 1", data, groups=data["animal"]).fit(reml=True)
        i = int(np.flatnonzero(np.ravel_multi_index(np.nonzero(gm.mask), SHAPE) == flat)[0])
        assert gm.effect[i] == pytest.approx(fit.fe_params["Intercept"], rel=1e-4)
        assert gm.se[i] == pytest.approx(fit.bse["Intercept"], rel=1e-4)
        assert gm.var_animal[i] == pytest.approx(float(fit.cov_re.iloc[0, 0]), rel=1e-3, abs=1e-8)
        # between-animal df: animals − 1 (the comparison varies within animals, and its
        # animal-to-animal variance is the model's between-animal variance)
        assert gm.df[i] == 5


def test_old_column_name_is_read_with_a_warning(tmp_path):
    runs = _simulate()
    path = _write_conditions(tmp_path, runs, column="contrast", extra=COMPARISON)
    study = load_study(path)
    assert any("now called 'condition'" in w for w in study.warnings)
    assert [fl.name for fl in study.first_levels] == ["A", "B", "A-minus-B"]


def test_both_column_names_are_refused(tmp_path):
    path = _write_conditions(tmp_path, _simulate())
    table = pd.read_csv(tmp_path / "runs.tsv", sep="\t")
    table["contrast"] = table["condition"]
    table.to_csv(tmp_path / "runs.tsv", sep="\t", index=False)
    with pytest.raises(UserError) as err:
        load_study(path)
    assert "both 'condition' and its old name 'contrast'" in " ".join(err.value.problems)


def test_unknown_condition_is_named(tmp_path, capsys):
    extra = '\n[[comparison]]\nname = "A-minus-C"\nconditions = { A = 1, C = -1 }\n'
    path = _write_conditions(tmp_path, _simulate(), extra=extra)
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "[comparison] 'A-minus-C'" in err and "'C'" in err and "conditions: A, B" in err


def test_name_taken_by_a_condition_is_refused(tmp_path):
    extra = '\n[[comparison]]\nname = "A"\nconditions = { A = 1, B = -1 }\n'
    with pytest.raises(UserError) as err:
        load_study(_write_conditions(tmp_path, _simulate(), extra=extra))
    assert "already a condition" in " ".join(err.value.problems)


def test_runs_lacking_a_condition_are_left_out_with_their_lines(tmp_path):
    path = _write_conditions(tmp_path, _simulate(), extra=COMPARISON)
    table = pd.read_csv(tmp_path / "runs.tsv", sep="\t")
    # drop condition B of animal m0's run 2 (table line 5 holds its A row)
    drop = (table["animal"] == "m0") & (table["run"] == 2) & (table["condition"] == "B")
    table[~drop].to_csv(tmp_path / "runs.tsv", sep="\t", index=False)
    study = load_study(path)
    (warning,) = [w for w in study.warnings if "lack one of the conditions" in w]
    assert "1 run(s)" in warning and "lines 4" in warning
    fl = next(f for f in study.first_levels if f.name == "A-minus-B")
    assert len(fl.runs) == 17 and fl.conditions == {"A": 1.0, "B": -1.0}


def test_excluding_one_condition_excludes_the_comparison_run(tmp_path):
    path = _write_conditions(tmp_path, _simulate(), extra=COMPARISON)
    table = pd.read_csv(tmp_path / "runs.tsv", sep="\t")
    table["exclude"] = "false"
    table["reason"] = ""
    hit = (table["animal"] == "m1") & (table["run"] == 1) & (table["condition"] == "A")
    table.loc[hit, ["exclude", "reason"]] = ["true", "moved"]
    table.to_csv(tmp_path / "runs.tsv", sep="\t", index=False)
    fl = next(f for f in load_study(path).first_levels if f.name == "A-minus-B")
    assert len(fl.runs) == 17 and list(fl.excluded["reason"]) == ["moved"]


@pytest.mark.parametrize(
    ("block", "message"),
    [
        ('name = "x"\nconditions = { A = 0, B = 0 }', "non-zero weight"),
        ('name = "x"\nconditions = { A = "one", B = -1 }', "weight must be a number"),
        ('name = "x"\nconditions = { A = 1 }\nweights = 2', "unknown key"),
    ],
)
def test_bad_comparison_blocks(tmp_path, block, message):
    path = _write_conditions(tmp_path, _simulate(), extra=f"\n[[comparison]]\n{block}\n")
    with pytest.raises(UserError) as err:
        load_study(path)
    assert message in " ".join([str(err.value), *err.value.problems])


def test_paired_runs_need_distinct_run_values(tmp_path):
    path = _write_conditions(tmp_path, _simulate(), extra=COMPARISON)
    table = pd.read_csv(tmp_path / "runs.tsv", sep="\t")
    table.loc[(table["animal"] == "m2"), "run"] = 1  # every m2 row now says run 1
    table.to_csv(tmp_path / "runs.tsv", sep="\t", index=False)
    with pytest.raises(UserError) as err:
        load_study(path)
    assert "duplicate run" in " ".join(err.value.problems)
