"""Planning the next study: power of animals × runs designs from a finished result.

* :mod:`~grouplevel.planning.power` — power of a design, the grid and the cheapest
  design (pure), and ``grouplevel plan`` (reads an output folder, writes the plan).

The public names of :mod:`grouplevel.planning.power` are re-exported here (this was the
module ``grouplevel.planning`` before 0.2), imported on first use.
"""

from __future__ import annotations

from typing import Any

_EXPORTS = {
    "GRID_COLUMNS",
    "PlanResult",
    "cheapest_design",
    "design_cost",
    "design_power",
    "plan_from_output",
    "plans_figure_png",
    "power_grid",
    "write_plan",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        from grouplevel.planning import power

        return getattr(power, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
