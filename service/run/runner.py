"""Run one audit job on a Dask cluster: catalog, one task per test tile, merge, write.

The client process holds the catalog (small), the running merge of summaries and one finished tile
result at a time; pixels stay on the workers.
"""

from __future__ import annotations

import datetime as dt
import os
import time
import uuid
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
from distributed import Client, Future, as_completed
from pyproj import CRS, Transformer

from demaudit.service.run.checkpoints import (
    audit_checkpoints,
    earlier_heights,
    grade,
    read_job_checkpoints,
)
from demaudit.service.run.coregistration import estimate_job_correction
from demaudit.service.run.recheck import (
    Baseline,
    change_report,
    known_shifts,
    load_baseline,
    make_plan,
    resumed_totals,
)
from demaudit.workers.checkpoints.grading import Measured
from demaudit.workers.checkpoints.points import CheckpointFile
from demaudit.workers.errors import AuditError, EmptyOverlapError, TileReadError
from demaudit.workers.inputs import regions as region_ops
from demaudit.workers.inputs.catalog import (
    Footprint,
    Known,
    Overlap,
    ScanFailure,
    TileIndex,
    TileInfo,
    catalog_document,
    file_fingerprint,
    overlap_cautions,
    overlap_sources,
    overlap_sources_of,
    scan_landcover_tile,
    scan_tile,
    tile_overlaps,
    unchanged,
    unique_tile_ids,
)
from demaudit.workers.inputs.confine import Roots
from demaudit.workers.inputs.rasters import read_tile
from demaudit.workers.inputs.regions import Region
from demaudit.workers.outputs.figures import write_figures
from demaudit.workers.outputs.report_html import write_report
from demaudit.workers.outputs.summary_document import (
    area_entry,
    build_summary,
    region_entries,
    vertical_accuracy_cautions,
)
from demaudit.workers.outputs.summary_store import (
    AFTER_PART,
    ALL_PART,
    TileSummaryStore,
    entries_of,
    write_job_totals,
)
from demaudit.workers.outputs.writers import (
    OutputError,
    OverviewLayout,
    ResultsStore,
    check_output_folder,
    overview_carries,
    overview_layout,
    staged_folder,
    statistics_table,
    strata_table,
    write_summary,
)
from demaudit.workers.recheck.plan import ChangePlan, Thresholds
from demaudit.workers.spec import ELLIPSOIDAL, ResolvedJob
from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.merge import JobAccumulator
from demaudit.workers.stats.summary import statistics
from demaudit.workers.tile.datum import (
    DEFAULT_GRID_DIRS,
    geoid_undulation,
    vertical_transformations,
)
from demaudit.workers.tile.task import (
    ALL,
    FAILED,
    NO_REFERENCE,
    NO_VALID_PIXELS,
    OK,
    TileOptions,
    TileResult,
    audit_and_store,
)
from demaudit.workers.uncertainty.error_model import ErrorModelAccumulator, attach_error_model

Progress = Callable[[int, int], None]


class JobDismissedError(AuditError):
    """The job was dismissed while it ran; its remaining tile tasks were cancelled."""


SOFTWARE = "demaudit 0.1.0"
CHANGE_REPORT_NAME = "change_report.json"
CATALOG_NAME = "catalog.json"


def run_job(
    job: ResolvedJob,
    out_dir: Path,
    *,
    client: Client,
    grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS,
    progress: Progress | None = None,
    should_stop: Callable[[], bool] | None = None,
    run_id: str | None = None,
    retries: int = 1,
    baseline: Path | None = None,
    inputs: Inputs | None = None,
) -> dict[str, Any]:
    """Audit job.spec on the cluster behind client; write results.zarr and summary.json into
    out_dir and return the summary document.

    progress(done, total) is called as tiles finish; when should_stop() turns true the remaining
    tile tasks are cancelled on the cluster and JobDismissedError is raised. Tile tasks get the
    key ``audit-tile-<tile>-<run_id>`` (a job id makes them deterministic) and ``retries``
    retries when a worker is lost.

    With ``baseline`` (the folder of an earlier run of the same spec), only new and changed tiles
    (or tiles whose reference or land cover changed) are recomputed; the run continues the
    baseline's stored job totals (see _reuse_of), and summary.json gets a ``recheck`` change
    report (also written as change_report.json).

    Every input file that can be checked (regions, checkpoints, baseline, the output folder) is
    checked before the first tile runs. The new result is built in ``<out_dir>.partial-<run_id>``
    beside out_dir and swapped in only when complete (writers.staged_folder): a run that fails
    leaves out_dir as it was, and out_dir never mixes files of two runs. A baseline may be
    out_dir itself: it stays readable until the swap. ``inputs``: read_inputs(job) when the
    caller has already read them.
    """
    started = _now()
    run_id = run_id or uuid.uuid4().hex[:12]
    inputs = inputs if inputs is not None else read_inputs(job)
    prior = load_baseline(baseline) if baseline is not None else None
    with staged_folder(out_dir, run_id) as stage:
        return _run_into(
            stage,
            job,
            inputs,
            prior,
            client=client,
            grid_dirs=grid_dirs,
            progress=progress,
            should_stop=should_stop,
            run_id=run_id,
            retries=retries,
            started=started,
        )


