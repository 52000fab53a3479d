"""One test tile, end to end: read, align the reference, one datum, difference, summarise.

This is the function the Dask workers run, once per test tile. It returns a small result (the
mergeable summaries and a decimated dh overview), never the full-resolution arrays, and it never
raises for a bad tile: the failure and its reason travel back in the result.
"""

from __future__ import annotations

import traceback
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray
from pyproj import CRS
from rasterio.errors import RasterioError
from rasterio.warp import transform_bounds

from demaudit.workers.coregistration.tile import (
    Correction,
    TileEquations,
    corrected_dh,
    correction_from_record,
    cover_ok,
    reference_grid,
    tile_equations,
    tile_estimate,
)
from demaudit.workers.errors import AuditError
from demaudit.workers.inputs.catalog import (
    SUPERSEDED,
    Footprint,
    TileInfo,
    covered_mask,
    superseded_reason,
)
from demaudit.workers.inputs.rasters import read_mosaic, read_tile
from demaudit.workers.inputs.regions import Region, region_mask
from demaudit.workers.spec import Coregistration, JobSpec, TileSource
from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile.align import onto_grid
from demaudit.workers.tile.datum import DEFAULT_GRID_DIRS, to_metres, vertical_offset_on_grid
from demaudit.workers.tile.derivative_pass import (
    DerivativeOptions,
    TileDerivatives,
    tile_derivatives,
)
from demaudit.workers.tile.difference import block_mean, difference
from demaudit.workers.tile.grid import Grid
from demaudit.workers.tile.one_pass import summarise_pixels
from demaudit.workers.tile.strata import ClassInfo, classes_from_spec, excluded_mask
from demaudit.workers.uncertainty.error_model import (
    ErrorModelOptions,
    TileErrorSample,
    grid_error_sample,
)

OK = "ok"
FAILED = "failed"
NO_REFERENCE = "no_reference"
NO_VALID_PIXELS = "no_valid_pixels"  # set by the runner: a tile with no dh pixel at all
ALL = "*"  # key of the whole tile among region keys


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
    # with an error model (workers/uncertainty/error_model.py)
    error_sample: TileErrorSample | None = None
    derivatives: TileDerivatives | None = None  # with derivatives (workers/tile/derivative_pass)


#: With co-registration the reference is read this many test pixels beyond the tile, so that
#: a correction can resample it onto the shifted grid without reading it again.
COREGISTRATION_MARGIN_PX = 8

#: A reference mosaic as read (own unit and datum) on its own grid.
Mosaic = tuple[NDArray[np.float64], Grid]


@dataclass(frozen=True, eq=False)
class TileSurfaces:
    """The per-pixel layers of one tile on its own grid (metres, test vertical datum).

    ``reference`` is sampled at the test pixels' centres, or at those minus a shift when
    tile_surfaces was given one; ``mosaics`` are the reference as read (for a later shift), and
    ``margin_px`` how many test pixels beyond the tile they cover."""

    dh: NDArray[np.float64]
    reference: NDArray[np.float64]
    landcover: NDArray[np.float64] | None
    test: NDArray[np.float64] | None = None
    mosaics: tuple[Mosaic, ...] = ()
    margin_px: int = 0


def audit_tile(
    test: TileInfo,
    references: Sequence[TileInfo],
    regions: Sequence[Region],
    options: TileOptions,
    landcover: Sequence[TileInfo] = (),
    estimate: dict[str, Any] | None = None,
    covered: Sequence[Footprint] = (),
) -> TileResult:
    """Difference one test tile against the reference on the test tile's grid and summarise.

    regions must already be in the test tile's CRS (see regions.to_crs / clip_to). With
    co-registration, ``estimate`` is the tile's own shift record when already computed.
    ``covered``: footprints of earlier-listed test tiles (catalog.tile_overlaps); pixels whose
    centre lies in one are left out, and a tile wholly covered is SUPERSEDED (only read to
    report a broken file as failed).
    """
    ref_ids = tuple(r.tile_id for r in references)
    hidden = covered_mask(test.grid, covered) if covered else None
    if hidden is not None and hidden.all():
        try:
            read_tile(test, nodata=options.test_nodata, units=options.test_units)
        except (AuditError, RasterioError, OSError) as exc:
            return TileResult(test.tile_id, FAILED, str(exc))
        return TileResult(test.tile_id, SUPERSEDED, superseded_reason(covered))
    if not references:
        return TileResult(test.tile_id, NO_REFERENCE, "no reference tile overlaps this tile")
    try:
        layers = tile_surfaces(test, references, options, landcover=landcover)
    except (AuditError, RasterioError, OSError) as exc:
        return TileResult(test.tile_id, FAILED, str(exc), reference_tiles=ref_ids)
    except Exception as exc:  # noqa: BLE001 - a job never dies silently: report and go on
        where = traceback.format_exc(limit=-1).strip().splitlines()[-2:]
        reason = f"unexpected {type(exc).__name__}: {exc} ({' '.join(s.strip() for s in where)})"
        return TileResult(test.tile_id, FAILED, reason, reference_tiles=ref_ids)
    layers = without_pixels(layers, hidden)  # the earlier-listed tiles count these pixels
    result = summarise_tile(test, layers, regions, options, reference_tiles=ref_ids)
    if options.coregistration is not None:
        result = with_coregistration(
            test, references, layers, regions, options, result, estimate=estimate
        )
    return result


