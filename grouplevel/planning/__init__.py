"""Planning the next study: power of animals × runs designs from a finished result.

* :mod:`~grouplevel.planning.power` — power of a design, the grid and the cheapest
  design (pure: numbers in, numbers and tables out);
* :mod:`~grouplevel.planning.plan` — ``grouplevel plan``: reads an output folder, plans
  its target regions, writes ``power.tsv``, ``power.png`` and the ``plan`` entry.

The public names of both are re-exported here (``grouplevel.planning`` was one module
before 0.2), imported on first use.
"""

from __future__ import annotations

from typing import Any

_EXPORTS = {
    "GRID_COLUMNS": "power",
    "SESSION_GRID_COLUMNS": "power",
    "animal_variance": "power",
    "session_grid": "power",
    "cheapest_design": "power",
    "design_cost": "power",
    "design_power": "power",
    "power_grid": "power",
    "PlanResult": "plan",
    "plan_from_output": "plan",
    "plans_figure_png": "plan",
    "write_plan": "plan",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        import importlib

        return getattr(importlib.import_module(f"{__name__}.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
