"""Atlas label tables in each accepted form (grouplevel.anatomy.labels).

Outside references used here:
- the BIDS specification, derivatives, discrete segmentations: a ``dseg.tsv`` look-up
  table with the columns ``index``, ``name``, ``abbreviation``, ``color``, ``mapping``
  (value from memory);
- the structure tables that rodent reference atlases share, with the columns ``id``,
  ``acronym``, ``name``, ``parent_structure_id`` and ``color_hex_triplet`` (six hex
  digits without "#"), also as a JSON tree in which each structure lists its
  ``children`` under a wrapping ``msg`` list (value from memory; the atlas below is
  invented, in our own scenario);
- voxel counts of each label counted directly with ``numpy.bincount``;
- Python's ``csv.Sniffer`` (standard library) for the separator a table is written with;
- the hemisphere spellings in names (``Left X``, ``X (L)``, ``X_R``, ``lh.X``, ``X left``)
  are common practice in published label tables.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from grouplevel.anatomy.atlas import read_atlas
from grouplevel.anatomy.labels import COLUMN_ALIASES, read_label_table
from grouplevel.anatomy.sidenames import split_hemisphere
from grouplevel.errors import UserError
from grouplevel.intake.images import Grid
from grouplevel.intake.textcheck import read_text_table
from grouplevel.questions.sides import asked_region, split_side
from grouplevel.questions.symmetry import region_pair

SHAPE = (6, 7, 5)
AFFINE = np.diag([0.2, 0.2, 0.2, 1.0])

# The invented atlas: (index, name, abbreviation, hemisphere, parent index, colour)
REGIONS = (
    (1, "cortex", "Ctx", "left", 0, "#7f7f7f"),
    (2, "cortex", "Ctx", "right", 0, "#7f7f7f"),
    (3, "auditory area", "Aud", "left", 1, "#3b8bc2"),
    (4, "auditory area", "Aud", "right", 2, "#3b8bc2"),
    (6, "visual area", "Vis", "left", 1, "#55aa55"),
    (7, "visual area", "Vis", "right", 2, "#55aa55"),
    (5, "septum", "Sep", "both", 0, "#aa5555"),
)


def _labels() -> np.ndarray:
    """Leaves 3/4 (front), 6/7 (back) on the left (i < 3) and right; septum 5 across the
    midline in the top slice; the rest of the top slice is background."""
    i, j, k = np.indices(SHAPE)
    left = i < 3
    labels = np.where(j < 4, np.where(left, 3, 4), np.where(left, 6, 7))
    labels[k == 4] = 0
    labels[(k == 4) & ((i == 2) | (i == 3))] = 5
    return labels.astype(np.int16)


def _write_image(folder: Path, dtype=np.int16) -> Path:
    path = folder / "atlas.nii.gz"
    nib.save(nib.Nifti1Image(_labels().astype(dtype), AFFINE), str(path))
    return path


def _side_word(hemisphere: str, spelling: str) -> str:
    return {"left": spelling[0], "right": spelling[1]}.get(hemisphere, "")


# --- the same atlas written in each accepted form -------------------------------------


def _bids_tsv(folder: Path) -> Path:
    lines = ["index\tname\tabbreviation\themisphere\tparent\tcolor"]
    for index, name, abbreviation, side, parent, colour in REGIONS:
        lines.append(f"{index}\t{name}\t{abbreviation}\t{side}\t{parent or ''}\t{colour}")
    path = folder / "atlas_dseg.tsv"
    path.write_text("\n".join(lines) + "\n")
    return path


def _structure_csv(folder: Path) -> Path:
    """Structure-table columns; the hemisphere only in the names ("Left X")."""
    lines = ["id,acronym,structure_name,parent_structure_id,color_hex_triplet"]
    for index, name, abbreviation, side, parent, colour in REGIONS:
        written = f"{_side_word(side, ('Left', 'Right'))} {name}".strip()
        lines.append(f"{index},{abbreviation},{written},{parent or ''},{colour[1:]}")
    path = folder / "structures.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def _label_tsv(folder: Path) -> Path:
    """``label`` holds the integer; names, side words and parents by name."""
    lines = ["label\tregion\tabbr\tside\tparent name\tcolour"]
    names = {index: name for index, name, *_ in REGIONS}
    for index, name, abbreviation, side, parent, colour in REGIONS:
        side_word = {"left": "L", "right": "R", "both": "bilateral"}[side]
        lines.append(
            f"{index}\t{name}\t{abbreviation}\t{side_word}\t{names.get(parent, '')}\t{colour}"
        )
    path = folder / "labels.txt"
    path.write_text("\n".join(lines) + "\n")
    return path


def _label_name_csv(folder: Path) -> Path:
    """``label`` holds the name, with the side in several spellings; the abbreviation
    carries the side too."""
    spellings = [("{} (L)", "{} (R)"), ("{}_L", "{}_R"), ("lh.{}", "rh.{}")]
    lines = ["id,label,acronym,parent_id"]
    for number, (index, name, abbreviation, side, parent, _) in enumerate(REGIONS):
        pattern = _side_word(side, spellings[number % 3]) or "{}"
        lines.append(
            f"{index},{pattern.format(name)},{pattern.format(abbreviation)},{parent or ''}"
        )
    path = folder / "labels.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def _json_tree(folder: Path) -> Path:
    """A nested tree under a wrapping list, hemisphere in a key of its own."""

    def node(row):
        index, name, abbreviation, side, _, colour = row
        return {
            "id": index,
            "name": name,
            "acronym": abbreviation,
            "hemisphere": {"left": "lh", "right": "rh", "both": "both"}[side],
            "color_hex_triplet": colour[1:],
            "children": [node(r) for r in REGIONS if r[4] == index],
        }

    tree = {"success": True, "msg": [node(r) for r in REGIONS if r[4] == 0]}
    path = folder / "tree.json"
    path.write_text(json.dumps(tree, indent=2))
    return path


def _json_list(folder: Path) -> Path:
    """A flat list of regions; the side in the names ("X, left"), parents by index."""
    items = [
        {
            "index": index,
            "name": f"{name}, {side}" if side != "both" else name,
            "abbreviation": abbreviation,
            "parent": parent or None,
            "color": colour,
        }
        for index, name, abbreviation, side, parent, colour in REGIONS
    ]
    path = folder / "regions.json"
    path.write_text(json.dumps(items))
    return path


FORMS = (_bids_tsv, _structure_csv, _label_tsv, _label_name_csv, _json_tree, _json_list)


def _atlas(image: Path, table: Path):
    grid = Grid(SHAPE, AFFINE)
    return read_atlas(image, table, grid, np.ones(SHAPE, dtype=bool))


COMPARED = ["index", "name", "abbreviation", "hemisphere", "parent", "is_leaf", "n_voxels"]


def test_every_form_gives_the_same_regions(tmp_path: Path):
    image = _write_image(tmp_path)
    reference = _atlas(image, _bids_tsv(tmp_path))
    regions = reference.regions.set_index("index")
    # voxel counts of the painted leaves, counted directly with numpy
    counts = np.bincount(_labels().ravel(), minlength=8)
    for index in (3, 4, 5, 6, 7):
        assert regions.loc[index, "n_voxels"] == counts[index]
    assert regions.loc[1, "n_voxels"] == counts[3] + counts[6]
    assert regions.loc[2, "parent"] == -1 and regions.loc[7, "parent"] == 2
    assert regions.loc[5, "hemisphere"] == "both"  # a midline structure, not split
    for form in FORMS[1:]:
        atlas = _atlas(image, form(tmp_path))
        # a JSON tree lists the regions in tree order: compare them by index
        order = np.argsort(atlas.regions["index"].to_numpy(), kind="stable")
        expected = np.argsort(reference.regions["index"].to_numpy(), kind="stable")
        pd.testing.assert_frame_equal(
            atlas.regions[COMPARED].iloc[order].reset_index(drop=True),
            reference.regions[COMPARED].iloc[expected].reset_index(drop=True),
            obj=form.__name__,
        )
        difference = atlas.shares[:, order] - reference.shares[:, expected]
        assert abs(difference).max() == 0, form.__name__
        if form is not _label_name_csv:  # the one form without colours
            colours = atlas.regions["color"].to_numpy()[order]
            assert colours.tolist() == reference.regions["color"].to_numpy()[expected].tolist()


def test_reading_notes_say_what_was_done(tmp_path: Path):
    assert read_label_table(_bids_tsv(tmp_path)).notes == ()
    notes = read_label_table(_structure_csv(tmp_path)).notes
    assert any(
        "'structure_name' as the name" in n and "'acronym' as the abbreviation" in n for n in notes
    )
    assert any("hemisphere read from the region name in 6 row(s)" in n for n in notes)
    notes = read_label_table(_label_tsv(tmp_path)).notes
    assert any("column 'label' read as the index" in n for n in notes)
    notes = read_label_table(_label_name_csv(tmp_path)).notes
    assert any("column 'label' read as the name" in n for n in notes)
    notes = read_label_table(_json_tree(tmp_path)).notes
    assert any("a tree of 7 regions, 2 levels deep, flattened" in n for n in notes)


def test_float_stored_labels_and_rows_never_painted(tmp_path: Path):
    image = _write_image(tmp_path, dtype=np.float32)
    table = _bids_tsv(tmp_path)
    table.write_text(table.read_text() + "9\tolfactory bulb\tOB\tleft\t1\t\n")
    atlas = _atlas(image, table)
    regions = atlas.regions.set_index("index")
    assert regions.loc[3, "n_voxels"] == np.count_nonzero(_labels() == 3)
    assert any("9 (olfactory bulb)" in w and "not in the image" in w for w in atlas.warnings)


# --- one column alias at a time ---------------------------------------------------------


@pytest.mark.parametrize(
    ("role", "alias"),
    [(role, alias) for role, aliases in COLUMN_ALIASES.items() for alias in aliases],
)
def test_each_column_alias(tmp_path: Path, role: str, alias: str):
    reference = read_label_table(_bids_tsv(tmp_path)).table
    written = pd.read_csv(_bids_tsv(tmp_path), sep="\t", dtype=str, keep_default_na=False)
    header = alias.replace("_", " ") if alias == "label_name" else alias
    written = written.rename(columns={role: header})
    path = tmp_path / "aliased.tsv"
    written.to_csv(path, sep="\t", index=False)
    table = read_label_table(path).table
    pd.testing.assert_frame_equal(table, reference)


def test_two_columns_for_one_role_are_refused(tmp_path: Path):
    path = tmp_path / "both_names.csv"
    path.write_text("id,name,structure_name\n1,cortex,Cortex\n")
    with pytest.raises(UserError, match=r"both_names\.csv.*'name', 'structure_name'"):
        read_label_table(path)
    path = tmp_path / "two_indices.tsv"
    path.write_text("index\tlabel\tname\n1\t1\tcortex\n")
    with pytest.raises(UserError, match=r"two_indices\.tsv.*could be the index.*'index', 'label'"):
        read_label_table(path)
    path = tmp_path / "no_name.tsv"
    path.write_text("index\tcolour\n1\t#ffffff\n")
    with pytest.raises(
        UserError, match=r"no_name\.tsv: .*no name column \(found 'index', 'colour'\)"
    ):
        read_label_table(path)


def test_side_in_name_that_contradicts_the_column_is_refused(tmp_path: Path):
    path = tmp_path / "contradiction.tsv"
    path.write_text("index\tname\themisphere\n1\tLeft cortex\tright\n")
    with pytest.raises(
        UserError, match=r"contradiction\.tsv, line 2: the name 'Left cortex' says left"
    ):
        read_label_table(path)


# --- hemisphere in the name --------------------------------------------------------------


@pytest.mark.parametrize(
    ("written", "base", "side"),
    [
        ("Left auditory area", "auditory area", "left"),
        ("right auditory area", "auditory area", "right"),
        ("Right_auditory area", "auditory area", "right"),
        ("auditory area (L)", "auditory area", "left"),
        ("auditory area (r)", "auditory area", "right"),
        ("auditory area (left hemisphere)", "auditory area", "left"),
        ("auditory area(R)", "auditory area", "right"),
        ("auditory area_L", "auditory area", "left"),
        ("Aud_R", "Aud", "right"),
        ("auditory area_right", "auditory area", "right"),
        ("auditory area left", "auditory area", "left"),
        ("auditory area, right", "auditory area", "right"),
        ("lh.auditory area", "auditory area", "left"),
        ("rh_auditory area", "auditory area", "right"),
        ("LH-auditory area", "auditory area", "left"),
        # not a side: kept as written
        ("Rhomboid nucleus", "Rhomboid nucleus", ""),
        ("lateral septum", "lateral septum", ""),
        ("CA1", "CA1", ""),
        ("Left", "Left", ""),
        ("nucleus of the lateral lemniscus", "nucleus of the lateral lemniscus", ""),
        ("leftover tissue", "leftover tissue", ""),
        ("field CA3 (pyramidal layer)", "field CA3 (pyramidal layer)", ""),
        # a tab is an error the table checks report, never a separator of a side word
        ("left\tpart", "left\tpart", ""),
    ],
)
def test_hemisphere_spellings_in_names(written: str, base: str, side: str):
    assert split_hemisphere(written) == (base, side)


def test_parent_named_with_its_side_keeps_pointing_at_that_row(tmp_path: Path):
    path = tmp_path / "named_parents.tsv"
    path.write_text(
        "index\tname\tparent\n"
        "1\tLeft cortex\t\n2\tRight cortex\t\n"
        "3\tLeft auditory area\tLeft cortex\n4\tRight auditory area\tRight cortex\n"
    )
    table = read_label_table(path).table.set_index("index")
    assert table["name"].tolist() == ["cortex", "cortex", "auditory area", "auditory area"]
    assert table.loc["3", "parent"] == "1" and table.loc["4", "parent"] == "2"
    assert table["hemisphere"].tolist() == ["left", "right", "left", "right"]


# --- JSON ------------------------------------------------------------------------------------


def test_json_tree_flattened_with_parents_and_lines(tmp_path: Path):
    path = _json_tree(tmp_path)
    table = read_label_table(path).table
    assert table["index"].tolist() == ["1", "3", "6", "2", "4", "7", "5"]  # file order
    assert dict(zip(table["index"], table["parent"], strict=True)) == {
        "1": "",
        "3": "1",
        "6": "1",
        "2": "",
        "4": "2",
        "7": "2",
        "5": "",
    }
    # each row's line is the line of the "{" that opens its object in the file
    text = path.read_text().splitlines()
    for index, line in zip(table["index"], table["line"], strict=True):
        assert text[line - 1].strip() == "{"
        assert text[line].strip() == f'"id": {index},'


def test_json_problems_name_the_file_and_line(tmp_path: Path):
    path = tmp_path / "broken.json"
    path.write_text('[\n  {"id": 1, "name": "cortex"},\n  {"id": 2 "name": "septum"}\n]\n')
    with pytest.raises(UserError, match=r"broken\.json, line 3: not valid JSON"):
        read_label_table(path)
    path = tmp_path / "two_lists.json"
    path.write_text(json.dumps({"a": [{"id": 1}], "b": [{"id": 2}]}))
    with pytest.raises(UserError, match=r"two_lists\.json: cannot find the regions .*'a', 'b'"):
        read_label_table(path)
    # a JSON tree saved under another extension is still read as JSON, never dumped
    moved = tmp_path / "tree.tsv"
    moved.write_text(_json_tree(tmp_path).read_text())
    assert len(read_label_table(moved).table) == len(REGIONS)


def test_json_row_problem_names_its_line(tmp_path: Path):
    path = tmp_path / "bad_side.json"
    path.write_text('[\n{"id": 1, "name": "cortex"},\n{"id": 2, "name": "x", "side": "dorsal"}\n]')
    grid = Grid(SHAPE, AFFINE)
    with pytest.raises(UserError) as caught:
        read_atlas(_write_image(tmp_path), path, grid, np.ones(SHAPE, dtype=bool))
    assert caught.value.problems == [
        f"{path}, line 3: hemisphere 'dorsal' of index 2 is not left, right, both or empty"
    ]


# --- regions named by abbreviation, with sides ---------------------------------------


def test_acronyms_and_table_spellings_name_regions(tmp_path: Path):
    atlas = _atlas(_write_image(tmp_path), _structure_csv(tmp_path))
    by_name = asked_region(atlas, "auditory area (left)", None).rows
    assert len(by_name) == 1
    assert atlas.regions.iloc[by_name[0]]["index"] == 3
    for text in ("Aud (left)", "aud (Left)", "Left auditory area", "auditory area (L)", "Aud_L"):
        assert asked_region(atlas, text, None).rows == by_name, text
    assert asked_region(atlas, "Aud (contralateral)", "right").rows == by_name
    assert region_pair(atlas, "Aud") == region_pair(atlas, "auditory area")
    assert region_pair(atlas, "Vis (R)") == region_pair(atlas, "visual area")
    assert split_side("forelimb area (right)") == ("forelimb area", "right")


# --- separators -------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("file_name", "separator", "named"),
    [
        ("atlas.csv", ";", "semicolon"),
        ("atlas.tsv", ";", "semicolon"),
        ("atlas.tsv", ",", "comma"),
        ("atlas.csv", "\t", "tab"),
        ("atlas.tsv", "|", "vertical bar"),
    ],
)
def test_separator_hint(tmp_path: Path, file_name: str, separator: str, named: str):
    path = tmp_path / file_name
    rows = [["index", "name", "abbreviation"], ["1", "cortex", "Ctx"], ["2", "septum", "Sep"]]
    path.write_text("\n".join(separator.join(r) for r in rows) + "\n")
    # the separator Python's csv.Sniffer finds is the one the message names
    sniffed = csv.Sniffer().sniff(path.read_text(), delimiters=";,\t|").delimiter
    assert sniffed == separator
    with pytest.raises(
        UserError, match=rf"{file_name}: the atlas label table reads as a single column.*{named}"
    ):
        read_label_table(path)


def test_separator_hint_for_the_runs_table(tmp_path: Path):
    path = tmp_path / "runs.csv"
    path.write_text("animal;effect;variance\nm1;a.nii.gz;v.nii.gz\nm2;b.nii.gz;w.nii.gz\n")
    with pytest.raises(
        UserError,
        match=r"runs\.csv: the runs table reads as a single column, but its header line "
        r"holds 2 semicolon",
    ):
        read_text_table(path, "runs table", "animal, effect, ...")
    # a semicolon inside a value of a properly separated table is not a separator
    good = tmp_path / "good.tsv"
    good.write_text("animal\tnote\nm1\ta;b\n")
    assert read_text_table(good, "runs table", "animal, ...")["note"].tolist() == ["a;b"]
