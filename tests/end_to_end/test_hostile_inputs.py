"""Hostile inputs: each is refused with one clear message, or warned about, by intake.

Every test runs ``check`` and (where it refuses) ``run`` and asserts that both exit with
status 2 and name the same file and table line, so that nothing ``run`` refuses passes
``check``. These are checks of our error contract (CONVENTIONS.md); the facts they rely
on are named beside each check.
"""

from __future__ import annotations

import gzip
import io
import json
import struct
from pathlib import Path

import matplotlib.image
import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from grouplevel.cli import main
from grouplevel.report.figure_files import PNG_DPI, png_and_box
from grouplevel.report.figures import MIN_PANEL_SHARE, projection_views
from tests.conftest import TINY_AFFINE, save, write_study

ANIMALS = ["a", "a", "b", "b", "c", "c"]
SHAPE = (3, 3, 2)
N_VOXELS = 18  # 3 × 3 × 2
NO_PERMUTATIONS = "\n[inference]\npermutations = 0\n"


def run_cli(args: list, capsys) -> tuple[int, str]:
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out + out.err


def check(toml: Path, capsys) -> tuple[int, str]:
    return run_cli(["check", toml], capsys)


def run(toml: Path, capsys) -> tuple[int, str]:
    return run_cli(["run", toml, "--out", toml.parent / "out", "--quiet"], capsys)


def refused_alike(toml: Path, capsys, *needles: str) -> str:
    """Both commands exit 2 without a traceback, and both messages hold every needle."""
    texts = []
    for command in (check, run):
        code, text = command(toml, capsys)
        assert code == 2, text
        assert "error: " in text and "Traceback" not in text
        for needle in needles:
            assert needle in text, (needle, text)
        texts.append(text)
    assert not (toml.parent / "out").exists()
    return texts[0]


def study(tmp_path: Path, name: str = "s", **kw) -> Path:
    rng = np.random.default_rng(0)
    n = len(kw.get("animals", ANIMALS))
    effects = kw.pop("effects", rng.normal(1, 1, size=(n, *kw.get("shape", SHAPE))))
    kw["toml_extra"] = kw.get("toml_extra", "") + NO_PERMUTATIONS
    return write_study(tmp_path / name, effects, kw.pop("animals", ANIMALS), **kw)


def table_path(toml: Path) -> Path:
    return toml.parent / "runs.tsv"


def edit_table(toml: Path, fn) -> None:
    table = pd.read_csv(table_path(toml), sep="\t", dtype=str, keep_default_na=False)
    changed = fn(table)  # edits in place, or returns a new table
    table = table if changed is None else changed
    table.to_csv(table_path(toml), sep="\t", index=False)


def warnings_of(out: Path) -> list[str]:
    return json.loads((out / "summary.json").read_text())["warnings"]


# --- 1. negative and zero variances ------------------------------------------------
def test_negative_variance_is_refused_with_file_line_and_count(tmp_path, capsys):
    # A variance is never negative (common practice: definition of a variance).
    var = np.full((6, *SHAPE), 0.5)
    var[2, 0, 0, 0] = -1.0
    var[2, 1, 0, 0] = -2.0
    toml = study(tmp_path, variances=var)
    refused_alike(
        toml,
        capsys,
        "runs.tsv line 4 (animal b)",
        "run002_variance.nii.gz",
        "2 voxel(s) hold a negative variance",
    )


def test_negative_standard_error_is_refused_before_squaring(tmp_path, capsys):
    # A standard error is a square root, never negative (common practice); squaring it
    # on load would hide the sign, so the raw map is checked.
    toml = study(tmp_path, variances=np.full(6, 0.5))
    edit_table(toml, lambda t: t.rename(columns={"variance": "se"}))
    se = np.full(SHAPE, 0.5)
    se[0, 0, 0] = -0.3
    save(toml.parent / "maps" / "run003_variance.nii.gz", se)
    refused_alike(toml, capsys, "runs.tsv line 5 (animal b)", "1 voxel(s) hold a negative se")


def test_zero_variance_without_mask_is_a_warning_kept_in_summary(tmp_path, capsys):
    var = np.full((6, *SHAPE), 0.5)
    var[2, 0, 0, 0] = 0.0
    var[2, 1, 1, 1] = 0.0
    toml = study(tmp_path, variances=var)
    code, text = check(toml, capsys)
    assert code == 0, text
    expected = f"run002_variance.nii.gz: 2 of the {N_VOXELS} voxel(s) where the effect has"
    assert "warning: runs.tsv line 4 (animal b): " + expected in text
    assert "masking artefact" in text and "no data for this run" in text
    code, text = run(toml, capsys)
    assert code == 0, text
    assert any(expected in w for w in warnings_of(toml.parent / "out"))