def audit_and_store(*args: Any, summaries_to: str | None = None, **kwargs: Any) -> TileResult:
    """audit_tile (same arguments), then the worker writes the tile's summaries into the results
    store at ``summaries_to`` (its tile_summaries group) instead of the client. The result says
    so (summaries_stored); the client still checks that they arrived and writes them when not
    (a worker that cannot reach the store, or sees another disk at that path)."""
    result = audit_tile(*args, **kwargs)
    if summaries_to is None or result.status != OK:
        return result
    if result.summary.count == 0 and result.excluded == 0:
        return result  # the runner gives it status no_valid_pixels and stores nothing
    from demaudit.workers.outputs.summary_store import (  # summary_store imports us
        TileSummaryStore,
        entries_of,
    )

    try:
        store = TileSummaryStore(Path(summaries_to), mode="a")
        store.write(result.tile_id, entries_of(result), excluded=result.excluded)
    except Exception:  # noqa: BLE001 - any failure here leaves the writing to the client
        return result
    return replace(result, summaries_stored=True)


def with_coregistration(
    test: TileInfo,
    references: Sequence[TileInfo],
    layers: TileSurfaces,
    regions: Sequence[Region],
    options: TileOptions,
    result: TileResult,
    *,
    estimate: dict[str, Any] | None = None,
) -> TileResult:
    """Add the tile's own shift estimate and, when asked, the statistics after the correction
    (the job-wide one, or the tile's own as the spec says). The test pixels stay as delivered:
    the reference is resampled onto the shifted grid (see coregister_tile.reference_grid)."""
    coreg = options.coregistration
    assert coreg is not None and layers.test is not None
    record = estimate or own_estimate(test, layers, options)
    if not coreg.apply:
        return replace(result, coregistration=record)
    if coreg.estimate_from == "job":
        correction = options.correction
    else:
        correction = correction_from_record(record, fit_tilt=coreg.fit_tilt)
        if correction is not None:
            x, y = test.grid.centre_coordinates()
            correction = replace(
                correction, origin_east=float(x.mean()), origin_north=float(y.mean())
            )
    if correction is None:
        record = record | {"applied": False}
        return replace(result, coregistration=record)
    try:
        moved = shifted_reference(test, references, layers, options, correction)
    except (AuditError, RasterioError, OSError) as exc:
        reason = f"the reference could not be read again for the correction: {exc}"
        return replace(result, coregistration=record | {"applied": False, "reason": reason})
    dh = corrected_dh(layers.test, moved, test.grid, correction)
    moved_layers = replace(layers, dh=dh, reference=moved)
    corrected = summarise_tile(test, moved_layers, regions, options, derived=False)
    return replace(
        result,
        coregistration=record | {"applied": True},
        corrected=replace(corrected, overview=None),
    )


def shifted_reference(
    test: TileInfo,
    references: Sequence[TileInfo],
    layers: TileSurfaces,
    options: TileOptions,
    c: Correction,
) -> NDArray[np.float64]:
    """The reference (metres, test datum) at the test pixels' centres minus c's shift, in one
    resampling from the mosaics already read, or from a new read when the shift reaches beyond
    their margin."""
    grid = reference_grid(test.grid, east_m=c.east_m, north_m=c.north_m)
    px, py = test.grid.pixel_size_m()
    reach = max(abs(c.east_m) / px, abs(c.north_m) / py)
    if layers.mosaics and reach <= layers.margin_px - 1:
        mosaics = layers.mosaics
    else:
        mosaics = read_mosaics(
            references, grid, nodata=options.reference_nodata, units=options.reference_units
        )
    return reference_heights(mosaics, grid, options)