@dataclass(frozen=True)
class Inputs:
    """The job's small input files, read (and so checked) before any tile is dispatched."""

    regions: list[Region]
    checkpoints: CheckpointFile | None = None


def read_inputs(job: ResolvedJob) -> Inputs:
    """Read the region and checkpoint files; SpecError (or MissingCRSError) naming the file and
    field when one cannot be used."""
    checkpoints = read_job_checkpoints(job) if job.spec.checkpoints is not None else None
    return Inputs(_load_regions(job), checkpoints)


def check_output(out_dir: Path) -> Path:
    """The absolute output folder; OutputError when it is a file, a folder of other files, or
    cannot be created or written (the run builds its result beside it)."""
    target = check_output_folder(out_dir)
    existing = next(p for p in [target, *target.parents] if p.exists())
    if not existing.is_dir():
        raise OutputError(f"--out: {existing} is a file, not a folder")
    writable = target.parent if existing == target else existing
    if writable.exists() and not os.access(writable, os.W_OK | os.X_OK):
        raise OutputError(f"--out: cannot write in {writable} (permission denied)")
    return target


def validate_job(
    job: ResolvedJob,
    *,
    grid_dirs: Sequence[str] = DEFAULT_GRID_DIRS,
    out_dir: Path | None = None,
    baseline: Path | None = None,
    pixels: bool = False,
) -> tuple[list[str], list[str]]:
    """Check everything a run checks before its first tile, without running one: the region
    and checkpoint files, the output folder and baseline when given, every tile's header
    (files are not hashed), the overlap of test and reference, the geoid grids, the regions'
    extent. With ``pixels``, every test tile is also read and its heights checked as a run
    would (void codes without a nodata tag). Raises what run_job would raise; returns notes and
    per-tile problems (tiles a run would report as failed or leave out)."""
    inputs = read_inputs(job)
    notes = []
    if out_dir is not None:
        notes.append(f"output folder {check_output(out_dir)} can be used")
    if baseline is not None:
        load_baseline(baseline)
        notes.append(f"baseline {baseline} is a finished run")
    options = TileOptions.from_spec(job.spec, grid_dirs=grid_dirs)
    catalog = _catalog(_local_map, job, options, {}, inputs.regions)
    notes.append(
        f"tiles read (headers): {len(catalog.tests)} test, {len(catalog.references)} "
        f"reference, {len(catalog.landcover)} land-cover"
    )
    if inputs.regions:
        notes.append(f"regions: {len(inputs.regions)} read from {job.shown(job.region_file)}")
    if inputs.checkpoints is not None:
        data = inputs.checkpoints
        notes.append(
            f"checkpoints: {len(data.points)} points, {len(data.rejected)} rows rejected, "
            f"from {job.shown(job.checkpoint_file)}"
        )
    problems = [f"test tile {f.tile_id}: {f.reason}" for f in catalog.test_failures]
    problems += [f"{r['tile']}: {r['reason']}" for r in catalog.reference_failures]
    if job.spec.reference is not None:
        problems += [
            f"test tile {t.tile_id}: no reference tile overlaps it"
            for t in catalog.tests
            if not catalog.candidates[t.tile_id]
        ]
    if pixels:
        problems += _pixel_problems(job, catalog.tests)
    return notes, problems


def _pixel_problems(job: ResolvedJob, tests: Sequence[TileInfo]) -> list[str]:
    """Why a run would refuse test tiles once their pixels are read (void codes without a
    nodata tag, heights no terrain has, unreadable data), one line per tile."""
    source = job.spec.test

    def refused(tile: TileInfo) -> str | None:
        try:
            read_tile(tile, nodata=source.nodata, units=source.units)
        except AuditError as exc:
            return str(exc)
        return None

    with ThreadPoolExecutor(max_workers=2) as pool:
        return [p for p in pool.map(refused, tests) if p is not None]


def _local_map(function: Callable[..., Any], *arguments: Sequence[Any]) -> list[Any]:
    """A Mapper on local threads for the header scan of validate_job (hashing skipped)."""
    if function in (scan_tile, scan_landcover_tile):
        function = partial(_header_only, function)
    with ThreadPoolExecutor(max_workers=4) as pool:
        return list(pool.map(function, *arguments))