def test_zero_and_negative_variance_inside_mask_are_counted_apart(tmp_path, capsys):
    var = np.full((6, *SHAPE), 0.5)
    var[3, 0, 1, 0] = 0.0
    var[3, 0, 1, 1] = -1.0
    var[3, 0, 2, 1] = -1.0
    toml = study(tmp_path, variances=var, mask=np.ones(SHAPE, bool))
    refused_alike(
        toml,
        capsys,
        "runs.tsv line 5 (animal b): run003_variance.nii.gz: 3 voxel(s) inside the mask",
        "(2 negative, 1 zero)",
    )


# --- 2. a map with no usable voxel ---------------------------------------------------
@pytest.mark.parametrize(
    ("what", "needle"),
    [
        ("nan_effect", f"run003_effect.nii.gz: all {N_VOXELS} voxel(s) are NaN"),
        ("zero_effect", f"run003_effect.nii.gz: all {N_VOXELS} voxel(s) are 0 or NaN"),
        ("zero_variance", "run003_variance.nii.gz: the variance is zero, negative or NaN"),
    ],
)
def test_map_without_any_usable_voxel_names_its_file(tmp_path, capsys, what, needle):
    effects = np.random.default_rng(1).normal(1, 1, size=(6, *SHAPE))
    var = np.full((6, *SHAPE), 0.5)
    if what == "nan_effect":
        effects[3] = np.nan
    elif what == "zero_effect":
        effects[3] = 0.0
    else:
        var[3] = 0.0
    toml = study(tmp_path, effects=effects, variances=var)
    text = refused_alike(toml, capsys, "runs.tsv line 5 (animal b)", needle, "exclude = true")
    assert "the run has no usable voxel" in text


# --- 3. one map on another grid ------------------------------------------------------
def test_odd_first_map_is_the_only_one_blamed(tmp_path, capsys):
    animals = [a for a in "abcdef" for _ in range(2)]
    toml = study(tmp_path, animals=animals)
    save(toml.parent / "maps" / "run000_effect.nii.gz", np.ones((4, 3, 2)))
    text = refused_alike(
        toml,
        capsys,
        "1 problem(s)",
        "runs.tsv line 2 (animal a) 'effect'",
        "grid (4, 3, 2) differs from the study grid (3, 3, 2)",
        "shared by 11 of 12 effect maps",
    )
    assert "line 3" not in text


def test_mask_sets_the_grid_when_given(tmp_path, capsys):
    toml = study(tmp_path, mask=np.ones(SHAPE, bool))
    save(toml.parent / "mask.nii.gz", np.ones((4, 3, 2)))  # every map now differs
    text = refused_alike(toml, capsys, "6 problem(s)", "the grid of [study] mask")
    assert all(f"line {k}" in text for k in range(2, 8))


# --- 4. silently accepted before -----------------------------------------------------
def test_constant_effect_map_is_warned_about(tmp_path, capsys):
    effects = np.random.default_rng(2).normal(1, 1, size=(6, *SHAPE))
    effects[3] = 2.5
    code, text = check(study(tmp_path, effects=effects), capsys)
    assert code == 0, text
    assert "warning: runs.tsv line 5 (animal b): run003_effect.nii.gz" in text
    assert f"every one of its {N_VOXELS} voxel(s) with a value holds the same number (2.5)" in text


def test_complex_map_is_refused(tmp_path, capsys):
    toml = study(tmp_path)
    data = (np.ones(SHAPE) * (1 + 1j)).astype(np.complex64)
    nib.save(nib.Nifti1Image(data, TINY_AFFINE), str(toml.parent / "maps" / "run002_effect.nii.gz"))
    refused_alike(toml, capsys, "runs.tsv line 4 (animal b)", "complex numbers (complex64)")


def test_same_effect_file_for_two_runs_is_refused(tmp_path, capsys):
    toml = study(tmp_path)
    edit_table(toml, lambda t: t.__setitem__("effect", [*t.effect[:3], t.effect[2], *t.effect[4:]]))
    refused_alike(toml, capsys, "runs.tsv lines 4, 5: the same 'effect' file run002_effect.nii.gz")


