"""Exceptions and named warnings of spatial_ev.

Every error a user can cause derives from :class:`SpatialEVError`; the command line turns
these into one line on standard error and exit status 2. Messages say which argument, file,
column, row or site is at fault, the rule that was broken, the value received and the fix.

Warnings derive from :class:`SpatialEVWarning` so that a caller can filter all of them, or one
kind, with the standard :mod:`warnings` machinery.
"""

from __future__ import annotations

__all__ = [
    "SpatialEVError",
    "InputError",
    "CRSError",
    "GraphError",
    "DesignError",
    "SpatialEVWarning",
    "GeographicCoordinatesWarning",
    "DroppedSpeciesWarning",
    "DroppedVariablesWarning",
    "DroppedSitesWarning",
    "EmptySitesWarning",
    "ThreeDimensionalCoordinatesWarning",
    "DisconnectedGraphWarning",
    "StandardisedCountsWarning",
    "MergedSitesWarning",
    "MapDistortionWarning",
]


class SpatialEVError(Exception):
    """Base class of every error spatial_ev raises on purpose."""


class InputError(SpatialEVError, ValueError):
    """Data or an argument breaks a documented rule (missing, mismatched, non-numeric, ...)."""


class CRSError(InputError):
    """Coordinates lack a reference system, or layers disagree about it."""


class GraphError(InputError):
    """A neighbour graph cannot be built or is unusable (e.g. disconnected)."""


class DesignError(InputError):
    """A candidate sampling layout cannot support the requested evaluation."""


class SpatialEVWarning(UserWarning):
    """Base class of the warnings spatial_ev issues."""


class GeographicCoordinatesWarning(SpatialEVWarning):
    """Coordinates were in degrees and have been projected (or an operation met degrees)."""


class DroppedSpeciesWarning(SpatialEVWarning):
    """Species (columns) were removed, e.g. because they never occur."""


class DroppedVariablesWarning(SpatialEVWarning):
    """Explanatory variables were removed, e.g. because they are constant."""


class DroppedSitesWarning(SpatialEVWarning):
    """Sites were removed on the user's explicit request (e.g. incomplete environment)."""


class EmptySitesWarning(DroppedSitesWarning):
    """Sites without any species (an all-zero row) were removed on the user's request."""


class ThreeDimensionalCoordinatesWarning(SpatialEVWarning):
    """Geometries had a z coordinate; only x and y are used."""


class DisconnectedGraphWarning(SpatialEVWarning):
    """A neighbour graph has several components and is handled per component."""


class StandardisedCountsWarning(SpatialEVWarning):
    """Species abundances were standardised (usually wrong: gives rare species equal weight)."""


class MergedSitesWarning(SpatialEVWarning):
    """Sites sharing coordinates were merged on the user's request."""


class MapDistortionWarning(SpatialEVWarning):
    """The working CRS's map distances differ from ground distances at the sites by more than
    1 % (e.g. web Mercator away from the equator); results are in map units of that CRS."""
