"""Run one audit job on a Dask cluster, as a short sequence of named phases:

1. scan        every tile's header on the cluster, checks before the first tile (scan.py)
2. plan reuse  in a re-check, which tiles the baseline still answers for (reuse.py)
3. estimate    the job-wide co-registration, when the spec asks for it (coregistration.py)
4. run tiles   a few test tiles per task, folded into the job totals as they finish (tiles.py)
5. statistics  the areas' statistics, the error model, the results tables
6. document    checkpoints, grades and the re-check report: the parts of summary.json
7. write       figures, report.html and summary.json, assembled once from the parts

The client process holds the catalog (small), the running merge of summaries and one finished tile
result at a time; pixels stay on the workers.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from distributed import Client

from demaudit.service.run.checkpoints import audit_checkpoints
from demaudit.service.run.clock import Phases, now
from demaudit.service.run.coregistration import CorrectionEstimate, estimate_job_correction
from demaudit.service.run.recheck import Baseline, change_report, load_baseline
from demaudit.service.run.reuse import Reuse, carry_over, plan_reuse
from demaudit.service.run.scan import Inputs, Scan, dask_map, read_inputs, scan_job
from demaudit.service.run.tables import write_tables
from demaudit.service.run.tile_limit import DEFAULT_TILE_TIMEOUT_S
from demaudit.service.run.tiles import (
    Dispatch,
    Outputs,
    Progress,
    TilePhase,
    by_tile,
    run_tiles,
    starting_totals,
    to_audit,
    unaudited_records,
)
from demaudit.workers.checkpoints.section import indicative_grading
from demaudit.workers.outputs.derivatives import JobDerivatives
from demaudit.workers.outputs.figures.background import FigureDrawing, start_figures
from demaudit.workers.outputs.folder import staged_folder, write_summary
from demaudit.workers.outputs.job_document import Figures, JobParts, assemble, job_info
from demaudit.workers.outputs.layout import AFTER_PART, ALL_PART, CATALOG_NAME, CHANGE_REPORT_NAME
from demaudit.workers.outputs.report_html import write_report
from demaudit.workers.outputs.summary_document import vertical_accuracy_cautions
from demaudit.workers.outputs.summary_store import TileSummaryStore, write_job_totals
from demaudit.workers.outputs.tile_records import (
    TileRecord,
)
from demaudit.workers.outputs.writers import ResultsStore
from demaudit.workers.recheck.plan import Thresholds
from demaudit.workers.spec import ResolvedJob
from demaudit.workers.stats.job_statistics import (
    AreaRules,
    AreaStatistics,
    ErrorModelLayout,
    Totals,
    area_statistics,
    with_error_model,
)
from demaudit.workers.tile.datum import DEFAULT_GRID_DIRS, vertical_transformations
from demaudit.workers.tile.task import ALL, OK, TileOptions
from demaudit.workers.uncertainty.overview import write_standardised_overview
from demaudit.workers.uncertainty.sample_store import ErrorSampleStore, carry_samples

__all__ = ["SOFTWARE", "run_job"]

SOFTWARE = "demaudit 0.1.0"


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
    tile_timeout_s: float | None = DEFAULT_TILE_TIMEOUT_S,
    tiles_per_task: int | None = None,
) -> dict[str, Any]:
    """Audit job.spec on the cluster behind client; write results.zarr and summary.json into
    out_dir and return the summary document.

    progress(done, total) is called as tiles finish; when should_stop() turns true the remaining
    tile tasks are cancelled on the cluster and JobDismissedError is raised. Tile tasks (a few
    tiles each: tile_tasks.py) get the key ``audit-tile-<tile>|<tile>...-<run_id>`` (a job id
    makes them deterministic) and ``retries`` retries when a worker is lost. A tile that runs
    longer than ``tile_timeout_s`` seconds (None: no limit) is cancelled and recorded as failed
    (tile_limit.TileClock; a batch cut short runs again one tile per task). ``tiles_per_task``
    None: tile_tasks.tiles_per_task for the cluster.

    With ``baseline`` (the folder of an earlier run of the same spec), only new and changed tiles
    (or tiles whose reference or land cover changed) are recomputed; the run continues the
    baseline's stored job totals (see reuse.plan_reuse), and summary.json gets a ``recheck``
    change report (also written as change_report.json).

    Every input file that can be checked (regions, checkpoints, baseline, the output folder) is
    checked before the first tile runs. The new result is built in ``<out_dir>.partial-<run_id>``
    beside out_dir and swapped in only when complete (folder.staged_folder): a run that fails
    leaves out_dir as it was, and out_dir never mixes files of two runs. A baseline may be
    out_dir itself: it stays readable until the swap. ``inputs``: read_inputs(job) when the
    caller has already read them.
    """
    started = now()
    run_id = run_id or uuid.uuid4().hex[:12]
    inputs = inputs if inputs is not None else read_inputs(job)
    prior = load_baseline(baseline) if baseline is not None else None
    dispatch = Dispatch(run_id, retries, progress, should_stop, tile_timeout_s, tiles_per_task)
    options = TileOptions.from_spec(job.spec, grid_dirs=grid_dirs)
    with staged_folder(out_dir, run_id) as stage:
        run = _Run(client, job, stage, Phases())
        return run.phases(inputs, prior, options, dispatch, started)


@dataclass(frozen=True)
class _Run:
    """One run's fixed context: the cluster, the job, the (staged) output folder, the clock."""

    client: Client
    job: ResolvedJob
    out_dir: Path
    clock: Phases

    @property
    def raster(self) -> bool:
        """Whether the job has reference tiles (else checkpoints only)."""
        return self.job.spec.reference is not None

    def phases(
        self,
        inputs: Inputs,
        prior: Baseline | None,
        options: TileOptions,
        dispatch: Dispatch,
        started: str,
    ) -> dict[str, Any]:
        """The job's phases, in order, each handing a typed value to the next."""
        scan = scan_job(
            dask_map(self.client),
            self.job,
            options,
            inputs,
            known=prior.catalog(anchors=self.job.anchors) if prior else {},
            headers_checked=prior.catalog_headers_checked if prior else False,
        )
        if scan.layout is not None:  # tiles decimate by the mosaic's own factor
            options = options.with_overview_factor(scan.layout.factor)
            scan = replace(scan, options=options)  # re-checks compare stored samples' options
        reuse = plan_reuse(prior, self.job, scan)
        estimate = self.estimate_correction(scan, reuse)
        options = replace(options, correction=estimate.correction)
        self.clock.mark("catalog_and_coregistration")
        tiles = self.run_tiles(scan, reuse, estimate, options, dispatch)
        areas = self.statistics(scan, tiles, estimate)
        write_tables(tiles.outputs.store, tiles.records, areas)
        self.clock.mark("tables")
        drawing = self.start_figures(scan, tiles, areas, started)  # while checkpoints run
        try:
            parts = self.document_parts(inputs, scan, reuse, tiles, areas, options, started)
            return self.write_outputs(parts, drawing)
        except BaseException:
            drawing.abandon()  # before the staged folder is removed
            raise

    def estimate_correction(self, scan: Scan, reuse: Reuse) -> CorrectionEstimate:
        """The job-wide co-registration (none unless the spec asks for it)."""
        if scan.options.coregistration is None:
            return CorrectionEstimate()
        catalog = scan.catalog
        return estimate_job_correction(
            self.client,
            catalog.tests,
            catalog.tile_inputs(),
            options=scan.options,
            known=reuse.known_shifts(),
        )

    def run_tiles(
        self,
        scan: Scan,
        reuse: Reuse,
        estimate: CorrectionEstimate,
        options: TileOptions,
        dispatch: Dispatch,
    ) -> TilePhase:
        """Carry the kept tiles over, audit the others, store the job totals."""
        catalog = scan.catalog
        store = ResultsStore(self.out_dir, scan.layout)
        em = self.job.spec.error_model
        outputs = Outputs(
            store,
            TileSummaryStore(store.path, mode="a"),
            ErrorSampleStore(store.path, mode="a") if em else None,  # kept for re-checks
            options.error_model,
            JobDerivatives.start(
                options.derivatives,
                region_ids=scan.region_ids,
                store_path=store.path,
                layout=scan.layout,
            ),
        )
        totals = starting_totals(reuse.totals, scan.region_ids, em.max_samples if em else 0)
        records = unaudited_records(catalog, raster=self.raster)
        to_compute = to_audit(catalog, reuse, raster=self.raster)
        if reuse.active:
            order = {t.tile_id: i for i, t in enumerate(catalog.tests)}
            records |= self.carry_over(reuse, outputs, totals, order)
        records |= run_tiles(
            self.client,
            to_compute,
            catalog,
            estimate,
            options,
            totals=totals,
            outputs=outputs,
            dispatch=dispatch,
            job_name=self.job.spec.name,
        )
        self.clock.mark("tiles")
        write_job_totals(store.path, ALL_PART, totals.all)
        if not totals.after.is_empty:
            write_job_totals(store.path, AFTER_PART, totals.after)
        self.clock.mark("job_totals")
        return TilePhase(by_tile(records), totals, outputs)

    def carry_over(
        self, reuse: Reuse, outputs: Outputs, totals: Totals, order: dict[str, int]
    ) -> dict[str, TileRecord]:
        """Bring the kept tiles' results (and error samples) over from the baseline; ``order``:
        each test tile's place in the listing."""
        assert reuse.baseline is not None and reuse.change is not None
        if not reuse.change.reuse:
            return {}
        carry_over(reuse, outputs.store, outputs.summaries, order)
        kept = reuse.kept_records()
        if outputs.samples is not None:
            ok = [t for t, record in kept.items() if record.status == OK]
            errors = [totals.errors, totals.errors_after]
            carry_samples(outputs.samples, reuse.baseline.zarr, ok, errors)
        self.clock.mark("carry_over")
        return kept

    def statistics(
        self, scan: Scan, tiles: TilePhase, estimate: CorrectionEstimate
    ) -> AreaStatistics:
        """The areas' statistics, and the error model when the spec asks for one."""
        outliers = self.job.spec.outliers
        names = {r.region_id: r.name for r in scan.catalog.regions}
        rules = AreaRules(scan.region_ids, names, outliers.rule, outliers.factor)
        report = estimate.job.report if estimate.job is not None else None
        areas = area_statistics(tiles.totals, rules, coregistration=report)
        self.clock.mark("statistics")
        em = self.job.spec.error_model
        if em is not None:
            layout = ErrorModelLayout(
                max_distance_m=em.max_distance_m,
                seed=em.seed,
                with_landcover=self.job.spec.landcover is not None,
                classes=scan.options.landcover_classes,
                slope_edges=scan.options.slope_edges_deg,
            )
            areas = with_error_model(areas, tiles.totals, layout)
            samples = tiles.outputs.samples
            if areas.error_model is not None and samples is not None and scan.layout is not None:
                path = tiles.outputs.store.path
                write_standardised_overview(path, scan.layout.offsets, areas.error_model, samples)
        self.clock.mark("error_model")
        return areas

    def document_parts(
        self,
        inputs: Inputs,
        scan: Scan,
        reuse: Reuse,
        tiles: TilePhase,
        areas: AreaStatistics,
        options: TileOptions,
        started: str,
    ) -> JobParts:
        """Every part of summary.json but the figures; writes catalog.json, the checkpoint
        residuals and, in a re-check, change_report.json."""
        job, catalog = self.job, scan.catalog
        vertical = vertical_transformations(job.spec, grid_dirs=options.grid_dirs)
        write_summary(self.out_dir, catalog.document(anchors=job.anchors), name=CATALOG_NAME)
        checkpoints = None
        if job.spec.checkpoints is not None:
            earlier, changed_areas = reuse.earlier_checkpoints(job, catalog)
            checkpoints = audit_checkpoints(
                self.client,
                job,
                catalog.tests,
                regions=catalog.regions_by_crs,
                options=options,
                out_dir=self.out_dir,
                earlier=earlier,
                changed_areas=changed_areas,
                data=inputs.checkpoints,
            )
        self.clock.mark("checkpoints")
        derived, names = tiles.outputs.derivatives, {r.region_id: r.name for r in catalog.regions}
        derivatives = derived.section(names) if derived is not None else None
        self.clock.mark("derivatives")
        parts = JobParts(
            job=job_info(
                job,
                region_fingerprint=scan.region_fingerprint,
                started=started,
                finished=now(),
                software=SOFTWARE,
            ),
            areas=areas,
            excluded_pixels=tiles.totals.all.excluded,
            tiles=tiles.records,
            reference_failures=catalog.reference_failures,
            sources={**scan.sources, "vertical_transformations": vertical},
            early_cautions=scan.cautions(tiles.records),
            cautions=vertical_accuracy_cautions(vertical, job.spec.grading)
            + ([reuse.note] if reuse.note else []),
            checkpoints=checkpoints,
            derivatives=derivatives,
            grading_indicative=self.indicative_grading(tiles.totals),
        )
        parts = self.with_change_report(parts, reuse)
        self.clock.mark("change_report")
        return parts

    def indicative_grading(self, totals: Totals) -> list[dict[str, Any]] | None:
        """Grades from raster-vs-raster pixels (none in a checkpoint-only job)."""
        return indicative_grading(totals.all, self.job.spec.grading) if self.raster else None

    def with_change_report(self, parts: JobParts, reuse: Reuse) -> JobParts:
        """In a re-check, the parts with the change report (also written on its own)."""
        if reuse.baseline is None or reuse.change is None:
            return parts
        limits = Thresholds(**self.job.spec.recheck.model_dump())
        document, shown = assemble(parts), self.job.shown
        report = change_report(reuse.baseline, reuse.change, document, limits, shown=shown)
        write_summary(self.out_dir, report, name=CHANGE_REPORT_NAME)
        return replace(parts, recheck=report)

    def write_outputs(self, parts: JobParts, drawing: FigureDrawing) -> dict[str, Any]:
        """Finish the figures and write report.html, then summary.json, assembled once."""
        figures = self.figures(parts, drawing)
        self.clock.mark("figures_and_report")
        timed = replace(parts.job, timings_s=dict(self.clock.seconds))
        document = assemble(replace(parts, job=timed, figures=figures))
        write_summary(self.out_dir, document)
        return document

    def start_figures(
        self, scan: Scan, tiles: TilePhase, areas: AreaStatistics, started: str
    ) -> FigureDrawing:
        """Start drawing the figures that need only the statistics, on a background thread
        (workers/outputs/figures/background.py); figures() finishes them."""
        layout = scan.layout
        map_regions = scan.catalog.regions_by_crs.get(layout.crs, []) if layout else []
        info = job_info(
            self.job,
            region_fingerprint=scan.region_fingerprint,
            started=started,
            finished=now(),
            software=SOFTWARE,
        )
        early = JobParts(info, areas, tiles.totals.all.excluded, tiles.records, (), {})
        return start_figures(
            self.out_dir,
            assemble(early),
            overall=tiles.totals.all.overall,
            strata=tiles.totals.all.strata_of(ALL),
            regions=[(r.region_id, r.name, r.geometry) for r in map_regions],
            crs=layout.crs if layout else None,
        )

    def figures(self, parts: JobParts, drawing: FigureDrawing) -> Figures:
        """The figures (the re-check figures drawn from the final document) and report.html;
        a figure never costs the results."""
        try:
            files = drawing.finish(assemble(parts))
            write_report(self.out_dir, assemble(replace(parts, figures=Figures(files))))
        except (OSError, ValueError, KeyError) as exc:
            return Figures({}, f"figures or report.html could not be drawn: {exc}")
        return Figures(files)
