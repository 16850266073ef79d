"""Report and manuscript outputs of a finished output folder (never refits).

* :func:`render_report` — ``DIR/report.html``, one self-contained page, and
  ``DIR/figures/`` (each of its figures as PDF, 300 dpi PNG and caption);
* :func:`write_manuscript_tables` — ``DIR/tables/<result>_<table>.{tsv,csv,tex,md}``;
* :func:`write_methods` — ``DIR/methods.md``, the generated methods paragraph.
"""

from __future__ import annotations

from grouplevel.report.methods import write_methods
from grouplevel.report.render import render_report
from grouplevel.report.tables import write_manuscript_tables

__all__ = ["render_report", "write_manuscript_tables", "write_methods"]
