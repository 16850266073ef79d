"""The statistical model: vectorised REML for runs nested in animals, and contrast tests."""

from __future__ import annotations

from grouplevel.model.contrasts import (
    ContrastResult,
    animal_level_columns,
    between_animal_df,
    satterthwaite_df,
    t_to_z,
    test_contrast,
)
from grouplevel.model.reml import MixedFit, fit_reml, presence_patterns

__all__ = [
    "ContrastResult",
    "MixedFit",
    "animal_level_columns",
    "between_animal_df",
    "fit_reml",
    "presence_patterns",
    "satterthwaite_df",
    "t_to_z",
    "test_contrast",
]
