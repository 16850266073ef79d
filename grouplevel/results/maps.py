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
class AnimalEffects:
    """Each animal's own estimate of what a group contrast tests, at every in-mask voxel.

    For a contrast of animal-level columns (a mean, a group difference, a covariate) an
    animal's estimate is the precision-weighted mean of its runs (σ̂² of the fit held
    fixed, :mod:`grouplevel.model.animals`); for a contrast of a random slope it is the
    animal's own GLS slope. These are the values the permutation test rearranges.

    Attributes
    ----------
    animals
        The m animal identifiers (rows of the arrays).
    effect
        ``(m, n_voxels)`` float32: each animal's estimate (NaN where it has no data).
    se
        ``(m, n_voxels)`` float32: its standard error (NaN where unknown or without data).
    runs
        ``(m, n_voxels)`` int16: number of the animal's runs with data at the voxel.
    run_labels
        For each animal, the labels of its included runs (``"session 1, run 2"``).
    what
        What the estimate is, in words (for the report).
    run_values
        ``(n_runs, n_voxels)`` float32: the value of every run behind the estimates
        (NaN: no data), rows grouped by animal in the order of ``animals`` and
        ``run_labels``; None when the study is too large to keep a copy
        (:data:`grouplevel.outputs.animal_maps.RUN_VALUES_MAX`).
    """

    animals: tuple[str, ...]
    effect: np.ndarray
    se: np.ndarray
    runs: np.ndarray
    run_labels: tuple[tuple[str, ...], ...]
    what: str
    run_values: np.ndarray | None = None


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
    # each animal's own estimate at every voxel (None where the design has none)
    animal_effects: AnimalEffects | None = None

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


# maps written for every F-test: file stem -> header description
FTEST_MAP_DESCRIPTIONS = {
    "f": "F statistic of the contrast rows tested jointly",
    "z": "z (normal deviate with the same upper-tail p as F)",
    "p": "upper-tail p of F (uncorrected)",
    "df": "denominator degrees of freedom of F",
    "var_animal": "between-animal variance tau^2 (REML)",
    "var_run": "between-run variance sigma^2 (REML)",
}


@dataclass(frozen=True)
class FTestMap:
    """One F-test of one first-level contrast: in-mask values and context.

    The rows (``rows``, ``weights``) are group contrasts tested jointly; ``f`` is the
    Wald F on (``df_num``, ``df``) and ``z`` the normal value with the same upper-tail
    p, on which FDR, clusters and TFCE work (``inference.sided`` is ``"positive"``).
    Per-voxel arrays are in-mask, in the order of ``numpy.argwhere(mask)``.
    """

    name: str
    first_level: str | None
    ftest: str
    rows: tuple[str, ...]
    weights: dict[str, dict[str, float]]  # row name -> coefficient -> weight
    meaning: str
    grid: Grid
    mask: np.ndarray
    f: np.ndarray
    df_num: int
    df: np.ndarray
    z: np.ndarray
    p: np.ndarray
    var_animal: np.ndarray
    var_run: np.ndarray
    coverage_runs: np.ndarray
    coverage_animals: np.ndarray
    not_converged: int
    n_animals: int
    n_runs: int
    inference: Corrected
    random_effects: str = "a random intercept per animal"
    tested_level: str = "animal"
    # the questions are asked of means and differences, never of an F-test
    answers: None = None
    tables: None = None

    @property
    def contrast(self) -> str:
        """The name of the test in its first-level contrast (as :attr:`GroupMap.contrast`)."""
        return self.ftest

    def volume(self, key: str) -> np.ndarray:
        """A per-voxel quantity as a full 3-D array (0 outside the mask)."""
        values = getattr(self, key) if hasattr(self, key) else getattr(self.inference, key)
        out = np.zeros(self.grid.shape)
        out[self.mask] = values
        return out
