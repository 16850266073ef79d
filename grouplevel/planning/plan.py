"""``grouplevel plan``: power of the target regions of a finished analysis.

Reads an output folder (``summary.json`` through :mod:`grouplevel.outputs.summary` and
each result folder's ``regions.tsv``), computes the plans with
:mod:`grouplevel.planning.power` and writes them back:

- :func:`plan_from_output`: the plans of the target regions (reads, writes nothing),
  giving :class:`PlanResult` objects;
- :func:`plans_figure_png`: heat maps of power with the target-power contour;
- :func:`write_plan`: ``power.tsv``, ``power.png`` and ``plan.json`` (summary.json,
  the record of the analysis, is left as the run wrote it).
"""

from __future__ import annotations

import io
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from grouplevel.errors import UserError
from grouplevel.inference.significance import DEFAULT_ALPHA
from grouplevel.inference.significance import SIDES as SIDED_CHOICES
from grouplevel.outputs.files import atomic_write
from grouplevel.outputs.folder import child_path, require_grouplevel_output
from grouplevel.outputs.records import read_plans, write_plans
from grouplevel.outputs.summary import read_summary
from grouplevel.planning.power import (
    _REGION_COLUMNS,
    CAUTION_GIVEN,
    CAUTION_OBSERVED,
    CAUTION_SESSIONS,
    CAUTION_VARIANCES,
    DEFAULT_COST_ANIMAL,
    DEFAULT_COST_RUN,
    DEFAULT_COST_SESSION,
    DEFAULT_SESSIONS,
    DEFAULT_TARGET_POWER,
    FIRST_LEVEL_VARIANCE_COLUMN,
    POWER_COLORMAP,
    cheapest_design,
    design_cost,
    design_power,
    power_grid,
    session_grid,
)
from grouplevel.questions.sides import resolve_side, split_side
from grouplevel.report.words import count

# --------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------