def _header_only(
    scan: Callable[..., TileInfo | ScanFailure],
    path: str,
    known: Known | None = None,
    roots: Roots = None,
) -> TileInfo | ScanFailure:
    """A tile scan without hashing the content (the fingerprint is left empty)."""
    try:
        stat = Path(path).stat()
    except OSError:
        return scan(path, None, roots)  # reports the unreadable file
    return scan(path, (stat.st_size, stat.st_mtime_ns, ""), roots)


def _run_into(
    out_dir: Path,
    job: ResolvedJob,
    inputs: Inputs,
    prior: Baseline | None,
    *,
    client: Client,
    grid_dirs: Sequence[str],
    progress: Progress | None,
    should_stop: Callable[[], bool] | None,
    run_id: str,
    retries: int,
    started: str,
) -> dict[str, Any]:
    """run_job's work, writing into the (staged) folder out_dir."""
    clock = Phases()
    options = TileOptions.from_spec(job.spec, grid_dirs=grid_dirs)
    catalog = _catalog(
        _dask_map(client),
        job,
        options,
        prior.catalog if prior else {},
        inputs.regions,
        headers_checked=prior.catalog_headers_checked if prior else False,
    )
    sources = catalog.source_fingerprints()
    region_ids = [r.region_id for r in catalog.regions]
    layout = overview_layout(catalog.tests, factor=job.spec.options.overview_factor)
    region_fingerprint = _region_fingerprint(job)
    reuse = _reuse_of(prior, job, catalog, sources, options, region_ids, layout, region_fingerprint)
    prior, change, baseline_note = reuse.baseline, reuse.change, reuse.note
    coregistration: dict[str, Any] | None = None
    tile_shifts: dict[str, dict[str, Any]] = {}
    if options.coregistration is not None:
        correction, coregistration, tile_shifts = estimate_job_correction(
            client,
            catalog.tests,
            references=catalog.candidates,
            landcover=catalog.landcover_of,
            regions=catalog.regions_by_crs,
            options=options,
            known=known_shifts(prior, change) if prior is not None and change else {},
            covered=catalog.covered_of,
        )
        options = replace(options, correction=correction)
    clock.mark("catalog_and_coregistration")

    store = ResultsStore(out_dir, layout)
    summaries = TileSummaryStore(store.path, mode="a")
    acc, after = reuse.totals or (
        JobAccumulator(region_ids=region_ids),
        JobAccumulator(region_ids=region_ids),
    )
    records: dict[str, dict[str, Any]] = {}
    for failure in catalog.test_failures:
        records[failure.tile_id] = _tile_record(failure.tile_id, FAILED, failure.reason, None, None)
    raster = job.spec.reference is not None
    if not raster:
        for tile in catalog.tests:
            records[tile.tile_id] = _tile_record(
                tile.tile_id, "not_audited", "no reference tiles: checkpoints only", tile, None
            )
    by_id = {t.tile_id: t for t in catalog.tests}
    to_compute = catalog.tests if raster else []
    if change is not None and prior is not None:
        to_compute = [by_id[t] for t in sorted(change.recompute)] if raster else []
        if change.reuse:
            _carry_over(prior, change, store, summaries)
            records |= {t: prior.tiles[t] for t in change.reuse}
            clock.mark("carry_over")
    futures = [
        client.submit(
            audit_and_store,
            tile,
            catalog.candidates[tile.tile_id],
            region_ops.clip_to(catalog.regions_by_crs.get(tile.grid.crs, []), tile.bounds),
            options,
            catalog.landcover_of(tile),
            tile_shifts.get(tile.tile_id),
            covered=catalog.covered_of(tile),
            summaries_to=None if summaries is None else str(summaries.zarr_path),
            pure=False,
            retries=retries,
            key=f"audit-tile-{tile.tile_id}-{run_id}",
        )
        for tile in to_compute
    ]
    total = len(catalog.tests) + len(catalog.test_failures)
    done = total - len(futures)
    em = job.spec.error_model
    errors = [ErrorModelAccumulator(max_points=em.max_samples if em else 0) for _ in range(2)]
    for future in as_completed(futures):
        if should_stop is not None and should_stop():
            client.cancel(futures)
            raise JobDismissedError(f"job {job.spec.name} was dismissed after {done} tiles")
        result = _with_status(_result_of(future))
        future.release()
        _fold(result, acc, after, store, summaries)
        errors[0].add(result.error_sample)
        errors[1].add(result.corrected.error_sample if result.corrected else None)
        records[result.tile_id] = _tile_record(
            result.tile_id,
            result.status,
            result.reason,
            by_id[result.tile_id],
            statistics(result.summary),
            result,
        ) | {"sources": catalog.sources_of(by_id[result.tile_id])}
        done += 1
        if progress:
            progress(done, total)
    clock.mark("tiles")
    write_job_totals(store.path, ALL_PART, acc)
    if not after.is_empty:
        write_job_totals(store.path, AFTER_PART, after)
    clock.mark("job_totals")

    tile_rows = [records[k] for k in sorted(records)]
    names = {r.region_id: r.name for r in catalog.regions}
    outliers = job.spec.outliers
    rule: dict[str, Any] = {"outlier_rule": outliers.rule, "outlier_factor": outliers.factor}
    region_docs = region_entries({r: acc.regions[r] for r in region_ids}, names, acc.strata, **rule)
    if coregistration is not None and not after.is_empty:
        coregistration["after"] = {
            "overall": area_entry(after.overall, after.strata_of(ALL), **rule),
            "regions": region_entries(
                {r: after.regions[r] for r in region_ids}, names, after.strata, **rule
            ),
        }
    overall = area_entry(acc.overall, acc.strata_of(ALL), **rule)
    clock.mark("statistics")
    fitted = _error_model(job, options, errors, overall, region_docs, coregistration)
    error_model = None
    if fitted is not None:
        error_model, overall, region_docs = fitted
    clock.mark("error_model")
    _write_tables(store, tile_rows, overall, region_docs, coregistration)
    clock.mark("tables")
    document = build_summary(
        job={
            "name": job.spec.name,
            "spec": job.spec.model_dump(mode="json"),
            "started": started,
            "finished": _now(),
            "software": SOFTWARE,
            "region_fingerprint": region_fingerprint,
            "tiles": {
                "test": len(job.test_tiles),
                "reference": len(job.reference_tiles),
                "failed": sum(r["status"] == FAILED for r in tile_rows),
            },
        },
        overall=overall | {"excluded_pixels": acc.excluded},
        regions=region_docs,
        tiles=tile_rows,
        reference_failures=catalog.reference_failures,
        extra_cautions=_coverage_cautions(tile_rows)
        + region_ops.region_cautions(catalog.regions)
        + overlap_cautions(catalog.overlaps)
        + ([] if layout else ["no dh overview: the test tiles are not on one grid"]),
        coregistration=coregistration,
    )
    if error_model is not None:
        document["error_model"] = error_model
    vertical = vertical_transformations(job.spec, grid_dirs=options.grid_dirs)
    document["sources"] = {**sources, "vertical_transformations": vertical}
    document["cautions"] += vertical_accuracy_cautions(vertical, job.spec.grading)
    if baseline_note:
        document["cautions"].append(baseline_note)
    write_summary(out_dir, catalog.document(), name=CATALOG_NAME)
    if job.spec.checkpoints is not None:
        document["checkpoints"] = _checkpoint_section(
            client, job, catalog, options, out_dir, prior, change, inputs.checkpoints
        )
        document["cautions"] += document["checkpoints"].get("cautions", [])
    clock.mark("checkpoints")
    if raster:
        document["grading_indicative"] = _indicative_grading(acc, job)
    if prior is not None and change is not None:
        limits = Thresholds(**job.spec.recheck.model_dump())
        document["recheck"] = change_report(prior, change, document, limits)
        write_summary(out_dir, document["recheck"], name=CHANGE_REPORT_NAME)
    clock.mark("change_report")
    try:  # after the change report: the re-check figures draw it
        map_regions = catalog.regions_by_crs.get(layout.crs, []) if layout else []
        document["figures"] = write_figures(
            out_dir,
            document,
            overall=acc.overall,
            strata=acc.strata_of(ALL),
            regions=[(r.region_id, r.name, r.geometry) for r in map_regions],
            crs=layout.crs if layout else None,
        )
        write_report(out_dir, document)
    except (OSError, ValueError, KeyError) as exc:  # a figure never costs the results
        document["figures"] = {}
        document["cautions"].append(f"figures or report.html could not be drawn: {exc}")
    clock.mark("figures_and_report")
    document["job"]["timings_s"] = clock.seconds
    write_summary(out_dir, document)
    return document


