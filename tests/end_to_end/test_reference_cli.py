"""Published mixed-model examples run end to end through the command line.

Each observation becomes one tiny map (constant over a 2 × 2 × 2 grid), each group one
"animal"; the written maps must reproduce the published REML fits. The raw data and
their sources are in tests/reference_data.py.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from grouplevel.cli import main
from tests import reference_data as ref
from tests.conftest import write_study

SHAPE = (2, 2, 2)


def _value(out: Path, name: str) -> float:
    data = np.asarray(nib.load(str(out / "mean" / f"{name}.nii.gz")).dataobj, dtype=float)
    assert np.allclose(data, data.flat[0])  # every voxel holds the same fit
    return float(data.flat[0])


def _run(toml: Path, out: Path) -> None:
    assert main(["run", str(toml), "--out", str(out), "--quiet", "--permutations", "0"]) == 0


def test_rail_through_the_command_line(tmp_path):
    # Pinheiro & Bates (2000), Rail data: REML σ_rail = 24.805, σ = 4.0208, intercept 66.5
    # (SE 10.17) — values from memory; the intercept SE and variances are also the ANOVA
    # values of this balanced design.
    values = np.array(ref.RAIL_TRAVEL).ravel()
    animals = [f"rail{i}" for i in range(6) for _ in range(3)]
    toml = write_study(tmp_path / "rail", values, animals, shape=SHAPE)
    out = tmp_path / "out"
    _run(toml, out)
    assert _value(out, "effect") == pytest.approx(ref.RAIL_INTERCEPT, abs=1e-3)
    assert _value(out, "se") == pytest.approx(ref.RAIL_INTERCEPT_SE, abs=5e-3)
    assert np.sqrt(_value(out, "var_animal")) == pytest.approx(ref.RAIL_SD_RAIL, abs=1e-3)
    assert np.sqrt(_value(out, "var_run")) == pytest.approx(ref.RAIL_SD_RESIDUAL, abs=1e-4)
    assert _value(out, "df") == 5
    assert _value(out, "t") == pytest.approx(ref.RAIL_INTERCEPT / ref.RAIL_INTERCEPT_SE, rel=1e-3)


def test_dyestuff_through_the_command_line(tmp_path):
    # Davies (1947) Dyestuff data; REML batch variance 1764.0, residual 2451.3, intercept
    # 1527.5 with SE 19.38 (REML; the often-quoted 17.69 is the ML value) — from memory.
    values = np.array(ref.DYESTUFF_YIELD).ravel()
    animals = [f"batch{i}" for i in range(6) for _ in range(5)]
    toml = write_study(tmp_path / "dye", values, animals, shape=SHAPE)
    out = tmp_path / "out"
    _run(toml, out)
    assert _value(out, "effect") == pytest.approx(ref.DYESTUFF_INTERCEPT, abs=1e-2)
    assert _value(out, "var_animal") == pytest.approx(ref.DYESTUFF_VAR_BATCH, rel=1e-4)
    assert _value(out, "var_run") == pytest.approx(ref.DYESTUFF_VAR_RESIDUAL, rel=1e-4)
    assert _value(out, "se") == pytest.approx(ref.DYESTUFF_INTERCEPT_SE_REML, abs=5e-3)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["results"]["mean"]["not_converged_voxels"] == 0


def test_bcg_meta_analysis_with_known_variances(tmp_path):
    # Known-variance path, one run per animal: the BCG vaccine trials (Colditz et al.
    # 1994, JAMA 271:698) by REML give τ² = 0.3132, μ = −0.7145, SE 0.1798
    # (Viechtbauer 2010, J Stat Softw 36(3); values from memory).
    yi, vi = ref.bcg_log_risk_ratio()
    animals = [f"trial{i}" for i in range(len(yi))]
    toml = write_study(
        tmp_path / "bcg",
        np.array(yi),
        animals,
        variances=np.array(vi),
        shape=SHAPE,
        model='run_variance = "known"',
    )
    out = tmp_path / "out"
    _run(toml, out)
    assert _value(out, "effect") == pytest.approx(ref.BCG_MU, abs=1e-4)
    assert _value(out, "se") == pytest.approx(ref.BCG_MU_SE, abs=1e-4)
    assert _value(out, "var_animal") == pytest.approx(ref.BCG_TAU2, abs=1e-4)
    assert _value(out, "var_run") == 0.0
