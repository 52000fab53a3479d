"""Errors of the tile pipeline.

Hierarchy::

    AuditError                      root of everything demaudit raises on purpose
    ├── SpecError (ValueError)      the job spec is malformed or inconsistent
    ├── TileReadError (OSError)     a tile cannot be opened or decoded
    │   ├── ImplausibleHeightsError a tile holds values no terrain has (an untagged void code)
    │   └── NotElevationError       a raster that cannot hold heights (RGB, palette, bands)
    ├── MissingCRSError (ValueError)a tile or region file declares no CRS
    ├── GeoidGridError (RuntimeError) the geoid grid needed for a datum change is missing
    ├── EmptyOverlapError (ValueError) test, reference or regions share no area
    ├── DataRootError (PermissionError) a path lies outside the allowed data roots
    ├── OutputError (OSError)       the output folder cannot be used or written
    ├── CannotEstimateError (ValueError) a co-registration fit has too few or uninformative
    │                               stable pixels (caught: the tile or job goes uncorrected)
    └── JobDismissedError           the job was dismissed while it ran (not a failure)

Each error carries a message that names the file or field at fault. The service turns them into
HTTP problem responses in one place; the CLI prints them and exits non-zero.
"""

from __future__ import annotations


class AuditError(Exception):
    """Root of the errors demaudit raises on purpose."""


class SpecError(AuditError, ValueError):
    """The job spec is malformed, inconsistent or names files that do not exist."""


class TileReadError(AuditError, OSError):
    """A tile cannot be opened or decoded (corrupt, truncated, not a raster)."""


class ImplausibleHeightsError(TileReadError):
    """A tile holds values that cannot be terrain heights, e.g. voids coded -9999 without a
    nodata tag; the message names the value, its share and the spec's ``nodata`` field."""


class NotElevationError(TileReadError):
    """A raster cannot be an elevation model (several bands, RGB or palette colours)."""


class MissingCRSError(AuditError, ValueError):
    """A tile or region file declares no coordinate reference system."""


class GeoidGridError(AuditError, RuntimeError):
    """The geoid grid needed for a vertical datum change is not installed."""


class EmptyOverlapError(AuditError, ValueError):
    """Test tiles, reference tiles or regions share no area."""


class DataRootError(AuditError, PermissionError):
    """A path in a job spec lies outside the allowed data roots."""


class OutputError(AuditError, OSError):
    """The output folder cannot be used or written (not a folder, read-only, disk full, a folder
    of other files); nothing was changed in it."""


class CannotEstimateError(AuditError, ValueError):
    """Too few or uninformative stable pixels for a co-registration fit; the message says why."""


class JobDismissedError(AuditError):
    """The job was dismissed while it ran; its remaining tile tasks were cancelled."""
