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
    "read_survey": "survey",
    "Survey": "survey",
    "neighbour_graph": "connectivity",
    "NeighbourGraph": "connectivity",
    "distance_eigenvectors": "eigen",
    "graph_eigenvectors": "eigen",
    "SpatialBasis": "eigen",
    "morans_i": "moran",
    "transform": "transformations",
    "redundancy_analysis": "canonical",
    "forward_selection": "selection",
    "compare_weighting_schemes": "selection",
    "select_by_residual_moran": "residual_autocorrelation",
    "moran_correlogram": "moran",
    "beta_diversity": "beta",
    "scalogram": "scales",
    "classify_scales": "scales",
    "permutation_test": "permutation",
    "partition_variation": "partition",
    "analyse": "analysis",
    "spectral_randomisation_test": "spectral_randomisation",
    "spectral_coverage": "design",
    "evaluate_design": "design",
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