def _error_model(
    job: ResolvedJob,
    options: TileOptions,
    errors: list[ErrorModelAccumulator],
    overall: dict[str, Any],
    regions: list[dict[str, Any]],
    coregistration: dict[str, Any] | None,
) -> tuple[dict[str, Any], dict[str, Any], list[dict[str, Any]]] | None:
    """The error model (workers/uncertainty/error_model.py) of dh, and of dh after co-registration
    (in
    coregistration.after), with the areas' uncertainties; None when the spec asks for none."""
    em = job.spec.error_model
    if em is None:
        return None
    layout: dict[str, Any] = {
        "max_distance_m": em.max_distance_m,
        "seed": em.seed,
        "with_landcover": job.spec.landcover is not None,
        "classes": options.landcover_classes,
        "slope_edges": options.slope_edges_deg,
    }
    after = (coregistration or {}).get("after")
    if after is not None and errors[1].tiles:
        section, after["overall"], after["regions"] = attach_error_model(
            errors[1], overall=after["overall"], regions=after["regions"], **layout
        )
        after["error_model"] = section
    return attach_error_model(errors[0], overall=overall, regions=regions, **layout)


class Phases:
    """Wall time of the phases of a run (seconds, in the order they ran), for summary.json."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self._last = time.perf_counter()

    def mark(self, phase: str) -> None:
        now = time.perf_counter()
        self.seconds[phase] = round(self.seconds.get(phase, 0.0) + now - self._last, 3)
        self._last = now


def _fold(
    result: TileResult,
    acc: JobAccumulator,
    after: JobAccumulator,
    store: ResultsStore,
    summaries: TileSummaryStore | None,
) -> None:
    """Merge one tile's result into the running totals and write its overview and (unless
    summaries is None) its tile summaries."""
    acc.add(result)
    if result.corrected is not None:
        after.add(result.corrected)
    store.write_overview(result.tile_id, result.overview)
    if result.status == OK and summaries is not None:
        by_worker = result.summaries_stored and summaries.has(result.tile_id)  # audit_and_store
        if not by_worker:
            summaries.write(result.tile_id, entries_of(result), excluded=result.excluded)


@dataclass(frozen=True)
class _Reuse:
    """What a run takes from its baseline: the change plan and the totals it continues, or a
    note saying why the baseline was not used (then every tile is recomputed)."""

    baseline: Baseline | None = None
    change: ChangePlan | None = None
    totals: tuple[JobAccumulator, JobAccumulator] | None = None  # all results, after co-reg.
    note: str = ""


def _reuse_of(
    prior: Baseline | None,
    job: ResolvedJob,
    catalog: _Catalog,
    sources: dict[str, str],
    options: TileOptions,
    region_ids: list[str],
    layout: OverviewLayout | None,
    region_fingerprint: str | None,
) -> _Reuse:
    """Decide how much of the baseline a run can use."""
    unused = "the baseline was not used: {}, so every tile was recomputed"
    if prior is None:
        return _Reuse()
    coreg = options.coregistration
    if coreg is not None and coreg.estimate_from == "job" and coreg.apply:
        why = "an applied job-wide co-registration changes every tile's corrected statistics"
        return _Reuse(note=unused.format(why))
    if not prior.has_job_totals:
        return _Reuse(note=unused.format("it holds no stored job totals (an earlier version)"))
    if not overview_carries(layout, prior.zarr):
        return _Reuse(note=unused.format("the dh overview's grid changed with the tiling"))
    change = make_plan(
        prior,
        job.spec.model_dump(mode="json"),
        catalog.tests,
        sources,
        {t.tile_id: catalog.sources_of(t) for t in catalog.tests},
        region_fingerprint=region_fingerprint,
    )
    if job.spec.error_model is not None and change.reuse:  # fitted on every tile's samples
        redo = dict.fromkeys(change.reuse, "the error model samples every tile")
        change = replace(change, recompute=change.recompute | redo, reuse=())
    if not change.reuse:
        return _Reuse(prior, change)
    try:
        totals = resumed_totals(prior, change, region_ids)
    except Exception as exc:  # noqa: BLE001 - a damaged baseline costs time, never the job
        reason = f"its stored summaries could not be read ({type(exc).__name__}: {exc})"
        return _Reuse(note=unused.format(reason))
    return _Reuse(prior, change, totals)


def _region_fingerprint(job: ResolvedJob) -> str | None:
    """SHA-256 of the region file (None without regions): editing it changes every region."""
    if job.region_file is None:
        return None
    return file_fingerprint(job.region_file, roots=job.data_roots)


def _carry_over(
    prior: Baseline, change: ChangePlan, store: ResultsStore, summaries: TileSummaryStore
) -> None:
    """Bring the kept tiles' stored summaries and overview blocks over from the baseline
    (linked, not read)."""
    summaries.link_from(prior.zarr, [t for t in change.reuse if prior.tiles[t]["status"] == OK])
    keep = {t: prior.tiles[t]["bounds"] for t in change.reuse if prior.tiles[t].get("bounds")}
    gone = [*change.recompute, *change.removed]
    blank = [prior.tiles[t]["bounds"] for t in gone if prior.tiles.get(t, {}).get("bounds")]
    store.carry_overview(prior.zarr, keep, blank)


def _checkpoint_section(
    client: Client,
    job: ResolvedJob,
    catalog: _Catalog,
    options: TileOptions,
    out_dir: Path,
    prior: Baseline | None,
    change: ChangePlan | None,
    data: CheckpointFile | None = None,
) -> dict[str, Any]:
    """The checkpoint audit; in a re-check, points away from the changed tiles keep the test
    heights the baseline sampled."""
    earlier: dict[str, float] = {}
    changed_areas: list[list[float]] = []
    if prior is not None and change is not None:
        by_id = {t.tile_id: t for t in catalog.tests}
        earlier = earlier_heights(prior.folder, prior.document, job)
        changed_areas = [list(by_id[t].bounds) for t in change.recompute if t in by_id]
        changed_areas += [
            prior.tiles[t]["bounds"] for t in change.removed if prior.tiles[t].get("bounds")
        ]
    return audit_checkpoints(
        client,
        job,
        catalog.tests,
        regions=catalog.regions_by_crs,
        options=options,
        out_dir=out_dir,
        earlier=earlier,
        changed_areas=changed_areas,
        data=data,
    )


def _indicative_grading(acc: JobAccumulator, job: ResolvedJob) -> list[dict[str, Any]]:
    """Grades from raster-vs-raster pixels (non-vegetated RMSE, vegetated |dh| 95th percentile):
    indicative only. Without land cover every pixel counts as non-vegetated."""
    strata = acc.strata_of(ALL)
    nv = strata.get("cover_group:non_vegetated", acc.overall)
    veg = strata.get("cover_group:vegetated")
    nv_stats = statistics(nv)
    veg_stats = statistics(veg) if veg is not None else {"q95_abs": None, "count": 0}
    measured = Measured(
        nv_stats["rmse"],
        veg_stats["q95_abs"],
        int(nv_stats["count"] or 0),  # type: ignore[arg-type]
        int(veg_stats["count"] or 0),
        indicative=True,
        rmse_z_vegetated=veg_stats.get("rmse"),
    )
    return grade(measured, job)


@dataclass(frozen=True)
class _Catalog:
    """What the job knows before dispatch: readable tiles, candidates, regions."""

    tests: list[TileInfo]
    test_failures: list[ScanFailure]
    reference_failures: list[dict[str, str]]
    candidates: dict[str, list[TileInfo]]
    cover_index: TileIndex
    regions: list[Region]
    regions_by_crs: dict[str, list[Region]]

    references: tuple[TileInfo, ...] = ()
    landcover: tuple[TileInfo, ...] = ()
    overlaps: dict[str, Overlap] = field(default_factory=dict)  # see catalog.tile_overlaps

    def covered_of(self, tile: TileInfo) -> tuple[Footprint, ...]:
        """Footprints of earlier-listed test tiles overlapping this one (their pixels count)."""
        found = self.overlaps.get(tile.tile_id)
        return found.covered if found else ()

    def landcover_of(self, tile: TileInfo) -> list[TileInfo]:
        return self.cover_index.overlapping(tile.grid)

    def sources_of(self, tile: TileInfo) -> list[str]:
        """Ids (prefixed by kind) of the reference and land-cover tiles a test tile overlaps."""
        return [f"reference:{t.tile_id}" for t in self.candidates.get(tile.tile_id, [])] + [
            f"landcover:{t.tile_id}" for t in self.landcover_of(tile)
        ] + overlap_sources_of(self.overlaps, tile.tile_id)

    def document(self) -> dict[str, Any]:
        """catalog.json: every tile scanned, so a re-check need not open unchanged files."""
        return catalog_document([*self.tests, *self.references, *self.landcover])

    def source_fingerprints(self) -> dict[str, str]:
        """Fingerprints of every reference and land-cover tile, ids prefixed by kind."""
        return {f"reference:{t.tile_id}": t.fingerprint for t in self.references} | {
            f"landcover:{t.tile_id}": t.fingerprint for t in self.landcover
        } | overlap_sources(self.overlaps)


#: map(function, *argument lists) -> results in order: on the cluster, or in local threads.
Mapper = Callable[..., list[Any]]


def _dask_map(client: Client) -> Mapper:
    def mapped(function: Callable[..., Any], *arguments: Sequence[Any]) -> list[Any]:
        return list(client.gather(client.map(function, *arguments, pure=False)))

    return mapped


def _catalog(
    mapper: Mapper,
    job: ResolvedJob,
    options: TileOptions,
    known: Mapping[str, TileInfo],
    region_list: list[Region],
    *,
    headers_checked: bool = False,
) -> _Catalog:
    """Scan every tile (with mapper), index the reference, check overlap, geoid and regions.

    known: an earlier scan; with headers_checked its unchanged tiles are not opened again."""
    reuse = known if headers_checked else {}
    roots = job.data_roots
    test_tiles, test_failures = _scan(mapper, job.test_tiles, known, reuse, roots=roots)
    ref_tiles, ref_failures = _scan(mapper, job.reference_tiles, known, reuse, roots=roots)
    cover_tiles, cover_failures = _scan(
        mapper, job.landcover_tiles, known, reuse, scan=scan_landcover_tile, roots=roots
    )
    if not test_tiles:
        raise TileReadError("no test tile could be read: " + _reasons(test_failures))
    if job.reference_tiles and not ref_tiles:
        raise TileReadError("no reference tile could be read: " + _reasons(ref_failures))
    _check_geoid(options, test_tiles[0])
    index = TileIndex(ref_tiles)
    candidates = {t.tile_id: index.overlapping(t.grid) for t in test_tiles}
    if job.reference_tiles and not any(candidates.values()):
        raise EmptyOverlapError("the test and reference tiles do not overlap anywhere")
    return _Catalog(
        tests=test_tiles,
        test_failures=test_failures,
        reference_failures=[
            {"tile": f.tile_id, "reason": f.reason} for f in [*ref_failures, *cover_failures]
        ],
        candidates=candidates,
        cover_index=TileIndex(cover_tiles),
        regions=region_list,
        regions_by_crs=_regions_by_crs(region_list, test_tiles),
        references=tuple(ref_tiles),
        landcover=tuple(cover_tiles),
        overlaps=tile_overlaps(test_tiles),
    )


def _with_status(result: TileResult) -> TileResult:
    """A tile that was read but holds no pixel with both heights gets a status of its own (its
    empty summaries are not merged)."""
    if result.status == OK and result.summary.count == 0 and result.excluded == 0:
        reason = "no pixel holds both a test and a reference height (voids or nodata throughout)"
        return replace(result, status=NO_VALID_PIXELS, reason=reason)
    return result


#: Tile statuses of a raster job that leave tiles out of the statistics without failing.
UNAUDITED = {
    NO_REFERENCE: "no reference tile overlaps them",
    NO_VALID_PIXELS: "no pixel holds both a test and a reference height (voids or nodata)",
}


def _coverage_cautions(tiles: Sequence[Mapping[str, Any]]) -> list[str]:
    """A caution per kind of test tile left out of the statistics without failing."""
    cautions = []
    for status, why in UNAUDITED.items():
        ids = [t["tile"] for t in tiles if t["status"] == status]
        if ids:
            shown = ", ".join(ids[:5]) + (", ..." if len(ids) > 5 else "")
            cautions.append(
                f"{len(ids)} of {len(tiles)} test tiles are not in the statistics: {why} "
                f"(status {status}: {shown})"
            )
    return cautions


def _result_of(future: Future) -> TileResult:
    """The tile's result; a lost worker or a crash outside audit_tile marks the tile failed."""
    try:
        result: TileResult = future.result()
    except Exception as exc:  # noqa: BLE001 - report, never lose the job
        tile_id = str(future.key).removeprefix("audit-tile-").rsplit("-", 1)[0]
        return TileResult(
            tile_id, FAILED, f"task failed on the cluster: {type(exc).__name__}: {exc}"
        )
    return result