def test_repeated_column_name_is_refused(tmp_path, capsys):
    toml = study(tmp_path)
    path = table_path(toml)
    lines = path.read_text().splitlines()
    lines[0] = lines[0].replace("run", "animal")
    path.write_text("\n".join(lines) + "\n")
    refused_alike(toml, capsys, "runs.tsv line 1: column name(s) 'animal' appear more than once")


def test_unbalanced_quote_that_merges_rows_is_refused(tmp_path, capsys):
    # A double quote opens a quoted field that may span line ends (RFC 4180, section 2,
    # rules 5-6; pandas follows it): lines 4 to 7 would silently become one row.
    animals = [a for a in "abcdef" for _ in range(2)]
    toml = study(tmp_path, animals=animals, columns={"note": [""] * 12})
    path = table_path(toml)
    lines = path.read_text().splitlines()
    lines[3] += '"moved at start'
    lines[6] += 'end of note"'
    path.write_text("\n".join(lines) + "\n")
    refused_alike(
        toml, capsys, "12 line(s) hold rows but 9 row(s) were read", "line(s) 4, 7 hold an"
    )


def test_unbalanced_quote_to_the_end_names_its_line(tmp_path, capsys):
    toml = study(tmp_path, columns={"note": [""] * 6})
    path = table_path(toml)
    lines = path.read_text().splitlines()
    lines[3] += '"never closed'
    path.write_text("\n".join(lines) + "\n")
    refused_alike(toml, capsys, "line(s) 4 hold an unbalanced double quote")


def test_decimal_comma_covariate_is_refused(tmp_path, capsys):
    dose = ["2,0", "2,0", "3,5", "3,5", "1,0", "1,0"]
    toml = study(tmp_path, columns={"dose": dose}, model='formula = "1 + dose"')
    refused_alike(
        toml,
        capsys,
        "runs.tsv line 2 (animal a): covariate 'dose' is written with a decimal comma ('2,0')",
        "categorical factor",
    )


def test_text_covariate_with_a_comma_stays_a_factor(tmp_path, capsys):
    # a value that is text even with the comma read as a point is a real factor level
    animals = ["a", "a", "b", "b", "c", "c", "d", "d"]
    group = ["ctl,a", "ctl,a", "drug,b", "drug,b", "ctl,a", "ctl,a", "drug,b", "drug,b"]
    toml = study(tmp_path, animals=animals, columns={"group": group}, model='formula = "1 + group"')
    code, text = check(toml, capsys)
    assert code == 0, text


def test_single_run_per_animal_warns_what_can_be_estimated(tmp_path, capsys):
    # One run per animal: animal and run variance enter every observation alike, so
    # only their sum is identified (Searle, Casella & McCulloch 1992, Variance
    # Components, ch. 3: a one-way layout needs replicates within groups to separate
    # the two components; value from memory).
    animals = list("abcdef")
    toml = study(tmp_path, animals=animals, variances=np.full(6, 0.3))
    code, text = check(toml, capsys)
    assert code == 0, text
    assert "every animal has a single run" in text and "cannot be told apart" in text
    assert "their sum" in text and "pseudo-inverse" in text
    code, text = run(toml, capsys)
    assert code == 0, text
    out = toml.parent / "out"
    assert any("every animal has a single run" in w for w in warnings_of(out))
    # the sum is what the fit estimates: with one value per animal and a common known
    # variance 0.3, the REML estimate of the total variance of an i.i.d. normal sample
    # is its sample variance with divisor n - 1 (Patterson & Thompson 1971, Biometrika
    # 58:545; common practice), so var_animal + var_run = s² - 0.3 where positive
    effects = np.random.default_rng(0).normal(1, 1, size=(6, *SHAPE))
    total = effects.var(axis=0, ddof=1) - 0.3
    va = np.asarray(nib.load(str(out / "mean" / "var_animal.nii.gz")).dataobj)
    vr = np.asarray(nib.load(str(out / "mean" / "var_run.nii.gz")).dataobj)
    positive = total > 0.05
    np.testing.assert_allclose((va + vr)[positive], total[positive], rtol=1e-3)


def test_single_run_per_animal_with_known_run_variance_is_quiet(tmp_path, capsys):
    toml = study(
        tmp_path,
        animals=list("abcdef"),
        variances=np.full(6, 0.3),
        model='run_variance = "known"',
    )
    code, text = check(toml, capsys)
    assert code == 0, text
    assert "single run" not in text


