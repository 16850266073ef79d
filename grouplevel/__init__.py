"""grouplevel: mixed-effects group analysis of rodent fMRI contrast maps.

Runs are nested in animals: every run's first-level effect map (with its variance map
when there is one) enters one REML model with a random intercept per animal.

Public API (the command line is a thin layer over it)::

    study = grouplevel.load_study("study.toml")      # validate; raises UserError
    maps, warnings = grouplevel.fit_study(study)     # one GroupMap per output folder
    grouplevel.write_outputs(study, maps, "results", warnings=warnings)
"""

from __future__ import annotations

from typing import Any

from grouplevel import _moved

__version__ = "0.1.0"

_moved.install()  # old flat import paths (grouplevel.study, ...) until the next release

_API = {
    "load_study": "grouplevel.intake.study",
    "Study": "grouplevel.intake.study",
    "fit_study": "grouplevel.pipeline",
    "write_outputs": "grouplevel.pipeline",
    "run_study": "grouplevel.pipeline",
    "GroupMap": "grouplevel.results.maps",
    "UserError": "grouplevel.errors",
}

__all__ = ["__version__", *_API]


def __getattr__(name: str) -> Any:
    # Imported on first use, so that `grouplevel check` does not load the numerical core.
    if name in _API:
        import importlib

        return getattr(importlib.import_module(_API[name]), name)
    raise AttributeError(f"module 'grouplevel' has no attribute {name!r}")
