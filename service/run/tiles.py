"""The tile phase of a job: the test tiles to compute go to the cluster a few per task
(tile_tasks.py), each tile's result folded into the running totals and the results store as it
arrives (pixels stay on the workers)."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from contextlib import ExitStack
from dataclasses import dataclass, replace
from functools import partial

from distributed import Client, Future

from demaudit.service.run.coregistration import CorrectionEstimate
from demaudit.service.run.reuse import Reuse
from demaudit.service.run.scan import Catalog
from demaudit.service.run.tile_limit import TileClock
from demaudit.service.run.tile_tasks import TileTasks, tiles_per_task
from demaudit.workers.errors import JobDismissedError
from demaudit.workers.inputs import regions as region_ops
from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.outputs.derivatives import JobDerivatives
from demaudit.workers.outputs.summary_store import TileSummaryStore, entries_of
from demaudit.workers.outputs.tile_records import (
    TileRecord,
    computed_record,
    failed_record,
    not_audited_record,
    with_status,
)
from demaudit.workers.outputs.writers import ResultsStore
from demaudit.workers.stats.job_statistics import Totals
from demaudit.workers.stats.merge import JobAccumulator
from demaudit.workers.tile.batch import TileCall, audit_tiles
from demaudit.workers.tile.task import OK, TileOptions, TileResult
from demaudit.workers.uncertainty.accumulate import ErrorModelAccumulator
from demaudit.workers.uncertainty.sample import ErrorModelOptions
from demaudit.workers.uncertainty.sample_store import ErrorSampleStore, record_samples

Progress = Callable[[int, int], None]


@dataclass(frozen=True)
class Dispatch:
    """How the tile tasks run: task key suffix, retries when a worker is lost, progress
    callback (done, total), the dismissal check and the limit on one tile task's running time
    in seconds (None: no limit; see tile_limit)."""

    run_id: str
    retries: int = 1
    progress: Progress | None = None
    should_stop: Callable[[], bool] | None = None
    tile_timeout_s: float | None = None
    tiles_per_task: int | None = None  # None: tile_tasks.tiles_per_task for the cluster


@dataclass(frozen=True)
class Outputs:
    """Where tile results go: the results store (overview, tables), the tile summaries and,
    with an error model, the tiles' error samples (kept for re-checks) and their options."""

    store: ResultsStore
    summaries: TileSummaryStore
    samples: ErrorSampleStore | None = None
    sample_options: ErrorModelOptions | None = None
    derivatives: JobDerivatives | None = None  # the spec's derivatives: merge and overviews


def run_tiles(
    client: Client,
    tiles: Sequence[TileInfo],
    catalog: Catalog,
    estimate: CorrectionEstimate,
    options: TileOptions,
    *,
    totals: Totals,
    outputs: Outputs,
    dispatch: Dispatch,
    job_name: str,
) -> dict[str, TileRecord]:
    """Audit ``tiles`` on the cluster (a few per task: tile_tasks) and fold each result into
    totals and outputs; the tiles' records. JobDismissedError (the remaining tasks cancelled)
    once dispatch.should_stop(). A task running longer than dispatch.tile_timeout_s per tile is
    cancelled; its tiles run again one per task, and a single tile's task cut short fails it."""
    per_task = dispatch.tiles_per_task
    if per_task is None:
        per_task = tiles_per_task(len(tiles), workers=max(1, sum(client.nthreads().values())))
    submit = partial(client.submit, retries=dispatch.retries)  # a lost worker's task runs again
    tasks = TileTasks(submit, run_id=dispatch.run_id, per_task=per_task, function=audit_tiles)
    futures = tasks.submit_all(_call(t, catalog, estimate, options, outputs) for t in tiles)
    with ExitStack() as stack:
        clock = None
        if dispatch.tile_timeout_s is not None and futures:
            limit = dispatch.tile_timeout_s
            clock = stack.enter_context(TileClock(client, futures, limit, tiles_of=tasks.tiles))
        return _collect(client, futures, tasks, catalog, clock, totals, outputs, dispatch, job_name)


