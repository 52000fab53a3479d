"""What a tile task is given and gives back: the job's options as a frozen value, the tile's
result (summaries, overview, extras), and the per-pixel layers the task works on (pure data)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.coregistration.tile import Correction
from demaudit.workers.spec import Coregistration, JobSpec, TileSource
from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile.datum import DEFAULT_GRID_DIRS
from demaudit.workers.tile.derivative_pass import DerivativeOptions, TileDerivatives
from demaudit.workers.tile.grid import Grid
from demaudit.workers.tile.strata import ClassInfo, classes_from_spec
from demaudit.workers.uncertainty.error_model import ErrorModelOptions, TileErrorSample

OK = "ok"
FAILED = "failed"
NO_REFERENCE = "no_reference"
NO_VALID_PIXELS = "no_valid_pixels"  # set by the runner: a tile with no dh pixel at all


@dataclass(frozen=True)
class TileOptions:
    """Everything a worker needs to know about the job, as a frozen, picklable value."""

    test_units: str = "metre"
    test_vertical_crs: str = "ellipsoidal"
    test_nodata: float | None = None
    reference_units: str = "metre"
    reference_vertical_crs: str = "ellipsoidal"
    reference_nodata: float | None = None
    resampling: str = "bilinear"
    overview_factor: int = 8
    grid_dirs: tuple[str, ...] = DEFAULT_GRID_DIRS
    landcover_classes: tuple[ClassInfo, ...] = ()
    slope_edges_deg: tuple[float, ...] = (0.0, 5.0, 15.0, 30.0, 45.0)
    coregistration: Coregistration | None = None
    correction: Correction | None = None  # the job-wide correction, set for the main pass
    error_model: ErrorModelOptions | None = None  # sample the error model (workers/error_model)
    derivatives: DerivativeOptions | None = None  # compare derived parameters (derivative_pass)

    @classmethod
    def from_spec(
        cls, spec: JobSpec, *, grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS
    ) -> TileOptions:
        # no reference (checkpoints only): the defaults of a source (metre, ellipsoidal)
        reference = spec.reference or TileSource.model_construct(tiles=[])
        return cls(
            test_units=spec.test.units,
            test_vertical_crs=spec.test.vertical_crs,
            test_nodata=spec.test.nodata,
            reference_units=reference.units,
            reference_vertical_crs=reference.vertical_crs,
            reference_nodata=reference.nodata,
            resampling=spec.options.resampling,
            overview_factor=spec.options.overview_factor,
            grid_dirs=tuple(grid_dirs),
            landcover_classes=classes_from_spec(spec.landcover.classes) if spec.landcover else (),
            slope_edges_deg=tuple(spec.strata.slope_bands_deg),
            coregistration=spec.coregistration,
            error_model=None
            if spec.error_model is None
            else ErrorModelOptions(
                seed=spec.error_model.seed,
                samples_per_tile=spec.error_model.samples_per_tile,
                outlier_rule=spec.outliers.rule,
                outlier_factor=spec.outliers.factor,
                overview_factor=spec.options.overview_factor,
            ),
            derivatives=DerivativeOptions.from_section(spec.derivatives),
        )

    def with_overview_factor(self, factor: int) -> TileOptions:
        """The same options with the dh overview (and the error model's) decimated by factor:
        the factor of the job's overview mosaic, which may be smaller than the spec's when the
        tile size is not a multiple of it (writers.overview_layout)."""
        error_model = self.error_model
        if error_model is not None:
            error_model = replace(error_model, overview_factor=factor)
        return replace(self, overview_factor=factor, error_model=error_model)


@dataclass(frozen=True, eq=False)
class TileResult:
    """What one tile task returns: status, summaries, a decimated overview.

    ``strata`` maps a region id (``ALL`` for the whole tile) to stratum key -> summary.
    ``excluded`` counts valid dh pixels dropped because their land-cover class is excluded.
    """

    tile_id: str
    status: str
    reason: str | None
    summary: DhSummary = field(default_factory=dh_summary.empty)
    regions: dict[str, DhSummary] = field(default_factory=dict)
    strata: dict[str, dict[str, DhSummary]] = field(default_factory=dict)
    excluded: int = 0
    overview: NDArray[np.float32] | None = None
    reference_tiles: tuple[str, ...] = ()
    coregistration: dict[str, Any] | None = None
    corrected: TileResult | None = None
    summaries_stored: bool = False  # the worker wrote them to the results store (audit_and_store)
    overview_stored: bool = False  # the worker wrote its overview block (and sent none back)
    # with an error model (workers/uncertainty/error_model.py)
    error_sample: TileErrorSample | None = None
    derivatives: TileDerivatives | None = None  # with derivatives (workers/tile/derivative_pass)
    #: statistics(summary), worked out by the worker (audit_and_store) so that the client
    #: does no per-tile reading of histograms; None: not yet computed
    statistics: dict[str, float | int | None] | None = None


#: With co-registration the reference is read this many test pixels beyond the tile, so that
#: a correction can resample it onto the shifted grid without reading it again.
COREGISTRATION_MARGIN_PX = 8

#: A reference mosaic as read (own unit and datum) on its own grid (float64, or float32 as read).
Mosaic = tuple[NDArray[np.floating], Grid]


@dataclass(frozen=True, eq=False)
class TileSurfaces:
    """The per-pixel layers of one tile on its own grid (metres, test vertical datum).

    ``reference`` is sampled at the test pixels' centres, or at those minus a shift when
    tile_surfaces was given one; ``mosaics`` are the reference as read (for a later shift), and
    ``margin_px`` how many test pixels beyond the tile they cover."""

    dh: NDArray[np.float64]
    reference: NDArray[np.floating]  # float32 only when tile_surfaces kept it (keeps_float32)
    landcover: NDArray[np.float64] | None
    test: NDArray[np.floating] | None = None
    mosaics: tuple[Mosaic, ...] = ()
    margin_px: int = 0
