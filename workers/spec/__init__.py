"""The job spec: the one contract shared by the service, the CLI and the workers.

A spec names a test DEM (tiles), a reference (tiles), optional regions to aggregate over and
processing options. It is read from YAML or JSON; relative paths resolve against the folder of the
spec file (or a base folder given by the caller). Unknown keys and inconsistent values are rejected
with a :class:`~demaudit.workers.errors.SpecError` whose message names the field.

The package holds one module per concern; import the names from here:

- ``sections.py``: one model per top-level key (TileSource, CheckpointSource, Grading, ...);
- ``job.py``: JobSpec (the sections put together), parse_spec, load_spec_file;
- ``paths.py``: bounds on the paths a spec may give (length, entries, globs, files listed);
- ``resolution.py``: ResolvedJob, resolve, resolve_in_roots (paths made absolute, globs expanded,
  data roots enforced).
"""

from __future__ import annotations

from demaudit.workers.spec.job import (
    JobSpec,
    format_validation_error,
    load_spec_file,
    parse_spec,
)
from demaudit.workers.spec.paths import (
    MAX_FILES_PER_FIELD,
    MAX_GLOBS_PER_LIST,
    MAX_PATH_CHARS,
    MAX_PATHS_PER_LIST,
    SpecPath,
    TilePaths,
)
from demaudit.workers.spec.resolution import ResolvedJob, resolve, resolve_in_roots
from demaudit.workers.spec.sections import (
    ELLIPSOIDAL,
    METRES_PER_UNIT,
    CheckpointSource,
    Coregistration,
    CoverGroup,
    Derivatives,
    ErrorModel,
    FigureOptions,
    Grading,
    LandCoverClass,
    LandCoverSource,
    Options,
    OutlierRule,
    Outliers,
    Recheck,
    RegionSource,
    Resampling,
    Standard,
    Strata,
    TileSource,
    Units,
)

__all__ = [
    "ELLIPSOIDAL",
    "MAX_FILES_PER_FIELD",
    "MAX_GLOBS_PER_LIST",
    "MAX_PATHS_PER_LIST",
    "MAX_PATH_CHARS",
    "METRES_PER_UNIT",
    "CheckpointSource",
    "Coregistration",
    "CoverGroup",
    "Derivatives",
    "ErrorModel",
    "FigureOptions",
    "Grading",
    "JobSpec",
    "LandCoverClass",
    "LandCoverSource",
    "OutlierRule",
    "Options",
    "Outliers",
    "Recheck",
    "RegionSource",
    "Resampling",
    "ResolvedJob",
    "SpecPath",
    "Standard",
    "Strata",
    "TilePaths",
    "TileSource",
    "Units",
    "format_validation_error",
    "load_spec_file",
    "parse_spec",
    "resolve",
    "resolve_in_roots",
]
