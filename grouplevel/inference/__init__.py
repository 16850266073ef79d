"""Inference on statistic maps: FDR, clusters, exact TFCE and smoothness.

Pure functions on numpy arrays; for the maxima of each permutation the engine keeps
one :class:`~grouplevel.inference.clusters.ClusterWorkspace` and one
:class:`~grouplevel.inference.tfce.TfceWorkspace` per thread.
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
