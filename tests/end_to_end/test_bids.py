"""A runs table from a BIDS-style derivatives folder (``grouplevel table``, or
``[study] table`` naming the folder).

The file names follow the BIDS entity rules (``key-label`` parts joined by ``_``, a
suffix last; BIDS specification, "Entities"); the reference for every layout is the
same study written as a hand-made runs table, which must give identical group maps.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from grouplevel.cli import main
from grouplevel.errors import UserError
from grouplevel.intake.bids import derivatives_table, parse_name
from grouplevel.pipeline import fit_study
from grouplevel.study import load_study
from tests.conftest import save

SHAPE = (3, 3, 2)
GENOTYPE = {"m0": "wt", "m1": "ko", "m2": "wt", "m3": "ko", "m4": "wt", "m5": "ko"}


def _maps(seed: int = 3):
    """Six animals × 2 sessions × 2 runs × conditions paw/sound, with variances."""
    rng = np.random.default_rng(seed)
    out = []
    for a in range(6):
        u = rng.normal(0, 1, SHAPE)
        for ses in (1, 2):
            for run in (1, 2):
                for cond in ("paw", "sound"):
                    out.append(
                        {
                            "animal": f"m{a}",
                            "session": str(ses),
                            "run": str(run),
                            "condition": cond,
                            "effect": 0.5 + u + rng.normal(0, 0.5, SHAPE),
                            "variance": rng.uniform(0.05, 0.2, SHAPE),
                        }
                    )
    return out


def _write_derivatives(folder: Path, maps, *, sessions=True, runs=True, task=None, se=False):
    for m in maps:
        parts = [f"sub-{m['animal']}"]
        if sessions:
            parts.append(f"ses-{m['session']}")
        if task:
            parts.append(f"task-{task}")
        if runs:
            parts.append(f"run-{m['run']}")
        parts.append(f"contrast-{m['condition']}")
        sub = folder / f"sub-{m['animal']}" / (f"ses-{m['session']}" if sessions else "")
        stem = "_".join(parts)
        save(sub / f"{stem}_stat-effect_statmap.nii.gz", m["effect"])
        if se:
            save(sub / f"{stem}_stat-se_statmap.nii.gz", np.sqrt(m["variance"]))
        else:
            save(sub / f"{stem}_stat-variance_statmap.nii.gz", m["variance"])
    pd.DataFrame(
        {"participant_id": [f"sub-{a}" for a in GENOTYPE], "genotype": list(GENOTYPE.values())}
    ).to_csv(folder / "participants.tsv", sep="\t", index=False)
    (folder / "README").write_text("invented first-level maps for a test\n")
    return folder


def _write_table(folder: Path, maps) -> Path:
    rows = []
    for k, m in enumerate(maps):
        rows.append(
            {
                "animal": m["animal"],
                "session": m["session"],
                "run": m["run"],
                "condition": m["condition"],
                "effect": str(save(folder / "maps" / f"{k}_e.nii.gz", m["effect"])),
                "variance": str(save(folder / "maps" / f"{k}_v.nii.gz", m["variance"])),
                "genotype": GENOTYPE[m["animal"]],
            }
        )
    pd.DataFrame(rows).to_csv(folder / "runs.tsv", sep="\t", index=False)
    return folder / "runs.tsv"


def _study(folder: Path, table: str, model: str = 'formula = "1 + genotype"') -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "study.toml").write_text(f'[study]\ntable = "{table}"\n\n[model]\n{model}\n')
    return folder / "study.toml"


def _fit(path: Path):
    maps, _ = fit_study(load_study(path))
    return {m.name: m for m in maps}


def test_parse_name():
    e = parse_name("sub-m01_ses-2_task-blocks_run-3_contrast-paw_stat-effect_statmap.nii.gz")
    assert e == {
        "suffix": "statmap",
        "sub": "m01",
        "ses": "2",
        "task": "blocks",
        "run": "3",
        "contrast": "paw",
        "stat": "effect",
    }
    assert parse_name("sub-m01_stat-effect.nii")["stat"] == "effect"
    assert parse_name("notes.txt") is None
    assert parse_name("sub-m01_sub-m02_stat-effect.nii") is None  # an entity twice
    assert parse_name("sub_m01_stat-effect.nii.gz") is None


def test_folder_gives_the_same_group_result_as_the_hand_written_table(tmp_path):
    maps = _maps()
    ref = _fit(_study(tmp_path / "ref", str(_write_table(tmp_path / "ref", maps))))
    deriv = _write_derivatives(tmp_path / "deriv", maps)
    # the study file may name the folder itself
    direct = _fit(_study(tmp_path / "direct", str(deriv)))
    # or the table that `grouplevel table` writes
    out = tmp_path / "made" / "runs.tsv"
    assert main(["table", str(deriv), "--out", str(out)]) == 0
    made = _fit(_study(tmp_path / "made", "runs.tsv"))
    assert set(ref) == set(direct) == set(made)
    for name in ref:
        for other in (direct, made):
            for key in ("effect", "se", "t", "df"):
                np.testing.assert_array_equal(
                    getattr(other[name], key), getattr(ref[name], key), err_msg=f"{name} {key}"
                )


@pytest.mark.parametrize("layout", ["no sessions", "no runs", "two tasks", "se"])
def test_unusual_layouts(tmp_path, layout):
    maps = _maps()
    if layout == "no sessions":
        maps = [m for m in maps if m["session"] == "1"]
        deriv = _write_derivatives(tmp_path / "d", maps, sessions=False)
    elif layout == "no runs":
        maps = [m for m in maps if m["run"] == "1"]
        deriv = _write_derivatives(tmp_path / "d", maps, runs=False)
    elif layout == "two tasks":
        paw = [m for m in maps if m["condition"] == "paw"]
        _write_derivatives(tmp_path / "d", paw, task="touch")
        sound = [m for m in maps if m["condition"] == "sound"]
        deriv = _write_derivatives(tmp_path / "d", sound, task="noise")
    else:
        deriv = _write_derivatives(tmp_path / "d", maps, se=True)
    table = derivatives_table(deriv).table
    assert len(table) == len(maps)
    assert list(table["genotype"][table["animal"] == "m1"].unique()) == ["ko"]
    if layout == "no sessions":
        assert set(table["session"]) == {""}
    if layout == "no runs":
        assert set(table["run"]) == {""}
    if layout == "two tasks":
        assert set(table["condition"]) == {"touch-paw", "noise-sound"}
    if layout == "se":
        assert "se" in table.columns and "variance" not in table.columns
    study = load_study(_study(tmp_path / "s", str(deriv)))
    assert len(study.first_levels) == 2


def test_sessions_table_joins_session_covariates(tmp_path):
    deriv = _write_derivatives(tmp_path / "d", _maps())
    for a in GENOTYPE:
        pd.DataFrame({"session_id": ["ses-1", "ses-2"], "dose": ["0", "2.5"]}).to_csv(
            deriv / f"sub-{a}" / f"sub-{a}_sessions.tsv", sep="\t", index=False
        )
    table = derivatives_table(deriv).table
    assert set(zip(table["session"], table["dose"], strict=True)) == {("1", "0"), ("2", "2.5")}


def test_ambiguous_maps_are_refused_and_a_selection_resolves_them(tmp_path):
    maps = _maps()[:4]
    deriv = _write_derivatives(tmp_path / "d", maps)
    # the same maps again in a second space
    for path in list(deriv.rglob("*_statmap.nii.gz")):
        name = path.name.replace("_contrast-", "_space-other_contrast-")
        path.with_name(name).write_bytes(path.read_bytes())
    with pytest.raises(UserError) as err:
        derivatives_table(deriv)
    text = " ".join(err.value.problems)
    assert "space-other" in text and "--select" in text
    # choosing one space resolves it; the other files are listed as not selected
    chosen = derivatives_table(deriv, select={"space": "other"})
    assert len(chosen.table) == 4
    assert sum("not selected" in s for s in chosen.skipped) == 8


def test_unpaired_maps_are_named(tmp_path):
    deriv = _write_derivatives(tmp_path / "d", _maps()[:4])
    victim = next(deriv.rglob("*contrast-paw_stat-variance_statmap.nii.gz"))
    victim.rename(victim.with_name(victim.name.replace("contrast-paw", "contrast-paws")))
    with pytest.raises(UserError) as err:
        derivatives_table(deriv)
    text = " ".join(err.value.problems)
    assert "contrast-paws_stat-variance" in text and "no stat-effect map" in text
    assert "contrast-paw_stat-effect" in text and "no stat-variance or stat-se map" in text


def test_participants_problems(tmp_path):
    deriv = _write_derivatives(tmp_path / "d", _maps()[:8])
    pd.DataFrame({"participant_id": ["sub-m0"], "effect": ["x"]}).to_csv(
        deriv / "participants.tsv", sep="\t", index=False
    )
    with pytest.raises(UserError) as err:
        derivatives_table(deriv)
    assert "would replace runs-table columns" in " ".join(err.value.problems)
    pd.DataFrame({"participant_id": ["sub-m9"], "sex": ["f"]}).to_csv(
        deriv / "participants.tsv", sep="\t", index=False
    )
    with pytest.raises(UserError) as err:
        derivatives_table(deriv)
    assert "no row for animal(s) sub-m0" in " ".join(err.value.problems)
    # saved by a spreadsheet with semicolons: the separator is named (common practice:
    # spreadsheets in locales with a decimal comma separate "CSV" columns by ";")
    (deriv / "participants.tsv").write_text("participant_id;sex\nsub-m0;f\n")
    with pytest.raises(UserError) as err:
        derivatives_table(deriv)
    assert err.value.problems == [
        f"{deriv / 'participants.tsv'}: the table reads as a single column, but its header "
        "line holds 1 semicolon(s) (;): grouplevel reads tabs between the columns of a .tsv "
        "file; save it with tabs between the columns (in a spreadsheet: tab-separated text)"
    ]


def test_unrelated_files_are_skipped_and_listed(tmp_path, capsys):
    deriv = _write_derivatives(tmp_path / "d", _maps()[:4])
    save(deriv / "sub-m0" / "sub-m0_desc-brain_mask.nii.gz", np.ones(SHAPE))
    save(deriv / "sub-m0" / "sub-m0_stat-t_statmap.nii.gz", np.ones(SHAPE))
    out = tmp_path / "runs.tsv"
    assert main(["table", str(deriv), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "sub-m0_desc-brain_mask.nii.gz: no 'sub-' and 'stat-' entities" in printed
    assert "stat-t is not effect, variance or se" in printed
    assert "covariates  genotype" in printed
    # an existing table is not replaced without --force
    assert main(["table", str(deriv), "--out", str(out)]) == 2
    assert "--force" in capsys.readouterr().err


def test_empty_folder_is_a_clear_error(tmp_path, capsys):
    (tmp_path / "d").mkdir()
    assert main(["table", str(tmp_path / "d"), "--out", str(tmp_path / "r.tsv")]) == 2
    assert "no first-level map found" in capsys.readouterr().err


def test_participant_id_column_stands_for_animal(tmp_path):
    maps = _maps()
    path = _write_table(tmp_path, maps)
    table = pd.read_csv(path, sep="\t", dtype=str)
    table = table.rename(columns={"animal": "participant_id"})
    table["participant_id"] = "sub-" + table["participant_id"]
    table.to_csv(path, sep="\t", index=False)
    study = load_study(_study(tmp_path, "runs.tsv"))
    assert study.first_levels[0].design.animal_ids == tuple(GENOTYPE)
