"""Report and manuscript outputs of a finished output folder (never refits).

* :func:`render_report` — ``DIR/report.html``, one self-contained page, and
  ``DIR/figures/`` (each of its figures as PDF, 300 dpi PNG and caption);
* :func:`write_manuscript_tables` — ``DIR/tables/<result>_<table>.{tsv,csv,tex,md}``;
* :func:`write_methods` — ``DIR/methods.md``, the generated methods paragraph.
"""

from __future__ import annotations

import importlib
from typing import Any

_EXPORTS = {
    "render_report": "render",
    "write_manuscript_tables": "tables",
    "write_methods": "methods",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    # imported on first use: the report stack (matplotlib, jinja2) loads only when a
    # report is drawn, not when a study is checked or fitted
    if name in _EXPORTS:
        module = importlib.import_module(f"{__name__}.{_EXPORTS[name]}")
        return getattr(module, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
