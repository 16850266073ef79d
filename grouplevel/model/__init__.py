"""The statistical model: vectorised REML (runs in sessions in animals), contrast tests."""

from __future__ import annotations

from grouplevel.model.contrasts import (
    ContrastResult,
    animal_level_columns,
    between_animal_df,
    satterthwaite_df,
    t_to_z,
    test_contrast,
)
from grouplevel.model.mixed import (
    MixedModelFit,
    fit_mixed,
    group_welch_df,
    mixed_satterthwaite_df,
)
from grouplevel.model.reml import MixedFit, fit_reml, presence_patterns

__all__ = [
    "ContrastResult",
    "MixedFit",
    "MixedModelFit",
    "animal_level_columns",
    "between_animal_df",
    "fit_mixed",
    "fit_reml",
    "group_welch_df",
    "mixed_satterthwaite_df",
    "presence_patterns",
    "satterthwaite_df",
    "t_to_z",
    "test_contrast",
]
