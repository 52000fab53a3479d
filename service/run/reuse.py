"""The reuse phase of a re-check: how much of the baseline a run can use (the change plan and
the job totals it continues), and the carry-over of the kept tiles' stored results."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace

from demaudit.service.run.checkpoints import earlier_heights
from demaudit.service.run.recheck import Baseline, make_plan, resumed_totals
from demaudit.service.run.scan import Catalog, Scan
from demaudit.workers.coregistration.shift import ShiftEstimate
from demaudit.workers.outputs.summary_store import TileSummaryStore
from demaudit.workers.outputs.tile_records import TileRecord
from demaudit.workers.outputs.writers import ResultsStore, overview_carries
from demaudit.workers.recheck.baseline import known_shifts
from demaudit.workers.recheck.plan import ChangePlan
from demaudit.workers.spec import ResolvedJob
from demaudit.workers.stats.merge import JobAccumulator
from demaudit.workers.tile.task import OK
from demaudit.workers.uncertainty.sample import ErrorModelOptions
from demaudit.workers.uncertainty.sample_store import not_reusable

_UNUSED = "the baseline was not used: {}, so every tile was recomputed"


@dataclass(frozen=True)
class Reuse:
    """What a run takes from its baseline: the change plan and the totals it continues, or a
    note saying why the baseline was not used (then every tile is recomputed)."""

    baseline: Baseline | None = None
    change: ChangePlan | None = None
    totals: tuple[JobAccumulator, JobAccumulator] | None = None  # all results, after co-reg.
    note: str = ""

    @property
    def active(self) -> bool:
        """Whether this run is a re-check against the baseline."""
        return self.baseline is not None and self.change is not None

    def known_shifts(self) -> dict[str, ShiftEstimate]:
        """The baseline's estimates of the tiles carried over (none when not a re-check)."""
        if self.baseline is None or not self.change:
            return {}
        return known_shifts(self.baseline.tiles, self.change)

    def earlier_checkpoints(
        self, job: ResolvedJob, catalog: Catalog
    ) -> tuple[dict[str, float], list[list[float]]]:
        """In a re-check, the test heights the baseline sampled at the checkpoints (by point id)
        and the footprints of the test tiles recomputed or gone since (points there are sampled
        again); nothing otherwise."""
        prior, change = self.baseline, self.change
        if prior is None or change is None:
            return {}, []
        by_id = catalog.by_id
        changed = [list(by_id[t].bounds) for t in change.recompute if t in by_id]
        changed += [list(b) for t in change.removed if (b := prior.tiles[t].bounds)]
        return earlier_heights(prior.folder, prior.document, job), changed

    def kept_records(self) -> dict[str, TileRecord]:
        """The baseline's records of the tiles carried over."""
        if self.baseline is None or self.change is None:
            return {}
        return {t: self.baseline.tiles[t] for t in self.change.reuse}


def plan_reuse(prior: Baseline | None, job: ResolvedJob, scan: Scan) -> Reuse:
    """Decide how much of the baseline a run can use."""
    if prior is None:
        return Reuse()
    refusal = _refusal(prior, scan)
    if refusal:
        return Reuse(note=_UNUSED.format(refusal))
    catalog = scan.catalog
    change = make_plan(
        prior,
        job.spec.model_dump(mode="json"),
        catalog.tests,
        scan.sources,
        {t.tile_id: catalog.sources_of(t) for t in catalog.tests},
        region_fingerprint=scan.region_fingerprint,
    )
    if scan.options.error_model is not None and change.reuse:  # kept tiles need stored samples
        change = _with_error_samples(prior, change, scan.options.error_model)
    if job.spec.derivatives is not None and change.reuse:  # merged from every tile's pass
        redo = dict.fromkeys(change.reuse, "derived parameters are compared on every tile")
        change = replace(change, recompute=change.recompute | redo, reuse=())
    if not change.reuse:
        return Reuse(prior, change)
    try:
        totals = resumed_totals(prior, change, scan.region_ids)
    except Exception as exc:  # noqa: BLE001 - a damaged baseline costs time, never the job
        reason = f"its stored summaries could not be read ({type(exc).__name__}: {exc})"
        return Reuse(note=_UNUSED.format(reason))
    return Reuse(prior, change, totals)


def _with_error_samples(
    prior: Baseline, change: ChangePlan, options: ErrorModelOptions
) -> ChangePlan:
    """The plan with the kept tiles whose error-model sample the baseline lacks recomputed
    (workers/uncertainty/sample_store.py: the others' samples are carried over)."""
    ok = [t for t in change.reuse if prior.tiles[t].status == OK]
    why = "its error-model sample is not stored in the baseline"
    redo = dict.fromkeys(not_reusable(prior.zarr, ok, options), why)
    kept = tuple(t for t in change.reuse if t not in redo)
    return replace(change, recompute=change.recompute | redo, reuse=kept)


def _refusal(prior: Baseline, scan: Scan) -> str:
    """Why the baseline cannot be used at all ('' when it can)."""
    coreg = scan.options.coregistration
    if coreg is not None and coreg.estimate_from == "job" and coreg.apply:
        return "an applied job-wide co-registration changes every tile's corrected statistics"
    if not prior.has_job_totals:
        return "it holds no stored job totals (an earlier version)"
    if not overview_carries(scan.layout, prior.zarr):
        return "the dh overview's grid changed with the tiling"
    return ""


def carry_over(
    reuse: Reuse, store: ResultsStore, summaries: TileSummaryStore, order: Mapping[str, int]
) -> None:
    """Bring the kept tiles' stored summaries and overview blocks over from the baseline
    (linked, not read); ``order``: each test tile's place in this run's listing (overlaps)."""
    prior, change = reuse.baseline, reuse.change
    assert prior is not None and change is not None
    tiles = prior.tiles
    summaries.link_from(prior.zarr, [t for t in change.reuse if tiles[t].status == OK])
    keep = {t: list(b) for t in change.reuse if (b := tiles[t].bounds)}
    gone = [*change.recompute, *change.removed]
    blank = {t: list(b) for t in gone if t in tiles and (b := tiles[t].bounds)}
    store.carry_overview(prior.zarr, keep, blank, order)