# --- 5. control characters in names ----------------------------------------------------
@pytest.mark.parametrize(
    ("column", "value", "name"),
    [("animal", "b\x0bx", "a vertical tab"), ("dose", "1\t5", "a tab")],
)
def test_control_character_in_a_value_is_refused(tmp_path, capsys, column, value, name):
    # Unicode category Cc (control) characters (Unicode Standard, ch. 4, General
    # Category) break the rows of tab-separated tables (IANA text/tab-separated-values:
    # a field may hold no tab or line break).
    toml = study(tmp_path, columns={"dose": ["1", "1", "2", "2", "3", "3"]})

    def poison(t):
        t.loc[2, column] = value

    edit_table(toml, poison)
    refused_alike(toml, capsys, f"runs.tsv line 4, column '{column}'", f"holds {name}")


def test_line_break_in_a_quoted_value_is_refused(tmp_path, capsys):
    toml = study(tmp_path)
    edit_table(toml, lambda t: t.__setitem__("contrast", ["x\ny"] * 6))
    refused_alike(toml, capsys, "a quoted value must open and close on one line")


def test_control_character_in_an_atlas_label_is_refused(tmp_path, capsys):
    toml = study(tmp_path, mask=np.ones(SHAPE, bool))
    labels = np.ones(SHAPE)
    labels[2:] = 2
    save(toml.parent / "atlas.nii.gz", labels)
    (toml.parent / "atlas.tsv").write_text(
        'index\tname\themisphere\n1\t"left\tpart"\tleft\n2\tright part\tright\n'
    )
    toml.write_text(toml.read_text() + '\n[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\n')
    refused_alike(toml, capsys, "atlas.tsv, line 2: the name 'left\\tpart' of index 1 holds a tab")


# --- 6. tracebacks before -------------------------------------------------------------
def test_all_maps_one_constant_without_variances(tmp_path, capsys):
    toml = study(tmp_path, effects=np.full(6, 2.0))
    refused_alike(toml, capsys, "all 6 runs hold the same value", "add a 'variance' or 'se' column")


@pytest.mark.parametrize(
    ("value", "needle"),
    [
        ("-1", "must be a whole number from 0 to 9223372036854775807 (2**63 - 1), got -1"),
        (str(2**64), f"must be a whole number from 0 to {2**63 - 1} (2**63 - 1), got {2**64}"),
        ("1.5", "expected int, got 1.5"),
        ('"abc"', "expected int, got 'abc'"),
        ("true", "expected int, got True"),
    ],
)
def test_invalid_seed_names_the_key(tmp_path, capsys, value, needle):
    # numpy.random.default_rng refuses negative seeds (numpy SeedSequence documentation:
    # entropy must be non-negative integers).
    toml = study(tmp_path)
    toml.write_text(
        toml.read_text().replace("permutations = 0", f"permutations = 0\nseed = {value}")
    )
    refused_alike(toml, capsys, "study.toml: [inference] seed: " + needle)


def test_invalid_seed_on_the_command_line(tmp_path, capsys):
    toml = study(tmp_path)
    code, text = run_cli(["run", toml, "--out", tmp_path / "o", "--seed", "-1"], capsys)
    assert code == 2 and "error: --seed must be a whole number from 0" in text
    assert not (tmp_path / "o").exists()


# --- 8. grids one voxel thin -------------------------------------------------------------
def _report_figures(out: Path) -> int:
    return (out / "report.html").read_text().count("data:image/png;base64,")


@pytest.mark.parametrize("shape", [(1, 4, 3), (4, 1, 3)])
def test_one_voxel_thin_grid_runs_end_to_end(tmp_path, capsys, shape):
    rng = np.random.default_rng(4)
    thin = study(tmp_path, "thin", effects=rng.normal(1, 1, (6, *shape)), shape=shape)
    code, text = run(thin, capsys)
    assert code == 0, text
    out = thin.parent / "out"
    for name in ("effect", "t", "var_animal"):
        assert nib.load(str(out / "mean" / f"{name}.nii.gz")).shape == shape
    # the same figures as a study on an ordinary grid
    full = study(tmp_path, "full", effects=rng.normal(1, 1, (6, 4, 4, 3)), shape=(4, 4, 3))
    assert run(full, capsys)[0] == 0
    assert _report_figures(out) == _report_figures(full.parent / "out") >= 2