def _scan(
    mapper: Mapper,
    paths: Sequence[Path],
    known: Mapping[str, TileInfo],
    reuse: Mapping[str, TileInfo],
    scan: Callable[..., TileInfo | ScanFailure] = scan_tile,
    roots: Roots = None,
) -> tuple[list[TileInfo], list[ScanFailure]]:
    """Scan tiles on the cluster; a tile in ``reuse`` with the same size and modification time
    is taken from it without opening the file; one in ``known`` (an earlier scan) with the same
    size and modification time is opened for its header but not hashed again. Every tile's
    reads are confined to roots (workers/inputs/confine.py)."""
    reused = {
        str(p): replace(reuse[str(p)], roots=roots)
        for p in paths
        if str(p) in reuse and unchanged(reuse[str(p)], p)
    }
    names = [str(p) for p in paths if str(p) not in reused]
    hints: list[Known | None] = [
        (known[n].size_bytes, known[n].mtime_ns, known[n].fingerprint) if n in known else None
        for n in names
    ]
    scanned = mapper(scan, names, hints, [roots] * len(names)) if names else []
    by_path = reused | {s.path: s for s in scanned}
    ordered = unique_tile_ids([by_path[str(p)] for p in paths])  # re-deliveries of one name
    ok = [s for s in ordered if isinstance(s, TileInfo)]
    failed = [s for s in ordered if isinstance(s, ScanFailure)]
    return ok, failed


