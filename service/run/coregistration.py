"""The job-wide co-registration estimate on the cluster, without moving pixels: the Dask fan-out
over the pure estimates of workers/coregistration/job.py (``tile_median``, the default: every
tile, or every n-th, finds its own shift and the job takes the medians) and
workers/coregistration/pooled.py (``pooled``: repeated passes of mergeable normal equations).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

from distributed import Client, as_completed

from demaudit.workers.coregistration.job import (
    JobEstimate,
    origin_of,
    region_medians,
    tile_median,
)
from demaudit.workers.coregistration.pooled import PooledSettings, pooled_estimate
from demaudit.workers.coregistration.shift import ShiftEstimate
from demaudit.workers.coregistration.tile import Correction, TileEquations
from demaudit.workers.inputs import regions as region_ops
from demaudit.workers.inputs.catalog import Footprint, TileInfo
from demaudit.workers.inputs.regions import Region
from demaudit.workers.tile.task import TileOptions, estimate_tile, estimate_tile_shift


@dataclass(frozen=True)
class TileInputs:
    """What a tile task needs besides the tile: its reference and land-cover tiles, the
    regions by test CRS and the footprints of earlier-listed tiles over it."""

    references: Mapping[str, list[TileInfo]]
    landcover: Callable[[TileInfo], list[TileInfo]]
    regions: Mapping[str, list[Region]]
    covered: Callable[[TileInfo], Sequence[Footprint]] = field(default=lambda _tile: ())


@dataclass(frozen=True)
class CorrectionEstimate:
    """The estimate phase's outcome: the job's estimate (None without co-registration in the
    spec) and every tile's own estimate (tile id -> estimate)."""

    job: JobEstimate | None = None
    tiles: Mapping[str, ShiftEstimate] = field(default_factory=dict)

    @property
    def correction(self) -> Correction | None:
        return self.job.correction if self.job is not None else None


def estimate_job_correction(
    client: Client,
    tiles: Sequence[TileInfo],
    inputs: TileInputs,
    *,
    options: TileOptions,
    known: Mapping[str, ShiftEstimate] | None = None,
) -> CorrectionEstimate:
    """The job's correction, a report of the estimate and the tiles' own estimates.

    known: tile id -> estimate from an earlier run of tiles whose inputs did not change (a
    re-check); those tiles are not estimated again. The pooled estimate ignores it (its passes
    depend on the whole job's shift) and visits every sampled tile. inputs.covered: pixels of
    earlier-listed test tiles are counted once, in the earlier tile, here as in the statistics.
    """
    coreg = options.coregistration
    assert coreg is not None
    sample = list(tiles[:: coreg.tile_stride])
    reuse = dict(known or {}) if coreg.job_estimate == "tile_median" else {}
    estimates = reuse | _own_estimates(client, [t for t in sample if t.tile_id not in reuse],
                                       inputs, options)  # fmt: skip
    estimates = {t.tile_id: estimates[t.tile_id] for t in sample}
    origin = origin_of(sample)
    if coreg.job_estimate == "tile_median":
        job = tile_median(estimates, origin, fit_tilt=coreg.fit_tilt)
        job.report["regions"] = region_medians(estimates, sample, inputs.regions)
    else:
        job = _pooled(client, sample, inputs, options, origin)
    job.report["tiles_used"] = len(sample)
    job.report["tiles_estimated_earlier"] = sum(t.tile_id in reuse for t in sample)
    return CorrectionEstimate(job, estimates)


def _own_estimates(
    client: Client, tiles: Sequence[TileInfo], inputs: TileInputs, options: TileOptions
) -> dict[str, ShiftEstimate]:
    """Each tile's own estimate, computed on the cluster."""
    futures = {
        t.tile_id: client.submit(
            estimate_tile_shift,
            t,
            inputs.references[t.tile_id],
            options,
            inputs.landcover(t),
            inputs.covered(t),
            pure=False,
        )
        for t in tiles
    }
    return {k: ShiftEstimate.from_record(f.result()) for k, f in futures.items()}


def _pooled(
    client: Client,
    sample: Sequence[TileInfo],
    inputs: TileInputs,
    options: TileOptions,
    origin: Correction,
) -> JobEstimate:
    coreg = options.coregistration
    assert coreg is not None
    settings = PooledSettings(
        max_iterations=coreg.max_iterations,
        tolerance_px=coreg.tolerance_px,
        fit_tilt=coreg.fit_tilt,
        fit_elevation_bias=coreg.fit_elevation_bias,
    )
    pixel_m = min(t.grid.pixel_size_m()[0] for t in sample)

    def run_pass(at: Correction) -> TileEquations:
        return _pass(client, sample, inputs, options, at)

    return pooled_estimate(run_pass, origin, pixel_m=pixel_m, settings=settings)


def _pass(
    client: Client,
    tiles: Sequence[TileInfo],
    inputs: TileInputs,
    options: TileOptions,
    at: Correction,
) -> TileEquations:
    """One pass over the tiles at correction ``at``: their equations, merged as they arrive."""
    futures = [
        client.submit(
            estimate_tile,
            t,
            inputs.references[t.tile_id],
            region_ops.clip_to(inputs.regions.get(t.grid.crs, []), t.bounds),
            options,
            inputs.landcover(t),
            at,
            inputs.covered(t),
            pure=False,
        )
        for t in tiles
    ]
    total = TileEquations()
    for future in as_completed(futures):
        part = future.result()
        future.release()
        if part is not None:
            total = total.merge(part)
    return total
