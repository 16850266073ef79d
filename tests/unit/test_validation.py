"""Every bad input the intake handles gives one clear message and exit status 2.

These are checks of our own error contract (CONVENTIONS.md), not of numerics.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from grouplevel.cli import main
from tests.conftest import TINY_AFFINE, save, write_study

ANIMALS = ["a", "a", "b", "b", "c", "c"]


def run_cli(args: list[str], capsys) -> tuple[int, str, str]:
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def check(toml: Path, capsys) -> tuple[int, str]:
    code, out, err = run_cli(["check", toml], capsys)
    return code, out + err


def basic(tmp_path: Path, **kw) -> Path:
    rng = np.random.default_rng(0)
    effects = kw.pop("effects", rng.normal(1, 1, size=(6, 3, 3, 2)))
    return write_study(tmp_path / "s", effects, kw.pop("animals", ANIMALS), **kw)


def edit_table(toml: Path, fn) -> None:
    path = toml.parent / "runs.tsv"
    table = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False)
    fn(table)
    table.to_csv(path, sep="\t", index=False)


def test_valid_study_passes_and_prints_overview(tmp_path, capsys):
    code, text = check(basic(tmp_path), capsys)
    assert code == 0, text
    assert "animals      3, runs 6" in text
    assert "RAS" in text and "study is valid" in text


def test_missing_file_names_line_and_path(tmp_path, capsys):
    toml = basic(tmp_path)
    edit_table(toml, lambda t: t.__setitem__("effect", ["maps/nope.nii.gz"] + list(t.effect[1:])))
    code, text = check(toml, capsys)
    assert code == 2
    assert "runs.tsv line 2 (animal a)" in text and "nope.nii.gz: file not found" in text


def test_unreadable_file(tmp_path, capsys):
    toml = basic(tmp_path)
    (toml.parent / "maps" / "run001_effect.nii.gz").write_text("not an image")
    code, text = check(toml, capsys)
    assert code == 2 and "line 3" in text and "cannot read as NIfTI" in text


def test_not_3d(tmp_path, capsys):
    toml = basic(tmp_path)
    save(toml.parent / "maps" / "run002_effect.nii.gz", np.ones((3, 3, 2, 2)))
    code, text = check(toml, capsys)
    assert code == 2 and "line 4" in text and "expected one 3-D volume" in text


def test_shape_affine_and_orientation_mismatch_all_reported(tmp_path, capsys):
    toml = basic(tmp_path)
    maps = toml.parent / "maps"
    save(maps / "run001_effect.nii.gz", np.ones((4, 3, 2)))
    shifted = TINY_AFFINE.copy()
    shifted[0, 3] = 0.05
    save(maps / "run002_effect.nii.gz", np.ones((3, 3, 2)), shifted)
    flipped = TINY_AFFINE.copy()
    flipped[0, 0] = -0.2
    save(maps / "run003_effect.nii.gz", np.ones((3, 3, 2)), flipped)
    code, text = check(toml, capsys)
    assert code == 2
    assert "3 problem(s)" in text
    assert "line 3" in text and "grid (4, 3, 2) differs" in text
    assert "line 4" in text and "affine differs" in text
    assert "line 5" in text and "orientation LAS differs from the study's RAS" in text


def test_small_affine_difference_is_tolerated(tmp_path, capsys):
    toml = basic(tmp_path)
    nudged = TINY_AFFINE.copy()
    nudged[0, 3] = 1e-5  # float32 round-off scale
    save(toml.parent / "maps" / "run002_effect.nii.gz", np.ones((3, 3, 2)), nudged)
    code, text = check(toml, capsys)
    assert code == 0, text


def test_infinite_values(tmp_path, capsys):
    effects = np.random.default_rng(1).normal(size=(6, 3, 3, 2))
    effects[2, 0, 0, 0] = np.inf
    code, text = check(basic(tmp_path, effects=effects), capsys)
    assert code == 2 and "line 4" in text and "1 infinite value(s)" in text


def test_nan_inside_mask_says_how_to_allow_missing_data(tmp_path, capsys):
    effects = np.random.default_rng(1).normal(size=(6, 3, 3, 2))
    effects[1, 1, 1, 1] = np.nan
    mask = np.ones((3, 3, 2), bool)
    toml = basic(tmp_path, effects=effects, mask=mask)
    code, text = check(toml, capsys)
    assert code == 2 and "line 3" in text and "min_coverage below 1" in text
    # allowing missing data fixes it
    toml.write_text(toml.read_text().replace("[study]\n", "[study]\nmin_coverage = 0.8\n"))
    code, text = check(toml, capsys)
    assert code == 0, text


def test_nonpositive_variance_inside_mask(tmp_path, capsys):
    var = np.full((6, 3, 3, 2), 0.5)
    var[3, 0, 1, 0] = 0.0
    var[4, 0, 1, 0] = -1.0
    toml = basic(tmp_path, variances=var, mask=np.ones((3, 3, 2), bool))
    code, text = check(toml, capsys)
    assert code == 2
    assert "line 5" in text and "line 6" in text and "zero or negative variance" in text


def test_duplicate_run(tmp_path, capsys):
    toml = basic(tmp_path)
    edit_table(toml, lambda t: t.__setitem__("run", ["1", "1", "1", "2", "1", "2"]))
    code, text = check(toml, capsys)
    assert code == 2 and "lines 2, 3: duplicate run (animal a" in text


def test_animal_left_without_runs_and_too_few_animals(tmp_path, capsys):
    toml = basic(tmp_path)

    def exclude(t):
        t["exclude"] = ["false", "false", "true", "true", "true", "true"]
        t["reason"] = ["", "", "moved", "moved", "moved", "moved"]

    edit_table(toml, exclude)
    code, text = check(toml, capsys)
    assert code == 2
    assert "animal b has no included runs" in text and "animal c has no included runs" in text
    assert "1 animal(s) with included runs" in text


def test_excluded_runs_are_listed_with_reasons(tmp_path, capsys):
    toml = basic(tmp_path)

    def exclude(t):
        t["exclude"] = ["false", "true", "false", "false", "false", "false"]
        t["reason"] = ["", "head moved (video)", "", "", "", ""]

    edit_table(toml, exclude)
    code, text = check(toml, capsys)
    assert code == 0, text
    assert "head moved (video)" in text and "1 excluded" in text


def test_bad_exclude_word(tmp_path, capsys):
    toml = basic(tmp_path)
    edit_table(toml, lambda t: t.__setitem__("exclude", ["maybe"] + ["false"] * 5))
    code, text = check(toml, capsys)
    assert code == 2 and "line 2" in text and "'exclude' must be true or false" in text


def test_missing_required_column(tmp_path, capsys):
    toml = basic(tmp_path)

    def rename(t):
        t.columns = ["mouse" if c == "animal" else c for c in t.columns]

    edit_table(toml, rename)
    code, text = check(toml, capsys)
    assert code == 2 and "required column 'animal' is missing" in text


def test_covariate_with_missing_values(tmp_path, capsys):
    toml = basic(
        tmp_path, columns={"age": ["10", "10", "", "12", "14", "14"]}, model='formula = "1 + age"'
    )
    code, text = check(toml, capsys)
    assert code == 2 and "line 4 (animal b): covariate 'age' is missing" in text


def test_formula_names_absent_column(tmp_path, capsys):
    toml = basic(
        tmp_path, columns={"group": ["x", "x", "y", "y", "x", "x"]}, model='formula = "1 + grop"'
    )
    code, text = check(toml, capsys)
    assert code == 2 and "column 'grop'" in text and "did you mean 'group'" in text


def test_contrast_names_absent_coefficient(tmp_path, capsys):
    toml = basic(tmp_path, toml_extra='\n[[contrast]]\nname = "m"\nweights = { Intercpt = 1 }\n')
    code, text = check(toml, capsys)
    assert code == 2 and "'Intercpt'" in text and "did you mean 'Intercept'" in text


def test_rank_deficient_at_animal_level(tmp_path, capsys):
    # group differs between every animal: three animals, three animal-level columns
    toml = basic(
        tmp_path, columns={"group": ["x", "x", "y", "y", "z", "z"]}, model='formula = "1 + group"'
    )
    code, text = check(toml, capsys)
    assert code == 2 and "no between-animal degrees of freedom" in text


def test_rank_deficient_design(tmp_path, capsys):
    toml = basic(
        tmp_path,
        columns={"w": ["1", "2", "3", "4", "5", "6"], "w2": ["2", "4", "6", "8", "10", "12"]},
        model='formula = "1 + w + w2"',
    )
    code, text = check(toml, capsys)
    assert code == 2 and "rank-deficient" in text


def test_unknown_key_suggests(tmp_path, capsys):
    toml = basic(tmp_path, model='formual = "1"\nrun_variance = "estimat"')
    code, text = check(toml, capsys)
    assert code == 2
    assert "[model] formual: unknown key (did you mean 'formula'?)" in text
    assert "did you mean 'estimate'" in text


def test_unknown_section(tmp_path, capsys):
    toml = basic(tmp_path, toml_extra="\n[infernce]\nseed = 3\n")
    code, text = check(toml, capsys)
    assert code == 2 and "did you mean 'inference'" in text


def test_header_scaling_warns_but_passes(tmp_path, capsys):
    big = np.diag([2.0, 2.0, 2.0, 1.0])  # a ×10-scaled rodent header
    rng = np.random.default_rng(2)
    toml = write_study(
        tmp_path / "s", rng.normal(size=(6, 30, 3, 2)), ANIMALS, shape=(30, 3, 2), affine=big
    )
    code, text = check(toml, capsys)
    assert code == 0, text
    assert "warning:" in text and "×10 scaling" in text


def test_run_refuses_existing_output_and_leaves_no_partial(tmp_path, capsys):
    toml = basic(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    code, _, err = run_cli(["run", toml, "--out", out], capsys)
    assert code == 2 and "output folder exists" in err and "--force" in err
    assert not list(tmp_path.glob(".out.partial-*"))


def test_errors_are_one_line_not_tracebacks(tmp_path, capsys):
    code, out, err = run_cli(["run", tmp_path / "missing.toml", "--out", tmp_path / "o"], capsys)
    assert code == 2
    assert err.startswith("error: ") and "Traceback" not in err
    assert "study file not found" in err


@pytest.mark.parametrize("bad", ["min_coverage = 0", "min_coverage = 1.5"])
def test_bad_min_coverage(tmp_path, capsys, bad):
    toml = basic(tmp_path)
    toml.write_text(toml.read_text().replace("[study]\n", f"[study]\n{bad}\n"))
    code, text = check(toml, capsys)
    assert code == 2 and "min_coverage" in text


def test_nifti_without_data_outside_mask_uses_valid_voxels(tmp_path, capsys):
    # without a mask, voxels where a first-level map is exactly 0 count as "no data"
    rng = np.random.default_rng(3)
    effects = rng.normal(1, 1, size=(6, 3, 3, 2))
    effects[:, 0, 0, 0] = 0.0
    toml = basic(tmp_path, effects=effects)
    code, text = check(toml, capsys)
    assert code == 0 and "analysed     17 voxels" in text
    img = nib.load(str(toml.parent / "maps" / "run000_effect.nii.gz"))
    assert img.shape == (3, 3, 2)


def test_cluster_method_needs_permutations(tmp_path, capsys):
    toml = basic(tmp_path, toml_extra='\n[clusters]\nmethod = "tfce"\n')
    toml.write_text(toml.read_text() + "\n[inference]\npermutations = 0\n")
    code, text = check(toml, capsys)
    assert code == 2 and "needs permutations" in text


def test_unknown_cluster_method_suggests(tmp_path, capsys):
    toml = basic(tmp_path, toml_extra='\n[clusters]\nmethod = "tfec"\n')
    code, text = check(toml, capsys)
    assert code == 2 and "did you mean 'tfce'" in text


def test_permutations_refused_for_run_level_covariates_without_slope(tmp_path, capsys):
    # a run-level column tested without its random slope cannot be permuted: the
    # animals' own effects are what is exchanged
    toml = basic(
        tmp_path,
        columns={"order": ["1", "2", "1", "2", "1", "2"]},
        model='formula = "1 + order"\nrandom_slopes = "none"',
        toml_extra='\n[[contrast]]\nname = "order"\nweights = { order = 1 }\n',
    )
    code, text = check(toml, capsys)
    assert code == 2 and "within-animal column(s) (order) that have no random slope" in text
    assert "[inference] permutations" in text and "permutations = 0" in text


def test_run_level_nuisance_with_permutations_passes_check(tmp_path, capsys):
    # an untested run-level covariate is a fixed nuisance effect; the animal-level mean
    # is permuted on the animals' own estimates
    toml = basic(
        tmp_path, columns={"order": ["1", "2", "1", "2", "1", "2"]}, model='formula = "1 + order"'
    )
    code, text = check(toml, capsys)
    assert code == 0, text


def test_atlas_labels_missing_from_table_flow_through_check(tmp_path, capsys):
    toml = basic(tmp_path, mask=np.ones((3, 3, 2), bool))
    labels = np.ones((3, 3, 2))
    labels[0] = 2
    labels[2] = 7
    save(toml.parent / "atlas.nii.gz", labels)
    (toml.parent / "atlas.tsv").write_text("index\tname\themisphere\n1\tcortex\tboth\n")
    toml.write_text(toml.read_text() + '\n[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\n')
    code, text = check(toml, capsys)
    assert code == 2 and "missing from" in text and "atlas.tsv: 2, 7" in text


def test_atlas_overview_in_check(tmp_path, capsys):
    toml = basic(tmp_path, mask=np.ones((3, 3, 2), bool))
    labels = np.ones((3, 3, 2))
    labels[2:] = 2
    save(toml.parent / "atlas.nii.gz", labels)
    (toml.parent / "atlas.tsv").write_text(
        "index\tname\themisphere\n1\tleft part\tleft\n2\tright part\tright\n"
    )
    toml.write_text(toml.read_text() + '\n[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\n')
    code, text = check(toml, capsys)
    assert code == 0, text
    assert "atlas        2 regions" in text and "midline" in text and "Dice" in text


@pytest.mark.parametrize(
    ("space", "expected"),
    [
        ("header_units_per_mm = 0", "[space] header_units_per_mm: must be a positive number"),
        ("header_units_per_mm = -10", "[space] header_units_per_mm: must be a positive number"),
        ('header_units_per_mm = "10"', "[space] header_units_per_mm: expected float"),
        ('header_axes = ["right", "right", "dorsal"]', "[space] header_axes: must say"),
        ('header_axes = ["right", "up", "anterior"]', "[space] header_axes: must say"),
        ('header_axes = ["right", "dorsal"]', "[space] header_axes: must say"),
    ],
)
def test_bad_header_declarations_are_refused(tmp_path, capsys, space, expected):
    toml = basic(tmp_path, toml_extra=f"\n[space]\n{space}\n")
    code, text = check(toml, capsys)
    assert code == 2
    assert expected in text
    assert "Traceback" not in text


def test_headers_read_once_parses_each_file_once_and_rereads_the_voxels(tmp_path, monkeypatch):
    # Inside the block a second read of a file reuses its parsed header (nibabel.load is
    # called once) while the voxel values still come from the file; outside it, and
    # once it is left, every read parses the file again. The values are checked against
    # the arrays written with nibabel (the reference reader).
    from grouplevel.intake import images

    path = tmp_path / "map.nii"
    first = np.arange(24, dtype=np.float32).reshape(2, 3, 4)
    nib.save(nib.Nifti1Image(first, TINY_AFFINE), path)
    calls = []
    load = nib.load
    monkeypatch.setattr(images.nib, "load", lambda p: calls.append(p) or load(p))
    with images.headers_read_once():
        grid = images.read_header_grid(path)
        np.testing.assert_array_equal(images.read_volume(path), first)
        with images.headers_read_once():  # nested: the outer block's files
            np.testing.assert_array_equal(images.read_volume(path), first)
        assert len(calls) == 1 and grid.shape == (2, 3, 4)
        # same header, new values: the values are read from the file again
        nib.save(nib.Nifti1Image(first * 2, TINY_AFFINE), path)
        np.testing.assert_array_equal(images.read_volume(path), first * 2)
        assert len(calls) == 1
    images.read_volume(path)
    images.read_volume(path)
    assert len(calls) == 3
