"""grouplevel: mixed-effects group analysis of rodent fMRI contrast maps.

Runs are nested in animals: every run's first-level effect map (with its variance map
when there is one) enters one REML model with a random intercept per animal.
"""

from __future__ import annotations

__version__ = "0.1.0"