def own_estimate(test: TileInfo, layers: TileSurfaces, options: TileOptions) -> dict[str, Any]:
    """The tile's own Nuth & Kääb shift and tilt (a record; see coregister_tile.tile_estimate)."""
    coreg = options.coregistration
    assert coreg is not None and layers.test is not None
    return tile_estimate(
        layers.test,
        layers.reference,
        test.grid,
        cover=cover_ok(layers.landcover, options.landcover_classes),
        max_iterations=coreg.max_iterations,
        tolerance_px=coreg.tolerance_px,
    )


def without_pixels(layers: TileSurfaces, hidden: NDArray[np.bool_] | None) -> TileSurfaces:
    """layers with dh and the test heights set to NaN where ``hidden`` (None: unchanged)."""
    if hidden is None:
        return layers
    test_heights = None if layers.test is None else np.where(hidden, np.nan, layers.test)
    return replace(layers, dh=np.where(hidden, np.nan, layers.dh), test=test_heights)


def estimate_tile_shift(
    test: TileInfo,
    references: Sequence[TileInfo],
    options: TileOptions,
    landcover: Sequence[TileInfo],
    covered: Sequence[Footprint] = (),
) -> dict[str, Any]:
    """Task: read one tile and return its own shift record (status 'failed' when unreadable).

    ``covered`` as in audit_tile: pixels counted by an earlier-listed tile take no part."""
    if not references:
        return {"status": "cannot_estimate", "reason": "no reference tile overlaps this tile"}
    hidden = covered_mask(test.grid, covered) if covered else None
    if hidden is not None and hidden.all():
        return {"status": "cannot_estimate", "reason": superseded_reason(covered)}
    try:
        layers = tile_surfaces(test, references, options, landcover=landcover)
    except (AuditError, RasterioError, OSError) as exc:
        return {"status": "failed", "reason": str(exc)}
    return own_estimate(test, without_pixels(layers, hidden), options)


def estimate_tile(
    test: TileInfo,
    references: Sequence[TileInfo],
    regions: Sequence[Region],
    options: TileOptions,
    landcover: Sequence[TileInfo],
    at: Correction,
    covered: Sequence[Footprint] = (),
) -> TileEquations | None:
    """One tile's equations for the job-wide co-registration at correction ``at`` (None when the
    tile cannot be read: the estimate then rests on the other tiles). ``covered`` as in
    audit_tile: pixels counted by an earlier-listed tile add no equations."""
    if not references:
        return None
    hidden = covered_mask(test.grid, covered) if covered else None
    if hidden is not None and hidden.all():
        return None
    try:
        layers = tile_surfaces(test, references, options, landcover=landcover, shift=at)
    except (AuditError, RasterioError, OSError):
        return None
    layers = without_pixels(layers, hidden)
    assert layers.test is not None
    masks = {r.region_id: region_mask(r, test.grid) for r in regions}
    cover = cover_ok(layers.landcover, options.landcover_classes)
    return tile_equations(
        layers.test, layers.reference, test.grid, at=at, cover=cover, region_masks=masks
    )


def summarise_tile(
    test: TileInfo,
    layers: TileSurfaces,
    regions: Sequence[Region],
    options: TileOptions,
    *,
    reference_tiles: tuple[str, ...] = (),
    derived: bool = True,
) -> TileResult:
    """Summaries of dh for the tile, each region, and each region x stratum (one pass over the
    valid pixels: workers/tile/one_pass.py); with options.derivatives and ``derived``, the
    comparison of derived parameters (workers/tile/derivative_pass.py)."""
    dh = layers.dh
    px, py = test.grid.pixel_size_m()
    masks = {r.region_id: region_mask(r, test.grid) for r in regions}
    found = summarise_pixels(
        dh,
        reference=layers.reference,
        landcover=layers.landcover,
        region_masks=masks,
        classes=options.landcover_classes,
        slope_edges=options.slope_edges_deg,
        pixel_size_m=(px, py),
    )
    dh_valid = dh
    excluded = None
    if found.excluded:
        excluded = excluded_mask(layers.landcover, options.landcover_classes)
    if excluded is not None:
        dh_valid = np.where(excluded, np.nan, dh)
    per_area = found.areas
    per_stratum = found.strata
    return TileResult(
        tile_id=test.tile_id,
        status=OK,
        reason=None,
        summary=per_area.pop(ALL),
        regions=per_area,
        strata=per_stratum,
        excluded=found.excluded,
        overview=block_mean(dh_valid, options.overview_factor),
        reference_tiles=reference_tiles,
        error_sample=grid_error_sample(
            test.grid, test.tile_id, dh, layers.reference, layers.landcover, masks,
            options.landcover_classes, options.error_model,
        ),
        derivatives=None
        if options.derivatives is None or layers.test is None or not derived
        else tile_derivatives(
            layers.test, layers.reference, landcover=layers.landcover, region_masks=masks,
            classes=options.landcover_classes, slope_edges=options.slope_edges_deg,
            pixel_size_m=(px, py), options=options.derivatives,
            overview_factor=options.overview_factor,
        ),
    )


