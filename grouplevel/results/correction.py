"""From the ``[inference]`` settings to the arguments of the permutation engine.

Every permutation test of a study (the group maps and the left-minus-mirror asymmetry
maps of the symmetry question) takes its arguments from here, so that all of them use
the same settings and the same compute backend.
"""

from __future__ import annotations

from typing import Any

from grouplevel.intake.settings import InferenceSettings
from grouplevel.results.compute import Backend


def permutation_arguments(
    inference: InferenceSettings,
    *,
    voxel_volume_mm3: float,
    backend: Backend | None,
    sided: str | None = None,
) -> dict[str, Any]:
    """Keyword arguments of :func:`grouplevel.inference.permutation.permutation_test`.

    Parameters
    ----------
    inference
        The study's ``[inference]`` settings.
    voxel_volume_mm3
        Volume of one voxel of the grid tested (cluster masses and extents in mm³).
    backend
        Where the permutations run (``None``: local threads).
    sided
        Overrides ``inference.sided`` (the asymmetry maps are always two-sided: a
        difference between hemispheres has no expected sign).

    The random generator and the progress callback are the caller's: each test draws from
    its own seeded stream.
    """
    return {
        "n_permutations": inference.permutations,
        "sided": inference.sided if sided is None else sided,
        "connectivity": inference.connectivity,
        "cluster_forming_p": inference.cluster_forming_p,
        "voxel_volume_mm3": voxel_volume_mm3,
        "use_tfce": inference.tfce,
        "tfce_E": inference.tfce_e,
        "tfce_H": inference.tfce_h,
        "backend": backend,
    }
