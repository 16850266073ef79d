"""Within-animal comparisons of first-level conditions (``[[comparison]]``).

The runs table holds one row per run and first-level condition (``condition`` column:
e.g. ``sound`` and ``paw`` fitted in the same runs). A comparison such as
``conditions = { paw = 1, sound = -1 }`` is fitted from the runs that carry every named
condition: each such run contributes the weighted sum of its condition maps,

    d_k = Σ_c w_c · effect_{k,c},    s_k² = Σ_c w_c² · variance_{k,c},

and these per-run differences enter the same mixed model as any condition (runs nested
in animals, a random intercept per animal). The animal-to-animal variance of the
difference is therefore the between-animal variance of that model, and its test has
between-animal degrees of freedom: the comparison is tested against how much it varies
between animals, as a within-animal effect must be (Holmes & Friston 1998).

The first-level maps of two conditions of one run share that run's noise, so their
covariance is not zero; the runs table does not carry it, and ``s_k²`` above leaves it
out. With ``[model] run_variance = "estimate"`` (the default) the run variance σ²
absorbs what the first-level variances miss; with ``"known"`` the difference's variance
is only approximate (see docs/model.md).

References
----------
Holmes, A. P., & Friston, K. J. (1998). Generalisability, random effects and population
inference. NeuroImage 7:S754.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from grouplevel.intake.settings import ComparisonSpec

# columns that identify one run; two conditions of the same run share all three
RUN_KEY = ("animal", "session", "run")
# column that lists a derived row's condition maps: tuple of (weight, effect, variance)
TERMS = "terms"
# column with every table line a derived row is made of (for messages)
PAIRED_LINES = "paired_lines"


def comparison_rows(
    table: pd.DataFrame,
    specs: Sequence[ComparisonSpec],
    path: Path,
    variance_kind: str,
    problems: list[str],
    warnings: list[str],
) -> pd.DataFrame:
    """One derived row per run that carries every condition of a comparison.

    Parameters
    ----------
    table
        The checked runs table (``condition`` column, absolute map paths, parsed
        ``exclude``, ``line``).
    specs
        The ``[[comparison]]`` blocks.
    path
        The runs table's path (for messages).
    variance_kind
        ``"variance"``, ``"se"`` or ``"none"``: the column that holds first-level
        variances.
    problems, warnings
        Collect what is wrong (unknown conditions, names in use, runs that appear twice)
        and what is left out (runs lacking a condition).

    Returns
    -------
    DataFrame
        Rows like the runs table's, with ``condition`` set to the comparison's name, the
        map columns of the first condition, ``exclude`` true when any member row is
        excluded, and two more columns: ``terms`` (the (weight, effect path, variance
        path) of each condition) and ``paired_lines``.
    """
    conditions = [c for c in dict.fromkeys(table["condition"]) if c]
    derived: list[pd.DataFrame] = []
    for spec in specs:
        where = f"[comparison] {spec.name!r}"
        if spec.name in conditions:
            problems.append(
                f"{where}: the name is already a condition of the runs table; "
                "choose another name for the comparison"
            )
            continue
        unknown = [c for c in spec.conditions if c not in conditions]
        if unknown:
            listed = ", ".join(conditions) if conditions else "none (no 'condition' column)"
            problems.append(
                f"{where}: condition(s) {', '.join(map(repr, unknown))} not in the runs "
                f"table's 'condition' column; conditions: {listed}"
            )
            continue
        rows = _pair(table, spec, path, variance_kind, problems, warnings)
        if rows is not None:
            derived.append(rows)
    if not derived:
        return table.iloc[0:0].assign(**{TERMS: [], PAIRED_LINES: []})
    return pd.concat(derived, ignore_index=True)


def _pair(
    table: pd.DataFrame,
    spec: ComparisonSpec,
    path: Path,
    variance_kind: str,
    problems: list[str],
    warnings: list[str],
) -> pd.DataFrame | None:
    """The derived rows of one comparison, or None after recording a problem."""
    where = f"[comparison] {spec.name!r}"
    members = {c: table[table["condition"] == c] for c in spec.conditions}
    for cond, rows in members.items():
        dup = rows[rows.duplicated(list(RUN_KEY), keep=False)]
        if len(dup):
            lines = ", ".join(str(v) for v in dup["line"])
            problems.append(
                f"{where}: {path.name} lines {lines}: condition {cond!r} has more than one row "
                "for the same animal, session and run, so its runs cannot be paired with the "
                "other conditions; give each run its own 'run' (and 'session') value"
            )
            return None
    keys = [set(map(tuple, rows[list(RUN_KEY)].to_numpy())) for rows in members.values()]
    common = set.intersection(*keys)
    lacking = sorted(set.union(*keys) - common)
    if lacking:
        lines = sorted(
            int(line)
            for rows in members.values()
            for line, key in zip(
                rows["line"], map(tuple, rows[list(RUN_KEY)].to_numpy()), strict=True
            )
            if key in lacking
        )
        warnings.append(
            f"{where}: {len(lacking)} run(s) lack one of the conditions "
            f"{', '.join(map(repr, spec.conditions))} and are left out of the comparison "
            f"({path.name} lines {', '.join(map(str, lines))})"
        )
    if not common:
        problems.append(
            f"{where}: no run carries every condition {', '.join(map(repr, spec.conditions))}; "
            "a comparison is made within runs (same animal, session and run values)"
        )
        return None
    indexed = {c: rows.set_index(list(RUN_KEY), drop=False) for c, rows in members.items()}
    first = next(iter(spec.conditions))
    order = [k for k in map(tuple, members[first][list(RUN_KEY)].to_numpy()) if k in common]
    out = indexed[first].loc[order].reset_index(drop=True).copy()
    parts = [indexed[c].loc[order].reset_index(drop=True) for c in spec.conditions]
    weights = list(spec.conditions.values())
    out["condition"] = spec.name
    out["exclude"] = np.logical_or.reduce([p["exclude"].to_numpy(bool) for p in parts])
    out["reason"] = [
        "; ".join(dict.fromkeys(r for r in reasons if r))
        for reasons in zip(*(p["reason"] for p in parts), strict=True)
    ]
    out[PAIRED_LINES] = [
        ", ".join(str(v) for v in lines) for lines in zip(*(p["line"] for p in parts), strict=True)
    ]
    with_variance = variance_kind != "none"
    out[TERMS] = [
        tuple(
            (w, str(p.at[i, "effect"]), str(p.at[i, variance_kind]) if with_variance else "")
            for w, p in zip(weights, parts, strict=True)
        )
        for i in range(len(out))
    ]
    return out


def combine(
    weights: Sequence[float],
    effects: Sequence[np.ndarray],
    variances: Sequence[np.ndarray | None],
) -> tuple[np.ndarray, np.ndarray | None]:
    """Weighted sum of condition maps and the variance of that sum (no covariance).

    A voxel missing (NaN) in any condition is missing in the sum.
    """
    effect = sum(w * np.asarray(e, dtype=np.float64) for w, e in zip(weights, effects, strict=True))
    if any(v is None for v in variances):
        return effect, None
    variance = sum(
        w * w * np.asarray(v, dtype=np.float64) for w, v in zip(weights, variances, strict=True)
    )
    return effect, variance
