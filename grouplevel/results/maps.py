"""The group result types: one fitted and corrected contrast per output folder.

:class:`GroupMap` is what the fit and the correction hand to labelling, the questions
and the writers; :class:`Corrected` holds one contrast's corrected inference.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from grouplevel.inference import FdrResult, Smoothness
from grouplevel.inference.permutation import PermutationResult
from grouplevel.intake.images import Grid

if TYPE_CHECKING:  # the labelling and question steps fill these in; they import GroupMap
    from grouplevel.anatomy.tables import RegionTables
    from grouplevel.questions.ask import Answers

# maps written for every group contrast: file stem -> header description
MAP_DESCRIPTIONS = {
    "effect": "group effect (contrast estimate)",
    "se": "standard error of the group effect",
    "t": "t statistic of the group effect",
    "z": "z (normal deviate with the same p as t)",
    "p": "two-sided p (uncorrected)",
    "df": "degrees of freedom of t",
    "var_animal": "between-animal variance tau^2 (REML)",
    "var_run": "between-run variance sigma^2 (REML)",
}


@dataclass(frozen=True)
class AnimalMaps:
    """Each animal's own estimate of what a group contrast tests, at every fitted voxel.

    Attributes
    ----------
    animals
        Animal IDs, one per row.
    effect, se
        ``(n_animals, V)`` the estimate and its standard error (NaN: no data, or a
        standard error that is not known).
    estimate
        What the rows are, in words (e.g. "the precision-weighted mean of the animal's
        runs").
    """

    animals: tuple[str, ...]
    effect: np.ndarray
    se: np.ndarray
    estimate: str


@dataclass(frozen=True)
class Corrected:
    """Inference corrected for the many voxels tested (per-voxel arrays are in-mask).

    ``permutation`` is None when ``[inference] permutations = 0`` (FDR only).
    """

    sided: str
    p_sided: np.ndarray  # the uncorrected p of the chosen side
    fdr: FdrResult
    smoothness: Smoothness | None
    permutation: PermutationResult | None
    warnings: tuple[str, ...]

    @property
    def q(self) -> np.ndarray:
        return self.fdr.q

    @property
    def p_fwe_voxel(self) -> np.ndarray:
        return self._perm().p_fwe_voxel

    @property
    def tfce(self) -> np.ndarray:
        return self._perm().tfce

    @property
    def p_fwe_tfce(self) -> np.ndarray:
        return self._perm().p_fwe_tfce

    def _perm(self) -> PermutationResult:
        if self.permutation is None:
            raise AttributeError("no permutation inference was run (permutations = 0)")
        return self.permutation


@dataclass(frozen=True)
class GroupMap:
    """One group contrast of one first-level contrast: in-mask values and context.

    Every per-voxel array has one value per in-mask voxel, in the order of
    ``numpy.argwhere(mask)`` (C order over the grid).
    """

    name: str
    first_level: str | None
    contrast: str
    weights: dict[str, float]
    grid: Grid
    mask: np.ndarray
    effect: np.ndarray
    se: np.ndarray
    t: np.ndarray
    df: np.ndarray
    z: np.ndarray
    p: np.ndarray
    var_animal: np.ndarray
    var_run: np.ndarray
    coverage_runs: np.ndarray  # 3-D
    coverage_animals: np.ndarray  # 3-D
    not_converged: int
    n_animals: int
    n_runs: int
    inference: Corrected
    tables: RegionTables | None = None  # with an atlas: clusters, regions, animals
    answers: Answers | None = None  # the questions (asked of group means; else the reason)
    # every variance component of the fit by name ("animal", "run", "session",
    # "slope[<column>]", "cov[<column>]", "animal[<group>]" ...)
    components: dict[str, np.ndarray] = field(default_factory=dict)
    random_effects: str = "a random intercept per animal"
    # what the contrast tests (grouplevel.intake.design.contrast_kind): "animal", ...
    tested_level: str = "animal"
    # each animal's own estimate of what the contrast tests (None: not computable)
    animal_maps: AnimalMaps | None = None

    def volume(self, key: str) -> np.ndarray:
        """A per-voxel quantity as a full 3-D array (0 outside the mask).

        ``key`` names a field of the map (``t``, ``effect`` ...) or of its corrected
        inference (``q``, ``p_fwe_voxel``, ``tfce`` ...).
        """
        values = getattr(self, key) if hasattr(self, key) else getattr(self.inference, key)
        out = np.zeros(self.grid.shape)
        out[self.mask] = values
        return out

    def to_frame(self) -> pd.DataFrame:
        """One row per in-mask voxel: voxel index, position in mm, and every statistic."""
        idx = np.argwhere(self.mask)
        mm = idx @ self.grid.affine[:3, :3].T + self.grid.affine[:3, 3]
        frame = pd.DataFrame(
            {
                "i": idx[:, 0],
                "j": idx[:, 1],
                "k": idx[:, 2],
                "x_mm": mm[:, 0],
                "y_mm": mm[:, 1],
                "z_mm": mm[:, 2],
            }
        )
        for key in MAP_DESCRIPTIONS:
            frame[key] = getattr(self, key)
        frame["runs_with_data"] = self.coverage_runs[self.mask]
        return frame
