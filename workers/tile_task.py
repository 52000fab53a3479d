"""One test tile, end to end: read, align the reference, one datum, difference, summarise.

This is the function the Dask workers run, once per test tile. It returns a small result (the
mergeable summaries and a decimated dh overview), never the full-resolution arrays, and it never
raises for a bad tile: the failure and its reason travel back in the result.
"""

from __future__ import annotations

import traceback
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray
from pyproj import CRS
from rasterio.errors import RasterioError
from rasterio.warp import transform_bounds

from workers import summary as dh_summary
from workers.align import onto_grid
from workers.catalog import TileInfo
from workers.datum import DEFAULT_GRID_DIRS, to_metres, vertical_offset_on_grid
from workers.difference import block_mean, difference
from workers.errors import AuditError
from workers.grid import Grid
from workers.rasters import read_mosaic, read_tile
from workers.regions import Region, region_mask
from workers.spec import JobSpec
from workers.summary import DhSummary

OK = "ok"
FAILED = "failed"
NO_REFERENCE = "no_reference"


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

    @classmethod
    def from_spec(cls, spec: JobSpec, *, grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS) -> TileOptions:
        return cls(
            test_units=spec.test.units,
            test_vertical_crs=spec.test.vertical_crs,
            test_nodata=spec.test.nodata,
            reference_units=spec.reference.units,
            reference_vertical_crs=spec.reference.vertical_crs,
            reference_nodata=spec.reference.nodata,
            resampling=spec.options.resampling,
            overview_factor=spec.options.overview_factor,
            grid_dirs=tuple(grid_dirs),
        )


@dataclass(frozen=True, eq=False)
class TileResult:
    """What one tile task returns: status, summaries (whole tile and per region), overview."""

    tile_id: str
    status: str
    reason: str | None
    summary: DhSummary = field(default_factory=dh_summary.empty)
    regions: dict[str, DhSummary] = field(default_factory=dict)
    overview: NDArray[np.float32] | None = None
    reference_tiles: tuple[str, ...] = ()


def audit_tile(
    test: TileInfo,
    references: Sequence[TileInfo],
    regions: Sequence[Region],
    options: TileOptions,
) -> TileResult:
    """Difference one test tile against the reference on the test tile's grid and summarise.

    regions must already be in the test tile's CRS (see regions.to_crs / clip_to).
    """
    ref_ids = tuple(r.tile_id for r in references)
    if not references:
        return TileResult(test.tile_id, NO_REFERENCE, "no reference tile overlaps this tile")
    try:
        dh = tile_dh(test, references, options)
    except (AuditError, RasterioError, OSError) as exc:
        return TileResult(test.tile_id, FAILED, str(exc), reference_tiles=ref_ids)
    except Exception as exc:  # noqa: BLE001 - a job never dies silently: report and go on
        where = traceback.format_exc(limit=-1).strip().splitlines()[-2:]
        reason = f"unexpected {type(exc).__name__}: {exc} ({' '.join(s.strip() for s in where)})"
        return TileResult(test.tile_id, FAILED, reason, reference_tiles=ref_ids)
    region_summaries = {
        region.region_id: dh_summary.summarise(dh[region_mask(region, test.grid)])
        for region in regions
    }
    return TileResult(
        tile_id=test.tile_id,
        status=OK,
        reason=None,
        summary=dh_summary.summarise(dh),
        regions=region_summaries,
        overview=block_mean(dh, options.overview_factor),
        reference_tiles=ref_ids,
    )


def tile_dh(test: TileInfo, references: Sequence[TileInfo], options: TileOptions) -> NDArray[np.float64]:
    """dh = test - reference in metres on the test tile's grid, in the test's vertical datum."""
    test_heights = to_metres(read_tile(test, nodata=options.test_nodata), options.test_units)
    reference = to_metres(reference_on_grid(references, test.grid, options), options.reference_units)
    offset = vertical_offset_on_grid(
        test.grid,
        from_crs=options.reference_vertical_crs,
        to_crs=options.test_vertical_crs,
        grid_dirs=options.grid_dirs,
    )
    if offset is not None:
        reference += offset
    return difference(test_heights, reference)


def reference_on_grid(
    references: Sequence[TileInfo], grid: Grid, options: TileOptions
) -> NDArray[np.float64]:
    """The reference heights (own unit and datum) resampled onto grid; NaN where none."""
    out = np.full(grid.shape, np.nan)
    target_crs = CRS.from_wkt(grid.crs)
    by_crs: dict[str, list[TileInfo]] = {}
    for ref in references:
        by_crs.setdefault(ref.grid.crs, []).append(ref)
    for crs, tiles in by_crs.items():
        bounds = transform_bounds(target_crs, CRS.from_wkt(crs), *grid.bounds, densify_pts=21)
        mosaic, mosaic_grid = read_mosaic(tiles, bounds, nodata=options.reference_nodata)
        resampled = onto_grid(mosaic, mosaic_grid, grid, resampling=options.resampling)
        np.copyto(out, resampled, where=np.isnan(out))
    return out
