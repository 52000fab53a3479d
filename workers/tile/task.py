"""One test tile, end to end: read, align the reference, one datum, difference, summarise.

This is the function the Dask workers run, once per test tile. It returns a small result (the
mergeable summaries and a decimated dh overview), never the full-resolution arrays, and it never
raises for a bad tile: the failure and its reason travel back in the result.

The parts live beside it: records.py (options, result, layers), reference.py (reading and
aligning the reference), summarise.py (the summaries of a tile's layers); their names are
importable from here as before.
"""

from __future__ import annotations

import traceback
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray
from rasterio.errors import RasterioError

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
from demaudit.workers.inputs.rasters import read_tile
from demaudit.workers.inputs.regions import Region, region_mask
from demaudit.workers.outputs.overview_block import OverviewTarget, store_block
from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.tile.difference import difference
from demaudit.workers.tile.one_pass import ALL
from demaudit.workers.tile.records import (
    COREGISTRATION_MARGIN_PX,
    FAILED,
    NO_REFERENCE,
    NO_VALID_PIXELS,
    OK,
    Mosaic,
    TileOptions,
    TileResult,
    TileSurfaces,
)
from demaudit.workers.tile.reference import (
    keeps_float32,
    mosaics_onto,
    read_mosaics,
    reference_heights,
    resampled_onto,
    test_heights,
)
from demaudit.workers.tile.summarise import summarise_tile, without_pixels

__all__ = [
    "ALL",
    "COREGISTRATION_MARGIN_PX",
    "FAILED",
    "NO_REFERENCE",
    "NO_VALID_PIXELS",
    "OK",
    "Mosaic",
    "TileOptions",
    "TileResult",
    "TileSurfaces",
    "audit_and_store",
    "audit_tile",
    "estimate_tile",
    "estimate_tile_shift",
    "mosaics_onto",
    "own_estimate",
    "read_mosaics",
    "reference_heights",
    "resampled_onto",
    "shifted_reference",
    "summarise_tile",
    "tile_surfaces",
    "with_coregistration",
    "without_pixels",
]


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


def audit_and_store(
    *args: Any,
    summaries_to: str | None = None,
    overview_to: OverviewTarget | None = None,
    **kwargs: Any,
) -> TileResult:
    """audit_tile (same arguments), then the worker writes the tile's summaries into the results
    store at ``summaries_to`` (its tile_summaries group) and its overview block at
    ``overview_to`` instead of the client. The result says so (summaries_stored; an overview
    stored is not sent back); the client still checks that the summaries arrived and writes
    what the worker could not (a worker that cannot reach the store, or sees another disk)."""
    result = with_statistics(audit_tile(*args, **kwargs))
    if result.status != OK or (result.summary.count == 0 and result.excluded == 0):
        return result  # the runner gives an empty one status no_valid_pixels, stores nothing
    if summaries_to is not None:
        result = _store_summaries(result, summaries_to)
    if overview_to is not None and result.overview is not None:
        try:
            store_block(overview_to, result.overview)
        except Exception:  # noqa: BLE001 - any failure here leaves the writing to the client
            return result
        result = replace(result, overview=None, overview_stored=True)
    return result


def _store_summaries(result: TileResult, summaries_to: str) -> TileResult:
    from demaudit.workers.outputs.layout import TILE_SUMMARIES_GROUP
    from demaudit.workers.outputs.open_nodes import opened
    from demaudit.workers.outputs.summary_store import (  # summary_store imports us
        TileSummaryStore,
        entries_of,
    )

    try:  # r+: the client made the store; once a failed job removed it, nothing is recreated
        store = opened(
            "tile summaries",
            Path(summaries_to) / TILE_SUMMARIES_GROUP,
            lambda: TileSummaryStore(Path(summaries_to), mode="r+"),
        )
        store.write(result.tile_id, entries_of(result), excluded=result.excluded)
    except Exception:  # noqa: BLE001 - any failure here leaves the writing to the client
        return result
    return replace(result, summaries_stored=True)


def with_statistics(result: TileResult) -> TileResult:
    """result (and its corrected pass) with the tile's statistics worked out here, on the
    worker, instead of by the client that gathers every tile's result."""
    if result.status != OK:
        return result
    corrected = result.corrected
    if corrected is not None:
        corrected = replace(corrected, statistics=dh_summary.statistics(corrected.summary))
    return replace(result, statistics=dh_summary.statistics(result.summary), corrected=corrected)


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
    dh = corrected_dh(as_float64(layers.test), as_float64(moved), test.grid, correction)
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
) -> NDArray[np.floating]:
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
        as_float64(layers.test),
        as_float64(layers.reference),
        test.grid,
        cover=cover_ok(layers.landcover, options.landcover_classes),
        max_iterations=coreg.max_iterations,
        tolerance_px=coreg.tolerance_px,
    )


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
        as_float64(layers.test),
        as_float64(layers.reference),
        test.grid,
        at=at,
        cover=cover,
        region_masks=masks,
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
    With keeps_float32(options), float32 files stay float32 (tile.reference); dh is float64.
    """
    as_read = keeps_float32(options) and shift is None
    heights = test_heights(test, options, keep_float32=as_read)
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
        keep_float32=as_read,
    )
    reference = reference_heights(mosaics, grid, options)
    classes = None
    if landcover:
        classes = resampled_onto(landcover, test.grid, resampling="nearest", nodata=None)
    return TileSurfaces(
        difference(heights, reference),
        reference,
        None if classes is None else as_float64(classes),
        heights,
        mosaics=mosaics if margin else (),
        margin_px=margin,
    )


def as_float64(values: NDArray[np.floating]) -> NDArray[np.float64]:
    """values in float64 (the same array when it is already: co-registration and land cover
    never take the float32 path, so this copies nothing there)."""
    return np.asarray(values, dtype=np.float64)