def _reasons(failures: Sequence[ScanFailure]) -> str:
    return "; ".join(f.reason for f in failures[:5]) + (" ..." if len(failures) > 5 else "")


def _check_geoid(options: TileOptions, sample: TileInfo) -> None:
    """Fail the job before dispatch when a needed geoid grid is missing (GeoidGridError)."""
    x, y = sample.grid.pixel_centres(np.array([0.0]), np.array([0.0]))
    lon, lat = Transformer.from_crs(
        CRS.from_wkt(sample.grid.crs), "EPSG:4326", always_xy=True
    ).transform(x, y)
    for vertical in {options.test_vertical_crs, options.reference_vertical_crs} - {ELLIPSOIDAL}:
        geoid_undulation(lon, lat, vertical_crs=vertical, grid_dirs=options.grid_dirs)


def _load_regions(job: ResolvedJob) -> list[Region]:
    if job.region_file is None or job.spec.region is None:
        return []
    return region_ops.read_regions(
        job.region_file, id_property=job.spec.region.id_property, roots=job.data_roots
    )


def _regions_by_crs(
    regions: Sequence[Region], tiles: Sequence[TileInfo]
) -> dict[str, list[Region]]:
    """The regions reprojected into each test CRS; EmptyOverlapError when none touches a tile."""
    if not regions:
        return {}
    by_crs = {crs: region_ops.to_crs(regions, crs) for crs in {t.grid.crs for t in tiles}}
    if not any(region_ops.clip_to(by_crs[t.grid.crs], t.bounds) for t in tiles):
        raise EmptyOverlapError(
            f"region.file: none of the {len(regions)} regions overlaps the test tiles "
            "(check the file's CRS and extent)"
        )
    return by_crs