@pytest.mark.parametrize("shape", [(1, 5, 4), (5, 1, 4), (5, 4, 1)])
def test_projection_figure_on_a_thin_grid(shape):
    # PNG signature and size: PNG specification (ISO/IEC 15948), section 5.2; the image
    # is decoded by matplotlib and must measure the drawn content's box times its dpi.
    values = np.random.default_rng(5).normal(size=shape)
    mask = np.ones(shape, bool)
    axes = tuple(np.arange(n) * 0.2 for n in shape)
    figure = projection_views(
        values, mask, np.array([0.2, 0.2, 0.2]), axes, label="t", origin_name="origin"
    )
    data, box = png_and_box(figure)
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    image = matplotlib.image.imread(io.BytesIO(data), format="png")
    assert image.shape[0] == pytest.approx(box.height * PNG_DPI, abs=2)
    assert image.shape[1] == pytest.approx(box.width * PNG_DPI, abs=2)
    # both views keep a readable width however thin the grid
    panels = [ax for ax in figure.axes if ax.images]
    assert len(panels) == 2
    share = [ax.get_position(original=True).width for ax in panels]
    assert min(share) >= MIN_PANEL_SHARE / 2  # a tenth of the figure at least


# --- other malformed files ------------------------------------------------------------------
def test_text_file_renamed_nifti(tmp_path, capsys):
    toml = study(tmp_path)
    (toml.parent / "maps" / "run002_effect.nii.gz").write_text("effect values\n1 2 3\n")
    refused_alike(toml, capsys, "runs.tsv line 4 (animal b) 'effect'", "cannot read as NIfTI")


def test_truncated_nifti(tmp_path, capsys):
    shape = (20, 20, 10)
    rng = np.random.default_rng(6)
    toml = study(tmp_path, effects=rng.normal(1, 1, (6, *shape)), shape=shape)
    path = toml.parent / "maps" / "run002_effect.nii.gz"
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) // 2])
    refused_alike(toml, capsys, "runs.tsv line 4 (animal b)", "cannot read the image data")


def _set_slope(path: Path, slope: float) -> None:
    # scl_slope is the float32 at byte offset 112 of a NIfTI-1 header (NIfTI-1 standard,
    # nifti1.h; value from memory, checked below through nibabel's own reading)
    raw = bytearray(gzip.decompress(path.read_bytes()))
    raw[112:116] = struct.pack("<f", slope)
    path.write_bytes(gzip.compress(bytes(raw)))


def test_infinite_header_scaling_is_refused(tmp_path, capsys):
    toml = study(tmp_path)
    path = toml.parent / "maps" / "run002_effect.nii.gz"
    nib.save(nib.Nifti1Image(np.arange(18, dtype=np.int16).reshape(SHAPE), TINY_AFFINE), str(path))
    _set_slope(path, 2.0)
    assert float(nib.load(str(path)).dataobj.slope) == 2.0  # the offset is right
    _set_slope(path, np.inf)
    refused_alike(toml, capsys, "runs.tsv line 4 (animal b)", "scl_slope is inf")


def test_nan_header_slope_means_no_scaling(tmp_path, capsys):
    toml = study(tmp_path)
    path = toml.parent / "maps" / "run002_effect.nii.gz"
    nib.save(
        nib.Nifti1Image(np.arange(1, 19, dtype=np.int16).reshape(SHAPE), TINY_AFFINE), str(path)
    )
    _set_slope(path, np.nan)
    code, text = check(toml, capsys)
    assert code == 0, text


def test_empty_table_and_header_only(tmp_path, capsys):
    toml = study(tmp_path)
    path = table_path(toml)
    header = path.read_text().splitlines()[0]
    path.write_text("")
    refused_alike(toml, capsys, "runs.tsv: the runs table is empty")
    path.write_text(header + "\n")
    refused_alike(toml, capsys, "runs.tsv: the runs table has no rows (only a header line)")


def test_table_not_utf8(tmp_path, capsys):
    toml = study(tmp_path)
    path = table_path(toml)
    path.write_bytes(path.read_bytes().replace(b"\na\t", b"\n\xe9\t", 1))
    refused_alike(toml, capsys, "runs.tsv: the runs table is not UTF-8 text")


def test_bom_csv_crlf_and_blank_rows_are_read(tmp_path, capsys):
    # a UTF-8 byte-order mark, Windows line ends (RFC 4180 uses CRLF) and spreadsheet
    # rows of empty cells are all accepted; line numbers stay the physical lines
    toml = study(tmp_path)
    table = pd.read_csv(table_path(toml), sep="\t", dtype=str)
    text = table.to_csv(index=False, lineterminator="\r\n")
    lines = text.split("\r\n")
    lines.insert(3, ",,")  # an empty spreadsheet row as line 4
    (toml.parent / "runs.csv").write_bytes("\r\n".join(lines).encode("utf-8-sig"))
    toml.write_text(toml.read_text().replace("runs.tsv", "runs.csv"))
    code, text = check(toml, capsys)
    assert code == 0, text
    assert "animals      3, runs 6" in text
    # a problem on the row after the blank one is reported at its physical line (5)
    save(toml.parent / "maps" / "run002_effect.nii.gz", np.full(SHAPE, np.nan))
    refused_alike(toml, capsys, "runs.csv line 5 (animal b)", "are NaN")