def _plain(value: Any) -> Any:
    """numpy scalars → Python numbers; NaN → None (JSON has no NaN)."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


@dataclass(frozen=True, eq=False)
class PlanResult:
    """The plan for one region of one analysed map.

    Attributes
    ----------
    name
        The result folder (the analysed map's name in ``summary.json``).
    region, hemisphere, region_index
        The region's name, hemisphere and atlas index (row of ``regions.tsv``).
    inputs
        What the grid was built from: ``effect``, ``effect_source`` ("observed" or
        "given"), ``var_animal``, ``var_run``, ``mean_first_level_variance``,
        ``first_level_variance_source``, ``alpha``, ``sided``, ``target_power``,
        ``cost_animal``, ``cost_run`` and the study's design (``animals``, ``runs``,
        ``runs_per_animal``, ``power_of_this_study``).
    grid
        :func:`power_grid` with a ``cost`` column.
    cheapest
        :func:`cheapest_design` of the grid, None when no design reaches the target.
    caution
        Why the numbers are optimistic; always shown with the plan.
    """

    name: str
    region: str
    hemisphere: str
    region_index: int
    inputs: dict[str, Any]
    grid: pd.DataFrame
    cheapest: pd.Series | None
    caution: str
    figure_title: str = field(default="")

    def summary(self) -> dict[str, Any]:
        """Plain-JSON description (for ``plan.json``)."""
        best = None
        sessions = "sessions" in self.grid.columns
        if self.cheapest is not None:
            best = {
                "animals": int(self.cheapest["animals"]),
                **({"sessions": int(self.cheapest["sessions"])} if sessions else {}),
                "runs": int(self.cheapest["runs"]),
                "power": float(self.cheapest["power"]),
                "se": float(self.cheapest["se"]),
                "cost": float(self.cheapest["cost"]),
            }
            for column in GAIN_COLUMNS:
                if column in self.cheapest.index:
                    best[column] = float(self.cheapest[column])
        grid = self.grid
        best_in_grid = grid.loc[grid["power"].idxmax()]
        extra: dict[str, Any] = {}
        if sessions:
            extra["sessions_range"] = [int(grid["sessions"].min()), int(grid["sessions"].max())]
            extra["runs_are"] = "runs per session"
        return {
            "result": self.name,
            "region": self.region,
            "hemisphere": self.hemisphere,
            "region_index": int(self.region_index),
            "inputs": {k: _plain(v) for k, v in self.inputs.items()},
            "animals_range": [int(grid["animals"].min()), int(grid["animals"].max())],
            "runs_range": [int(grid["runs"].min()), int(grid["runs"].max())],
            "cheapest": best,
            "highest_power_in_grid": {
                "animals": int(best_in_grid["animals"]),
                **({"sessions": int(best_in_grid["sessions"])} if sessions else {}),
                "runs": int(best_in_grid["runs"]),
                "power": float(best_in_grid["power"]),
            },
            **extra,
            "caution": self.caution,
        }

    def table(self) -> pd.DataFrame:
        """The grid with the result, region and hemisphere in front (for ``power.tsv``)."""
        front = pd.DataFrame(
            {
                "result": self.name,
                "region": self.region,
                "hemisphere": self.hemisphere,
                "region_index": int(self.region_index),
            },
            index=self.grid.index,
        )
        return pd.concat([front, self.grid], axis=1)

    def figure_png(self) -> bytes:
        """Heat map of power over animals × runs with the target-power contour (PNG)."""
        return plans_figure_png([self])


def design_text(row: pd.Series | dict, times: str = "×") -> str:
    """ "8 animals × 4 runs" or "8 animals × 2 sessions × 3 runs" ("1 run", not "1 runs");
    ``times="x"`` for the console, which may not print "×"."""
    parts = [count(int(row["animals"]), "animal")]
    if "sessions" in row:
        parts.append(count(int(row["sessions"]), "session"))
    parts.append(count(int(row["runs"]), "run"))
    return f" {times} ".join(parts)


def _figure_slice(res: PlanResult) -> tuple[pd.DataFrame, str, str]:
    """The part of a plan's grid a heat map shows, its row column and axis label.

    A grid over animals × runs is shown whole. A grid over animals × sessions × runs per
    session is shown over animals × sessions at the runs per session of the cheapest
    design (else the largest number of runs in the grid).
    """
    g = res.grid
    if "sessions" not in g.columns:
        return g, "runs", "runs per animal"
    runs = int(res.cheapest["runs"]) if res.cheapest is not None else int(g["runs"].max())
    return g[g["runs"] == runs], "sessions", f"sessions per animal ({runs} runs each)"


def plans_figure_png(results: Sequence[PlanResult]) -> bytes:
    """One heat-map panel per plan: power over animals × runs, target contour, cheapest.

    Colours: :data:`POWER_COLORMAP` from 0 to 1; the white line is the target power;
    the ring marks the cheapest design reaching it.
    """
    from matplotlib.figure import Figure
    from matplotlib.ticker import MaxNLocator

    if not results:
        raise ValueError("no plans to draw")
    n = len(results)
    cols = min(n, 2)
    rows = math.ceil(n / cols)
    fig = Figure(figsize=(5.2 * cols, 3.8 * rows), layout="constrained")
    axes = fig.subplots(rows, cols, squeeze=False)
    image = None
    for ax, res in zip(axes.ravel(), results, strict=False):
        g, rows, ylabel = _figure_slice(res)
        a = np.sort(g["animals"].unique())
        r = np.sort(g[rows].unique())
        power = (
            g.pivot(index=rows, columns="animals", values="power")
            .reindex(index=r, columns=a)
            .to_numpy(dtype=float)
        )
        image = ax.pcolormesh(
            a, r, power, cmap=POWER_COLORMAP, vmin=0.0, vmax=1.0, shading="nearest"
        )
        target = float(res.inputs["target_power"])
        if a.size > 1 and r.size > 1 and np.nanmin(power) < target < np.nanmax(power):
            contour = ax.contour(a, r, power, levels=[target], colors="white", linewidths=1.5)
            ax.clabel(contour, fmt={target: f"{100 * target:.0f}%"}, fontsize=8)
        if res.cheapest is not None:
            ax.plot(
                [res.cheapest["animals"]],
                [res.cheapest[rows]],
                marker="o",
                markersize=11,
                markerfacecolor="none",
                markeredgecolor="white",
                markeredgewidth=2,
                linestyle="none",
                label=f"cheapest: {design_text(res.cheapest)}",
            )
            ax.legend(
                loc="upper right", fontsize=8, facecolor="0.2", labelcolor="white", framealpha=0.8
            )
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
        ax.set_xlabel("animals")
        ax.set_ylabel(ylabel)
        ax.set_title(res.figure_title or f"{res.name}: {res.region} ({res.hemisphere})", fontsize=9)
    for ax in axes.ravel()[n:]:
        ax.set_visible(False)
    fig.colorbar(image, ax=axes.ravel().tolist(), label="power", shrink=0.9)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110)
    return buffer.getvalue()


# --------------------------------------------------------------------------------------
# Reading an output folder
# --------------------------------------------------------------------------------------


def _read_regions(path: Path) -> pd.DataFrame:
    table = pd.read_csv(path, sep="\t")
    missing = [c for c in _REGION_COLUMNS if c not in table.columns]
    if missing:
        raise UserError(
            f"{path}: lacks the column(s) {', '.join(missing)}; rerun the analysis to rewrite it"
        )
    return table


def _match_region(table: pd.DataFrame, name: str) -> np.ndarray:
    key = name.strip().casefold()
    names = table["name"].astype(str).str.casefold()
    hit = names == key
    if "abbreviation" in table.columns:
        hit |= table["abbreviation"].astype(str).str.casefold() == key
    return np.flatnonzero(hit.to_numpy())


def _target_names(settings: dict[str, Any], first_level: str | None) -> list[str]:
    by_contrast = settings.get("questions_by_contrast") or {}
    if first_level is not None and isinstance(by_contrast.get(first_level), dict):
        targets = by_contrast[first_level].get("targets") or []
        if targets:
            return [str(t) for t in targets]
    questions = settings.get("questions") or {}
    return [str(t) for t in (questions.get("targets") or [])]


def _stimulus_side(settings: dict[str, Any], first_level: str | None) -> str | None:
    """``[questions] stimulus_side`` of a first-level contrast, as saved in the summary."""
    by_contrast = settings.get("questions_by_contrast") or {}
    if first_level is not None and isinstance(by_contrast.get(first_level), dict):
        return by_contrast[first_level].get("stimulus_side")
    return (settings.get("questions") or {}).get("stimulus_side")


def _side_rows(table: pd.DataFrame, name: str, stimulus_side: str | None, source: str):
    """Rows of a one-sided name ("forelimb area (right)"), or None without a side suffix."""
    base, word = split_side(name)
    if not word:
        return None
    side = resolve_side(word, stimulus_side, source, name)
    hit = _match_region(table, base)
    on_side = [int(i) for i in hit if str(table["hemisphere"].iloc[i]) == side]
    if hit.size and not on_side:
        raise UserError(
            f"{source}: {name!r}: regions.tsv has no {side}-hemisphere row of {base!r}; name "
            "it without a side"
        )
    return np.asarray(on_side, dtype=np.int64)


def _is_group_mean(entry: dict[str, Any]) -> bool:
    columns = entry.get("design_columns")
    weights = entry.get("weights")
    if columns is None:  # an older summary without the design: assume the default mean
        return True
    return list(columns) == ["Intercept"] and (weights in (None, {"Intercept": 1.0}))


def _slope_effect(entry: dict[str, Any]) -> tuple[str, str, str] | None:
    """The tested within-animal effect of a result whose contrast is the mean of one
    random slope, or None.

    Returns
    -------
    column, variance_column, varies
        The design column (a 0/1 indicator of a text variable, e.g. ``drug[T.on]``, so
        that its coefficient is the difference between two conditions), the regions.tsv
        column of its slope variance and where it varies (``"session"`` or ``"run"``).
    """
    weights = entry.get("weights") or {}
    if entry.get("tested_level") != "slope" or len(weights) != 1:
        return None
    ((column, weight),) = weights.items()
    level = (entry.get("design_levels") or {}).get(column)
    component = (entry.get("variance_components") or {}).get(f"slope[{column}]")
    if weight != 1.0 or level not in ("session", "run") or "[T." not in column or not component:
        return None
    return column, str(component["map"]).removesuffix(".nii.gz"), level


class _FirstLevelVariance:
    """s̄² per region row when σ² was fixed at 0: read once per first-level contrast."""

    def __init__(self, summary: dict[str, Any]) -> None:
        self.summary = summary
        self.cache: dict[str | None, dict[int, float]] = {}
        self.study = None

    def for_result(self, first_level: str | None) -> dict[int, float]:
        if first_level not in self.cache:
            self.cache[first_level] = self._compute(first_level)
        return self.cache[first_level]

    def _compute(self, first_level: str | None) -> dict[int, float]:
        from grouplevel.anatomy.regions import region_variances
        from grouplevel.anatomy.tables import restrict_atlas
        from grouplevel.intake.study import load_runs, load_study
        from grouplevel.model.memory import REGION_AVERAGE_ARRAYS, chunk_rows

        source = (self.summary.get("settings") or {}).get("source")
        if not source or not Path(source).is_file():
            raise UserError(
                f"summary.json settings.source: the study file {source!r} is not there; "
                "the mean first-level variance of each region (needed because σ² was fixed "
                'at 0, run_variance = "known") is read from the run maps; put the study '
                "file and its maps back where they were analysed"
            )
        if self.study is None:
            self.study = load_study(source, permutations=0)
        study = self.study
        fl = next((f for f in study.first_levels if f.name == first_level), None)
        if fl is None or study.atlas is None:
            raise UserError(
                f"{source}: the study no longer has first-level contrast {first_level!r} "
                "or an atlas; it changed since the analysis, rerun the analysis"
            )
        if fl.variance_kind == "none":
            return {}
        self._check_unchanged(fl.runs[fl.variance_kind])
        data = load_runs(study, fl)
        restricted = restrict_atlas(study.atlas, study.atlas_mask, fl.mask)
        present = np.isfinite(data.effect) & np.isfinite(data.variance)
        rows = chunk_rows(present.shape[1], study.settings.compute.memory_gb, REGION_AVERAGE_ARRAYS)
        per_run = region_variances(data.variance, present, restricted.shares, chunk_rows=rows)
        with np.errstate(invalid="ignore"):
            counts = np.isfinite(per_run).sum(axis=0)
            mean = np.where(counts > 0, np.nansum(per_run, axis=0) / np.maximum(counts, 1), np.nan)
        index = restricted.regions["index"].to_numpy()
        return {int(i): float(m) for i, m in zip(index, mean, strict=True)}

    def _check_unchanged(self, paths: Iterable[str]) -> None:
        """The run maps must be the files that were analysed (sha256 in summary.json)."""
        from grouplevel.pipeline import sha256

        recorded = {i.get("path"): i.get("sha256") for i in self.summary.get("inputs") or []}
        for p in paths:
            expected = recorded.get(str(p))
            if expected is not None and sha256(Path(p)) != expected:
                raise UserError(
                    f"{p}: this map changed since the analysis (its sha256 differs from "
                    "summary.json); rerun the analysis before planning"
                )


def _first_level_variance(
    row: pd.Series,
    entry: dict[str, Any],
    run_variance: str,
    reader: _FirstLevelVariance,
    path: Path,
) -> tuple[float, str]:
    """s̄² of a region row and where it came from (see docs/planning.md)."""
    if FIRST_LEVEL_VARIANCE_COLUMN in row.index and np.isfinite(row[FIRST_LEVEL_VARIANCE_COLUMN]):
        return float(row[FIRST_LEVEL_VARIANCE_COLUMN]), f"column {FIRST_LEVEL_VARIANCE_COLUMN}"
    if entry.get("first_level_variance", "variance") == "none":
        return 0.0, "no first-level variances were given"
    if run_variance != "known":
        return 0.0, (
            "included in var_run: region averages are fitted without first-level "
            "variances, so σ² of a region holds all run-level noise"
        )
    values = reader.for_result(entry.get("first_level_contrast"))
    value = values.get(int(row["index"]), float("nan"))
    if not math.isfinite(value):
        raise UserError(
            f"{path}: region {row['name']!r} ({row['hemisphere']}) has no first-level "
            "variance in the run maps; choose another region"
        )
    return value, "mean over runs of the region's first-level variance (run maps)"


def _check_number(label: str, value: Any, low: float, high: float | None = None) -> float:
    """A finite number; strictly between ``low`` and ``high``, or >= ``low`` without high."""
    try:
        value = float(value)
    except (TypeError, ValueError) as exc:
        raise UserError(f"{label}: must be a number, got {value!r}") from exc
    if high is None:
        if not (math.isfinite(value) and value >= low):
            raise UserError(f"{label}: must be a number >= {low:g}, got {value}")
    elif not (math.isfinite(value) and low < value < high):
        raise UserError(f"{label}: must be between {low:g} and {high:g}, got {value}")
    return value


def _checked_plan_numbers(alpha, target_power, cost_animal, cost_run, effect):
    """The numbers of a plan, checked: levels in (0, 1), costs >= 0 and not both 0, a
    non-zero effect when one is given."""
    alpha = _check_number("alpha", alpha, 0.0, 1.0)
    target_power = _check_number("target power", target_power, 0.0, 1.0)
    cost_animal = _check_number("cost per animal", cost_animal, 0.0)
    cost_run = _check_number("cost per run", cost_run, 0.0)
    if cost_animal == 0 and cost_run == 0:
        raise UserError("cost per animal and cost per run are both 0; give at least one cost")
    if effect is not None:
        effect = float(effect)
        if not math.isfinite(effect) or effect == 0:
            raise UserError(f"effect: must be a non-zero number, got {effect}")
    return alpha, target_power, cost_animal, cost_run, effect


def plan_from_output(
    out_dir: str | Path,
    *,
    regions: Sequence[str] | None = None,
    effect: float | None = None,
    cost_animal: float = DEFAULT_COST_ANIMAL,
    cost_run: float = DEFAULT_COST_RUN,
    alpha: float | None = None,
    target_power: float = DEFAULT_TARGET_POWER,
    cost_session: float = DEFAULT_COST_SESSION,
) -> list[PlanResult]:
    """Power over animals × runs for the target regions of a finished analysis.

    When the analysis fitted sessions as their own variance level (regions.tsv has a
    ``var_session`` column), the grid runs over animals × sessions per animal × runs per
    session (:func:`~grouplevel.planning.power.session_grid`), with the session variance
    ω² of each region.

    For each analysed map of ``out_dir/summary.json`` whose folder has ``regions.tsv``
    and whose group contrast is the group mean (intercept-only design), the regions are
    taken from, in this order: ``regions`` (names or abbreviations, every hemisphere
    row of each), the ``[questions] targets`` saved in the summary's settings, else the
    region with the smallest p. Each region's effect (or ``effect``), τ² and σ² come from
    ``regions.tsv``; s̄² as described in docs/planning.md. Nothing is written
    (:func:`write_plan` does that).

    Parameters
    ----------
    out_dir
        An output folder of a finished analysis.
    regions
        Region names or abbreviations to plan for (overrides the saved targets).
    effect
        The effect to detect (overrides the observed effect; recommended).
    cost_animal, cost_run
        Cost of one animal and of one run (>= 0, not both 0).
    alpha
        Significance level; default the analysis's ``[inference] alpha``.
    target_power
        Power to reach.
    cost_session
        Cost of one imaging session beyond its runs (>= 0; used with sessions).

    Returns
    -------
    list of PlanResult
        In the order of the summary's results, then of the region rows.

    Raises
    ------
    UserError
        For a folder that is not an output folder, a region that is not in the table, bad
        numbers, or when no map can be planned.

    References
    ----------
    Hoenig JM, Heisey DM (2001). Am Stat 55:19-24.
    """
    out = Path(out_dir).expanduser()
    summary = read_summary(out)
    settings = summary.get("settings") or {}
    options = _plan_options(
        settings,
        effect=effect,
        cost_animal=cost_animal,
        cost_run=cost_run,
        alpha=alpha,
        target_power=target_power,
    )
    options["cost_session"] = _check_number("cost per session", cost_session, 0.0)
    reader = _FirstLevelVariance(summary)
    plans: list[PlanResult] = []
    skipped: list[str] = []
    for name, entry in summary["results"].items():
        path, table, rows, why = _rows_to_plan(out, name, entry, settings, regions)
        if why:
            skipped.append(f"{name}: {why}")
            continue
        for i in rows:
            plans.append(_plan_row(name, table.iloc[i], entry, path, reader=reader, **options))
    if not plans:
        raise UserError(
            f"{out}: no analysed map can be planned ({'; '.join(skipped) or 'no results'})"
        )
    return plans


def _plan_options(
    settings: dict[str, Any],
    *,
    effect: float | None,
    cost_animal: float,
    cost_run: float,
    alpha: float | None,
    target_power: float,
) -> dict[str, Any]:
    """The checked numbers of a plan and the analysis settings it reuses.

    Returns
    -------
    dict
        The keyword arguments of :func:`_plan_row` other than ``reader``: ``effect``,
        ``run_variance``, ``cost_animal``, ``cost_run``, ``alpha`` (default the
        analysis's), ``sided`` (the analysis's, "two" when unknown) and ``target_power``.
    """
    inference = settings.get("inference") or {}
    alpha, target_power, cost_animal, cost_run, effect = _checked_plan_numbers(
        inference.get("alpha", DEFAULT_ALPHA) if alpha is None else alpha,
        target_power,
        cost_animal,
        cost_run,
        effect,
    )
    sided = inference.get("sided", "two")
    if sided not in SIDED_CHOICES:
        sided = "two"
    run_variance = (settings.get("model") or {}).get("run_variance", "estimate")
    return {
        "effect": effect,
        "run_variance": run_variance,
        "cost_animal": cost_animal,
        "cost_run": cost_run,
        "alpha": alpha,
        "sided": sided,
        "target_power": target_power,
    }


def _rows_to_plan(
    out: Path,
    name: str,
    entry: dict[str, Any],
    settings: dict[str, Any],
    regions: Sequence[str] | None,
) -> tuple[Path, pd.DataFrame | None, np.ndarray, str]:
    """The region rows of one analysed map to plan for, or why the map is skipped.

    Returns
    -------
    path, table, rows
        The map's regions.tsv, its table (None when skipped) and the chosen rows.
    why
        Why the map is skipped ("" when it is planned).
    """
    path = out / name / "regions.tsv"
    none = np.zeros(0, dtype=np.int64)
    if not path.is_file():
        return path, None, none, "no regions.tsv (the analysis had no atlas)"
    if not _is_group_mean(entry) and _slope_effect(entry) is None:
        return (
            path,
            None,
            none,
            (
                "neither the mean of an intercept-only design nor the mean of one "
                "within-animal indicator with its random slope (the plan covers those only)"
            ),
        )
    table = _read_regions(path)
    first_level = entry.get("first_level_contrast")
    rows = _chosen_rows(
        table,
        regions,
        _target_names(settings, first_level),
        path,
        _stimulus_side(settings, first_level),
    )
    if rows.size == 0:
        return path, table, rows, "no region has a test"
    return path, table, rows, ""


def _chosen_rows(
    table: pd.DataFrame,
    regions: Sequence[str] | None,
    targets: list[str],
    path: Path,
    stimulus_side: str | None = None,
) -> np.ndarray:
    """Rows of regions.tsv to plan for; a one-sided name keeps only that hemisphere."""
    if isinstance(regions, str):
        regions = [regions]
    names = list(regions) if regions else targets
    source = "regions" if regions else "[questions] targets"
    if names:
        rows: list[int] = []
        for n in names:
            hit = _match_region(table, str(n))
            if hit.size == 0:
                one_side = _side_rows(table, str(n), stimulus_side, f"{path}: {source}")
                hit = hit if one_side is None else one_side
            if hit.size == 0:
                known = ", ".join(dict.fromkeys(table["name"].astype(str)))
                raise UserError(
                    f"{path}: {source} names {n!r}, which is not a region of this table; "
                    f"choose one of: {known}"
                )
            rows += [int(i) for i in hit if int(i) not in rows]
        return np.asarray(rows, dtype=np.int64)
    p = table["p"].to_numpy(dtype=float)
    if not np.isfinite(p).any():
        return np.zeros(0, dtype=np.int64)
    return np.asarray([int(np.nanargmin(p))], dtype=np.int64)


def _plan_row(
    name: str,
    row: pd.Series,
    entry: dict[str, Any],
    path: Path,
    *,
    effect: float | None,
    run_variance: str,
    reader: _FirstLevelVariance,
    cost_animal: float,
    cost_run: float,
    alpha: float,
    sided: str,
    target_power: float,
    cost_session: float = DEFAULT_COST_SESSION,
) -> PlanResult:
    where = f"{path}: region {row['name']!r} ({row['hemisphere']})"
    slope = _slope_effect(entry)
    var_animal = float(row["var_animal"])
    if slope is not None:
        if slope[1] not in row.index:
            raise UserError(
                f"{path}: lacks the column {slope[1]} (the {slope[0]} slope variance of "
                "each region); rerun the analysis to rewrite it"
            )
        var_animal = float(row[slope[1]])
    var_run = float(row["var_run"])
    observed = float(row["effect"])
    if not all(math.isfinite(v) for v in (var_animal, var_run, observed)):
        raise UserError(f"{where} has no fitted effect or variances; choose another region")
    first_level, fl_source = _first_level_variance(row, entry, run_variance, reader, path)
    if var_animal + var_run + first_level <= 0:
        raise UserError(f"{where} has all variances 0; its power is undefined, choose another")
    used = observed if effect is None else effect
    var_session = _session_variance(row, where)
    n_animals = entry.get("animals", row.get("animals"))
    n_runs = entry.get("runs", row.get("runs"))
    layout = _layout(entry, slope, var_session)
    if layout["sessions"] is None:
        grid = power_grid(used, var_animal, var_run, first_level, alpha=alpha, sided=sided)
        grid["cost"] = design_cost(grid["animals"], grid["runs"], cost_animal, cost_run)
    else:
        grid = session_grid(
            used,
            var_animal,
            var_session or 0.0,
            var_run,
            first_level,
            sessions=layout["sessions"],
            varies=layout["varies"],
            alpha=alpha,
            sided=sided,
        )
        grid["cost"] = design_cost(
            grid["animals"],
            grid["runs"],
            cost_animal,
            cost_run,
            sessions=grid["sessions"],
            cost_session=cost_session,
        )
    if layout["note"] or (layout["sessions"] is not None and len(layout["sessions"]) == 1):
        # sessions held at the study's own: what another session buys is not planned
        grid = grid.drop(columns=list(GAIN_COLUMNS))
    cheapest = cheapest_design(grid, cost_animal, cost_run, target_power, cost_session=cost_session)
    inputs: dict[str, Any] = {
        "effect": used,
        "effect_source": "observed" if effect is None else "given",
        "observed_effect": observed,
        "observed_p": float(row["p"]),
        "var_animal": var_animal,
        "var_run": var_run,
        "mean_first_level_variance": first_level,
        "first_level_variance_source": fl_source,
        "alpha": alpha,
        "sided": sided,
        "target_power": target_power,
        "cost_animal": cost_animal,
        "cost_run": cost_run,
    }
    if var_session is not None:
        inputs |= {"var_session": var_session, "cost_session": cost_session}
    if slope is not None:
        inputs |= {
            "tested_effect": f"{slope[0]} (within animals, varies between {slope[2]}s)",
            "var_animal_is": f"the variance of the animals' own {slope[0]} effects ({slope[1]})",
            "varies": layout["varies"],
        }
    if layout["note"]:
        inputs["layout_note"] = layout["note"]
    if n_animals is not None and n_runs is not None and int(n_animals) >= 2:
        inputs |= _this_study(
            used,
            var_animal,
            var_session,
            var_run,
            first_level,
            entry,
            alpha=alpha,
            sided=sided,
            varies=layout["varies"],
            sessions_grid=layout["sessions"] is not None,
        )
    caution = (CAUTION_OBSERVED if effect is None else CAUTION_GIVEN) + CAUTION_VARIANCES.format(
        animals=n_animals if n_animals is not None else "the",
        runs=n_runs if n_runs is not None else "the",
    )
    if var_session is not None:
        caution += CAUTION_SESSIONS.format(sessions=entry.get("sessions", "the"))
    if slope is not None:
        caution += CAUTION_SLOPE.format(column=slope[0])
    return PlanResult(
        name=name,
        region=str(row["name"]),
        hemisphere=str(row["hemisphere"]),
        region_index=int(row["index"]),
        inputs=inputs,
        grid=grid,
        cheapest=cheapest,
        caution=caution,
        figure_title=f"{name}: {row['name']} ({row['hemisphere']}), effect {used:.3g}",
    )


def _session_variance(row: pd.Series, where: str) -> float | None:
    """ω² of a region row, or None when the analysis fitted no session level."""
    if "var_session" not in row.index or pd.isna(row["var_session"]):
        return None
    value = float(row["var_session"])
    if not math.isfinite(value) or value < 0:
        raise UserError(f"{where} has a session variance of {value}; choose another region")
    return value


#: The two columns of a session grid that say what one more session buys.
GAIN_COLUMNS = ("power_one_more_session", "power_same_runs_in_sessions")

CAUTION_SLOPE = (
    " Here τ² is the variance of the animals' own {column} effects (the random slope): "
    "how much the effect itself differs from one animal to the next. The plan assumes "
    "half of each animal's sessions (or runs) each way, as balanced as this study's."
)

#: Sessions per animal in the grid of an effect that varies between sessions (half of
#: them each way: an even number; our own choice of range, as DEFAULT_SESSIONS).
EVEN_SESSIONS = (2, 4, 6)


def _layout(
    entry: dict[str, Any], slope: tuple[str, str, str] | None, var_session: float | None
) -> dict[str, Any]:
    """The grid's sessions (None: animals × runs only), what the effect varies between
    in the power formula, and a note when the layout is held at the study's own.

    Without a fitted session level a within-animal effect that varies between sessions
    has the day-to-day variance inside its slope variance (each animal's own effect is
    a difference of days); the number of sessions is then held at the study's own and
    the formula of an effect within sessions applied, which is exact at that number.
    """
    if slope is None:
        sessions = None if var_session is None else DEFAULT_SESSIONS
        return {"sessions": sessions, "varies": "animal", "note": ""}
    varies = slope[2]
    if var_session is not None:
        return {
            "sessions": EVEN_SESSIONS if varies == "session" else DEFAULT_SESSIONS,
            "varies": varies,
            "note": "",
        }
    per_animal = max(1, round(float(entry.get("sessions") or 1) / float(entry["animals"])))
    note = ""
    if varies == "session":
        note = (
            f"no session level was fitted, so the day-to-day variance is part of the slope "
            f"variance: sessions are held at the study's {per_animal} per animal"
        )
    return {"sessions": (per_animal,), "varies": "run", "note": note}


def _this_study(
    effect: float,
    var_animal: float,
    var_session: float | None,
    var_run: float,
    first_level: float,
    entry: dict[str, Any],
    *,
    alpha: float,
    sided: str,
    varies: str = "animal",
    sessions_grid: bool = False,
) -> dict[str, Any]:
    """The analysed study's own design and its power under the plan's variances (mean
    numbers of sessions per animal and runs per session when unbalanced)."""
    n_animals, n_runs = int(entry["animals"]), int(entry["runs"])
    out: dict[str, Any] = {"animals": n_animals, "runs": n_runs}
    sessions = 1.0
    per = float(n_runs) / n_animals
    out["runs_per_animal"] = per
    if sessions_grid and entry.get("sessions"):
        sessions = float(entry["sessions"]) / n_animals
        per = float(n_runs) / float(entry["sessions"])
        out |= {"sessions_per_animal": sessions, "runs_per_session": per}
    now = design_power(
        effect,
        var_animal,
        var_run,
        first_level,
        float(n_animals),
        per,
        alpha=alpha,
        sided=sided,
        sessions=sessions,
        var_session=var_session or 0.0,
        varies=varies,
    )
    out["power_of_this_study"] = float(now["power"])
    out["se_of_this_study"] = float(now["se"])
    return out


# --------------------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------------------


def write_plan(out_dir: str | Path, results: Sequence[PlanResult]) -> list[Path]:
    """Write each map's plan into its result folder and record it in plan.json.

    Writes ``out_dir/<name>/power.tsv`` (the grids of all planned regions of that map,
    with ``result, region, hemisphere, region_index`` in front and a ``cost`` column),
    ``out_dir/<name>/power.png`` (one heat-map panel per region) and sets
    ``plan.json["plans"][<name>] = {"regions": [PlanResult.summary(), ...]}``, keeping
    the plans of other maps. ``summary.json``, the record of the analysis, is not
    changed. Each file is written to a temporary file and renamed.

    Returns
    -------
    list of Path
        The files written, plan.json last.
    """
    out = Path(out_dir).expanduser()
    require_grouplevel_output(out)  # write only into an output folder grouplevel wrote
    summary = read_summary(out)
    groups: dict[str, list[PlanResult]] = {}
    for res in results:
        groups.setdefault(res.name, []).append(res)
    if not groups:
        raise ValueError("no plans to write")
    written: list[Path] = []
    plan = dict(read_plans(out, summary))
    for name, group in groups.items():
        folder = child_path(out, name)
        if not folder.is_dir():
            raise UserError(f"{folder}: result folder not found; plan from this output folder")
        table = pd.concat([r.table() for r in group], ignore_index=True)
        tsv = folder / "power.tsv"
        atomic_write(tsv, table.to_csv(sep="\t", index=False, float_format="%.6g").encode())
        png = folder / "power.png"
        atomic_write(png, plans_figure_png(group))
        written += [tsv, png]
        plan[name] = {"regions": [r.summary() for r in group]}
    written.append(write_plans(out, plan))
    return written


__all__ = ["PlanResult", "design_text", "plan_from_output", "plans_figure_png", "write_plan"]