def tile_surfaces(
    test: TileInfo,
    references: Sequence[TileInfo],
    options: TileOptions,
    *,
    landcover: Sequence[TileInfo] = (),
    shift: Correction | None = None,
) -> TileSurfaces:
    """dh = test - reference and the reference itself, in metres on the test tile's grid and
    in the test's vertical datum; land cover (class values, NaN = none) when given.

    With ``shift`` (only its east_m / north_m are used) the reference is taken at each test
    pixel's centre minus the shift, in the same single resampling (the test is never resampled).
    """
    test_heights = to_metres(
        read_tile(test, nodata=options.test_nodata, units=options.test_units), options.test_units
    )
    grid, margin = test.grid, 0
    if shift is not None:
        grid = reference_grid(test.grid, east_m=shift.east_m, north_m=shift.north_m)
    elif options.coregistration is not None and options.coregistration.apply:
        margin = COREGISTRATION_MARGIN_PX
    mosaics = read_mosaics(
        references,
        grid.expanded(margin),
        nodata=options.reference_nodata,
        units=options.reference_units,
    )
    reference = reference_heights(mosaics, grid, options)
    classes = None
    if landcover:
        classes = resampled_onto(landcover, test.grid, resampling="nearest", nodata=None)
    return TileSurfaces(
        difference(test_heights, reference),
        reference,
        classes,
        test_heights,
        mosaics=mosaics if margin else (),
        margin_px=margin,
    )


def reference_heights(
    mosaics: Sequence[Mosaic], grid: Grid, options: TileOptions
) -> NDArray[np.float64]:
    """The reference mosaics resampled onto grid (the spec's resampling), in metres and in the
    test's vertical datum (the datum offset evaluated at grid's pixel centres)."""
    reference = to_metres(
        mosaics_onto(mosaics, grid, resampling=options.resampling), options.reference_units
    )
    offset = vertical_offset_on_grid(
        grid,
        from_crs=options.reference_vertical_crs,
        to_crs=options.test_vertical_crs,
        grid_dirs=options.grid_dirs,
    )
    if offset is not None:
        reference += offset
    return reference


def resampled_onto(
    tiles: Sequence[TileInfo], grid: Grid, *, resampling: str, nodata: float | None
) -> NDArray[np.float64]:
    """Values of tiles (own unit and datum) resampled onto grid; NaN where none."""
    return mosaics_onto(read_mosaics(tiles, grid, nodata=nodata), grid, resampling=resampling)


def read_mosaics(
    tiles: Sequence[TileInfo], grid: Grid, *, nodata: float | None, units: str | None = None
) -> tuple[Mosaic, ...]:
    """The parts of tiles that cover grid, one mosaic per CRS (own unit and datum). With units
    (heights, not land cover) each tile's values are checked (rasters.check_heights)."""
    target_crs = CRS.from_wkt(grid.crs)
    by_crs: dict[str, list[TileInfo]] = {}
    for tile in tiles:
        by_crs.setdefault(tile.grid.crs, []).append(tile)
    mosaics = []
    for crs, members in by_crs.items():
        bounds = transform_bounds(target_crs, CRS.from_wkt(crs), *grid.bounds, densify_pts=21)
        mosaics.append(read_mosaic(members, bounds, nodata=nodata, units=units))
    return tuple(mosaics)


def mosaics_onto(mosaics: Sequence[Mosaic], grid: Grid, *, resampling: str) -> NDArray[np.float64]:
    """Mosaics resampled onto grid, the first covering a pixel winning; NaN where none."""
    if len(mosaics) == 1:  # onto_grid gives a new array: nothing to combine
        mosaic, mosaic_grid = mosaics[0]
        return onto_grid(mosaic, mosaic_grid, grid, resampling=resampling)
    out = np.full(grid.shape, np.nan)
    for mosaic, mosaic_grid in mosaics:
        resampled = onto_grid(mosaic, mosaic_grid, grid, resampling=resampling)
        np.copyto(out, resampled, where=np.isnan(out))
    return out
