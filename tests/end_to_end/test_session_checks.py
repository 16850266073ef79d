"""What `grouplevel check` says about sessions (days) of an animal.

Outside reference: the nested analysis of variance (common practice): an effect that
varies between the sessions of an animal is judged against the sessions within animals,
so pooling day-to-day variance into the run variance overstates its df.
"""

from __future__ import annotations

import numpy as np
import pytest

from grouplevel.cli import main
from tests.conftest import write_study

CONTRAST_DRUG = '\n[[contrast]]\nname = "drug"\nweights = { drug = 1 }\n'
NO_PERMUTATIONS = "\n[inference]\npermutations = 0\n"


def _sessions_study(tmp_path, model: str):
    # 6 animals × 2 days × 2 runs; drug on day 2 (a session-level column)
    m = 6
    animal = np.repeat(np.arange(m), 4)
    day = np.tile(["d1", "d1", "d2", "d2"], m)
    y = np.random.default_rng(4).normal(size=(animal.size, 2, 1, 1))
    return write_study(
        tmp_path / "s",
        y,
        [f"a{a}" for a in animal],
        shape=(2, 1, 1),
        columns={"session": list(day), "drug": [1.0 if d == "d2" else 0.0 for d in day]},
        model=model,
        toml_extra=NO_PERMUTATIONS + CONTRAST_DRUG,
    )


@pytest.mark.parametrize(
    ("model", "expected", "absent"),
    [
        (
            'formula = "1 + drug"\nrandom_slopes = "none"\nsessions = "none"',
            "day-to-day variance is pooled into the run variance",
            "scatter of sessions within animals",
        ),
        (
            'formula = "1 + drug"\nrandom_slopes = "none"',
            "judged against the scatter of sessions within animals with sessions − animals df",
            "pooled into the run variance",
        ),
    ],
)
def test_check_cautions_about_sessions(tmp_path, capsys, model, expected, absent):
    code = main(["check", str(_sessions_study(tmp_path, model))])
    captured = capsys.readouterr()
    text = " ".join((captured.out + captured.err).split())
    assert code == 0, text
    assert expected in text
    assert absent not in text
