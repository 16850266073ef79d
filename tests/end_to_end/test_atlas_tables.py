"""Atlas label tables through ``check`` and ``run``: messages and what ``check`` says.

These are checks of our error contract (CONVENTIONS.md: one message naming the file and
line, each problem once, exit status 2). The table forms themselves are checked against
outside references in tests/unit/test_atlas_labels.py.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from grouplevel.cli import main
from tests.conftest import TINY_AFFINE, write_study

SHAPE = (6, 7, 5)
ANIMALS = ["a", "a", "b", "b", "c", "c"]
NO_PERMUTATIONS = "\n[inference]\npermutations = 0\n"


def _labels() -> np.ndarray:
    i, j, _ = np.indices(SHAPE)
    return np.where(j < 4, np.where(i < 3, 3, 4), np.where(i < 3, 6, 7)).astype(np.int16)


def _study(folder: Path, table_name: str, table_text: str, questions: str = "") -> Path:
    rng = np.random.default_rng(5)
    effects = rng.normal(1.0, 0.5, (len(ANIMALS), *SHAPE))
    toml = write_study(
        folder,
        effects,
        ANIMALS,
        variances=np.full(len(ANIMALS), 0.3),
        shape=SHAPE,
        toml_extra=(
            f'\n[atlas]\nimage = "atlas.nii.gz"\nlabels = "{table_name}"\n'
            + NO_PERMUTATIONS
            + questions
        ),
    )
    nib.save(nib.Nifti1Image(_labels(), TINY_AFFINE), str(folder / "atlas.nii.gz"))
    (folder / table_name).write_text(table_text)
    return toml


def _cli(args, capsys) -> tuple[int, str, str]:
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


STRUCTURES = (
    "id,acronym,structure_name,parent_structure_id\n"
    "1,Ctx,Left cortex,\n2,Ctx,Right cortex,\n"
    "3,Aud,Left auditory area,1\n4,Aud,Right auditory area,2\n"
    "6,Vis,Left visual area,1\n7,Vis,Right visual area,2\n"
)


def test_check_reads_a_structure_table_and_says_so(tmp_path: Path, capsys):
    questions = '\n[questions]\nsymmetry = ["Aud"]\ntargets = ["Vis (right)", "Left Aud"]\n'
    toml = _study(tmp_path / "s", "structures.csv", STRUCTURES, questions)
    code, out, err = _cli(["check", toml], capsys)
    assert code == 0, err
    assert "'structure_name' as the name" in out and "'acronym' as the abbreviation" in out
    assert "hemisphere read from the region name in 6 row(s)" in out
    assert "study is valid" in out


def test_atlas_problems_under_the_atlas_path_once(tmp_path: Path, capsys):
    table = (
        "index\tname\themisphere\n"
        "3\tauditory area\tLH\n4\tauditory area\tdorsal\n"  # LH is a usual spelling
        "6\tvisual area\tleft\n7\tvisual area\tright\n"
    )
    toml = _study(tmp_path / "s", "atlas.tsv", table)
    labels = tmp_path / "s" / "atlas.tsv"
    for command in (["check", toml], ["run", toml, "--out", tmp_path / "out", "--quiet"]):
        code, _, err = _cli(command, capsys)
        assert code == 2, err
        lines = err.splitlines()
        assert lines[0] == f"error: {labels}: the atlas label table has 1 problem(s)"
        problem = f"{labels}, line 3: hemisphere 'dorsal' of index 4 is not left, right"
        assert lines[1:] == [f"  - {problem}, both or empty"]
        assert "runs.tsv" not in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("table_name", ["atlas.tsv", "atlas.csv"])
def test_semicolon_separated_atlas_table(tmp_path: Path, capsys, table_name: str):
    table = "index;name;hemisphere\n3;auditory area;left\n4;auditory area;right\n"
    toml = _study(tmp_path / "s", table_name, table)
    code, _, err = _cli(["check", toml], capsys)
    assert code == 2
    assert err.startswith(f"error: {tmp_path / 's' / table_name}: the atlas label table reads ")
    assert "2 semicolon(s) (;)" in err and len(err.splitlines()) == 1


def test_manuscript_tables_show_abbreviations_where_the_atlas_has_them():
    from grouplevel.report.tables import table_view

    frame = pd.DataFrame(
        {
            "cluster": [1, 1],
            "peak": [1, 2],
            "peak_region": ["primary auditory area", "secondary auditory area"],
            "peak_region_abbreviation": ["A1", "A2"],
            "peak_region_hemisphere": ["right", "right"],
        }
    )
    view = table_view("clusters", frame, "sound/clusters.tsv")
    headers = [c.header for c in view.columns]
    assert headers[headers.index("peak region") + 1] == "abbr."
    assert [row[headers.index("abbr.")] for row in view.rows] == ["A1", "A2"]
    # an atlas without abbreviations: no empty column
    empty = table_view("clusters", frame.assign(peak_region_abbreviation=""), "x")
    assert "abbr." not in [c.header for c in empty.columns]