def test_all_nan_map_inside_a_mask_gets_one_message(tmp_path, capsys):
    # lowering min_coverage would not help a run without any value: only one message
    effects = np.random.default_rng(7).normal(1, 1, size=(6, *SHAPE))
    effects[1] = np.nan
    toml = study(tmp_path, effects=effects, mask=np.ones(SHAPE, bool))
    text = refused_alike(
        toml,
        capsys,
        f"runs.tsv line 3 (animal a): run001_effect.nii.gz: all {N_VOXELS} voxel(s) are NaN",
    )
    assert "min_coverage below 1" not in text


def test_control_character_in_a_contrast_name_of_the_study_file(tmp_path, capsys):
    toml = study(
        tmp_path,
        toml_extra='\n[[contrast]]\nname = "mean\\tresponse"\nweights = { Intercept = 1 }\n',
    )
    # the name rule of result folders (grouplevel.outputs.names) refuses it first
    refused_alike(
        toml, capsys, "[contrast 1] name: 'mean\\tresponse' holds a control character (code 9)"
    )


def _with_atlas(tmp_path: Path, label_text: str) -> Path:
    toml = study(tmp_path, mask=np.ones(SHAPE, bool))
    labels = np.ones(SHAPE)
    labels[2:] = 2
    save(toml.parent / "atlas.nii.gz", labels)
    (toml.parent / "atlas.tsv").write_text(label_text)
    toml.write_text(toml.read_text() + '\n[atlas]\nimage = "atlas.nii.gz"\nlabels = "atlas.tsv"\n')
    return toml


def test_atlas_label_table_with_merged_rows_is_refused(tmp_path, capsys):
    # the same quote rule as the runs table (RFC 4180, section 2): rows 2-3 would merge
    toml = _with_atlas(
        tmp_path, 'index\tname\themisphere\n1\t"left part\tleft\n2\tright part"\tright\n'
    )
    refused_alike(toml, capsys, "atlas.tsv: 2 line(s) hold rows but 1 row(s)", "line(s) 2, 3")


def test_atlas_label_table_problems_name_physical_lines(tmp_path, capsys):
    # a blank line 3 keeps the bad hemisphere on line 4
    toml = _with_atlas(tmp_path, "index\tname\themisphere\n1\tleft\tleft\n\n2\tright\tnorth\n")
    refused_alike(toml, capsys, "atlas.tsv, line 4: hemisphere 'north'")


def test_reserved_line_column_is_refused(tmp_path, capsys):
    toml = study(tmp_path, columns={"line": ["1"] * 6})
    refused_alike(toml, capsys, "runs.tsv line 1: 'line' is a column name grouplevel uses")


def _patch_sform_x(path: Path, value: float) -> None:
    # srow_x starts at byte 280 and qform_code is the int16 at byte 252 of a NIfTI-1
    # header (NIfTI-1 standard, nifti1.h; value from memory, checked below)
    raw = bytearray(gzip.decompress(path.read_bytes()))
    raw[252:254] = struct.pack("<h", 0)  # no qform: the sform alone places the grid
    raw[280:284] = struct.pack("<f", value)
    path.write_bytes(gzip.compress(bytes(raw)))


def test_sform_patch_offsets_are_right(tmp_path):
    path = save(tmp_path / "m.nii.gz", np.ones(SHAPE))
    _patch_sform_x(path, 0.3)
    assert nib.load(str(path)).affine[0, 0] == pytest.approx(0.3)


@pytest.mark.parametrize(
    ("value", "needle"), [(0.0, "is degenerate"), (float("nan"), "holds NaN or infinite")]
)
def test_unusable_affine_is_refused(tmp_path, capsys, value, needle):
    # a zero voxel size makes the affine singular (common practice: det = 0)
    toml = study(tmp_path)
    _patch_sform_x(toml.parent / "maps" / "run002_effect.nii.gz", value)
    text = refused_alike(toml, capsys, "1 problem(s)", "runs.tsv line 4 (animal b)", needle)
    assert "line 3" not in text