def _collect(
    client: Client,
    futures: list[Future],
    tasks: TileTasks,
    catalog: Catalog,
    clock: TileClock | None,
    totals: Totals,
    outputs: Outputs,
    dispatch: Dispatch,
    job_name: str,
) -> dict[str, TileRecord]:
    """Fold the tasks' results as they arrive (run_tiles)."""
    total = len(catalog.tests) + len(catalog.test_failures)
    done = total - sum(len(tasks.tiles(f.key)) for f in futures)
    by_id = catalog.by_id
    records: dict[str, TileRecord] = {}
    for results in tasks.arrivals(futures, clock):
        if dispatch.should_stop is not None and dispatch.should_stop():
            client.cancel(tasks.futures)
            raise JobDismissedError(f"job {job_name} was dismissed after {done} tiles")
        for result in map(with_status, results):
            fold(result, totals, outputs)
            tile = by_id[result.tile_id]
            record = computed_record(result, tile, catalog.sources_of(tile))
            if outputs.derivatives is not None:
                record = replace(record, extra={**record.extra, **outputs.derivatives.add(result)})
            records[result.tile_id] = record
            done += 1
            if dispatch.progress:
                dispatch.progress(done, total)
    return records


def _call(
    tile: TileInfo,
    catalog: Catalog,
    estimate: CorrectionEstimate,
    options: TileOptions,
    outputs: Outputs,
) -> TileCall:
    """One tile's arguments for its task (workers/tile/batch.py: task.audit_and_store)."""
    own = estimate.tiles.get(tile.tile_id)
    args = (
        tile,
        catalog.candidates[tile.tile_id],
        region_ops.clip_to(catalog.regions_by_crs.get(tile.grid.crs, []), tile.bounds),
        options,
        catalog.landcover_of(tile),
        own.record() if own is not None else None,
    )
    return TileCall(
        tile.tile_id,
        args,
        {
            "covered": catalog.covered_of(tile),
            "summaries_to": str(outputs.summaries.zarr_path),
            "overview_to": outputs.store.overview_target(tile.tile_id),
        },
    )


def fold(result: TileResult, totals: Totals, outputs: Outputs) -> None:
    """Merge one tile's result into the running totals and write its overview and its tile
    summaries (unless the task stored them)."""
    totals.all.add(result)
    if result.corrected is not None:
        totals.after.add(result.corrected)
    pair = (result.error_sample, result.corrected.error_sample if result.corrected else None)
    accumulators = [totals.errors, totals.errors_after]
    record_samples(outputs.samples, result.tile_id, pair, accumulators, outputs.sample_options)
    if not result.overview_stored:
        outputs.store.write_overview(result.tile_id, result.overview)
    if result.status == OK:
        summaries = outputs.summaries
        by_worker = result.summaries_stored and summaries.has(result.tile_id)  # audit_and_store
        if not by_worker:
            summaries.write(result.tile_id, entries_of(result), excluded=result.excluded)


def by_tile(records: Mapping[str, TileRecord]) -> list[TileRecord]:
    """The records in tile id order (summary.json and the tiles table)."""
    return [records[k] for k in sorted(records)]


@dataclass(frozen=True)
class TilePhase:
    """The tile phase's outcome: every test tile's record (in tile id order), the job totals
    and the stores the tiles were written to."""

    records: list[TileRecord]
    totals: Totals
    outputs: Outputs


def starting_totals(
    resumed: tuple[JobAccumulator, JobAccumulator] | None,
    region_ids: list[str],
    max_samples: int,
) -> Totals:
    """Empty totals, or a re-check's resumed ones (the baseline's without the tiles computed
    again); error-model samples keep at most max_samples points."""
    acc, after = resumed or (
        JobAccumulator(region_ids=region_ids),
        JobAccumulator(region_ids=region_ids),
    )
    errors = [ErrorModelAccumulator(max_points=max_samples) for _ in range(2)]
    return Totals(acc, after, errors[0], errors[1])


def unaudited_records(catalog: Catalog, *, raster: bool) -> dict[str, TileRecord]:
    """Records of the test tiles that could not be read and, in a checkpoint-only job
    (raster False), of every test tile."""
    records = {f.tile_id: failed_record(f.tile_id, f.reason) for f in catalog.test_failures}
    if not raster:
        records |= {t.tile_id: not_audited_record(t) for t in catalog.tests}
    return records


def to_audit(catalog: Catalog, reuse: Reuse, *, raster: bool) -> list[TileInfo]:
    """The test tiles to audit: all of them, or in a re-check those it computes again (none in
    a checkpoint-only job)."""
    if not raster:
        return []
    if reuse.change is None or reuse.baseline is None:
        return catalog.tests
    by_id = catalog.by_id
    return [by_id[t] for t in sorted(reuse.change.recompute)]
