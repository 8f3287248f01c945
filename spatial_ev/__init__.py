"""spatial_ev: spatial-structure analysis of georeferenced ecological surveys.

Site coordinates become neighbour graphs and spatial eigenvectors (MEM, distance-based MEM /
PCNM); redundancy analysis with permutation tests and forward selection keeps the ones that
matter; variation partitioning separates environmental, spatial, shared and unexplained
fractions; scale classes are mapped in map units; candidate sampling layouts are evaluated.

The public names are imported lazily so that ``import spatial_ev`` stays light and optional
parts (plotting, dask) load only when used.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

# public name -> module that defines it
_PUBLIC = {
    "read_survey": "input.survey",
    "read_river_network": "input.network",
    "aem_eigenvectors": "space.directional",
    "Survey": "input.survey",
    "neighbour_graph": "space.graphs",
    "NeighbourGraph": "space.graphs",
    "distance_eigenvectors": "space.eigen",
    "graph_eigenvectors": "space.eigen",
    "SpatialBasis": "space.eigen",
    "morans_i": "inference.autocorrelation",
    "transform": "stats.transform",
    "redundancy_analysis": "stats.canonical",
    "forward_selection": "selection.forward",
    "compare_weighting_schemes": "selection.weighting",
    "select_by_residual_moran": "selection.residual_moran",
    "moran_correlogram": "inference.autocorrelation",
    "beta_diversity": "inference.lcbd",
    "scalogram": "space.scales",
    "classify_scales": "space.scales",
    "permutation_test": "inference.permutation",
    "partition_variation": "selection.partition",
    "analyse": "pipeline.analysis",
    "spectral_randomisation_test": "inference.spectral",
    "spectral_coverage": "design.evaluate",
    "evaluate_design": "design.evaluate",
}

__all__ = sorted(_PUBLIC) + ["__version__"]


def __getattr__(name: str) -> Any:
    if name in _PUBLIC:
        module = importlib.import_module(f".{_PUBLIC[name]}", __name__)
        value = getattr(module, name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'spatial_ev' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
