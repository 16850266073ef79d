"""Inference on statistic maps: FDR, clusters, exact TFCE and smoothness.

Pure functions on numpy arrays; the permutation engine calls :func:`tfce` and
:func:`max_cluster_extent_and_mass` once per permutation.
"""

from __future__ import annotations

from grouplevel.inference.clusters import (
    Clusters,
    find_clusters,
    max_cluster_extent_and_mass,
    neighbourhood,
)
from grouplevel.inference.fdr import FdrResult, fdr
from grouplevel.inference.smoothness import Smoothness, estimate_smoothness
from grouplevel.inference.tfce import tfce

__all__ = [
    "Clusters",
    "FdrResult",
    "Smoothness",
    "estimate_smoothness",
    "fdr",
    "find_clusters",
    "max_cluster_extent_and_mass",
    "neighbourhood",
    "tfce",
]