def _tile_record(
    tile_id: str,
    status: str,
    reason: str | None,
    tile: TileInfo | None,
    stats: dict[str, Any] | None,
    result: TileResult | None = None,
) -> dict[str, Any]:
    record: dict[str, Any] = {"tile": tile_id, "status": status}
    if reason:
        record["reason"] = reason
    if tile is not None:
        record["bounds"] = list(tile.bounds)
        record["fingerprint"] = tile.fingerprint
    record["stats"] = stats or statistics(dh_summary.empty())
    if result is not None and result.coregistration is not None:
        record["coregistration"] = result.coregistration
    if result is not None and result.corrected is not None:
        record["stats_after_coregistration"] = statistics(result.corrected.summary)
    return record


def _write_tables(
    store: ResultsStore,
    tiles: list[dict[str, Any]],
    overall: dict[str, Any],
    regions: list[dict[str, Any]],
    coregistration: dict[str, Any] | None = None,
) -> None:
    nan4 = [np.nan] * 4
    bounds = np.array([t.get("bounds", nan4) for t in tiles], dtype=np.float64).reshape(-1, 4)
    tile_table = statistics_table(
        "tile",
        [t["tile"] for t in tiles],
        [t["stats"] for t in tiles],
        {
            "left": bounds[:, 0],
            "bottom": bounds[:, 1],
            "right": bounds[:, 2],
            "top": bounds[:, 3],
            "status": [t["status"] for t in tiles],
            "reason": [t.get("reason", "") for t in tiles],
        },
    )
    region_table = statistics_table(
        "region",
        [r["region"] for r in regions],
        [r["stats"] for r in regions],
        {"name": [r["name"] for r in regions]},
    )
    by_area = {ALL: overall["strata"]} | {r["region"]: r["strata"] for r in regions}
    areas = list(by_area)
    strata_keys = list(dict.fromkeys(e["stratum"] for a in areas for e in by_area[a]))
    stats = {(area, e["stratum"]): e["stats"] for area in areas for e in by_area[area]}
    tables = {
        "tiles": tile_table,
        "regions": region_table,
        "strata": strata_table(areas, strata_keys, stats),
    }
    if coregistration is not None:
        for key in TILE_SHIFT_KEYS:
            values = [t.get("coregistration", {}).get(key, np.nan) for t in tiles]
            tile_table[f"shift_{key}"] = ("tile", np.array(values, dtype=np.float64))
        after = coregistration.get("after", {}).get("regions", [])
        table = statistics_table(
            "region", [r["region"] for r in after], [r["stats"] for r in after], {}
        )
        table.attrs.update(
            {k: v for k, v in coregistration.items() if isinstance(v, int | float | str)}
        )
        tables["after_coregistration"] = table
    store.write_tables(tables)
    store.finish()


#: Per-tile co-registration values stored as ``shift_<key>`` variables of the tiles table.
TILE_SHIFT_KEYS = (
    "east_m",
    "north_m",
    "vertical_m",
    "east_se_m",
    "north_se_m",
    "tilt_east_m_per_km",
    "tilt_north_m_per_km",
)


def _now() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds")
