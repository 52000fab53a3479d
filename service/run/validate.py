"""Check a job without running it: everything a run checks before its first tile."""

from __future__ import annotations

import os
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from demaudit.service.run.recheck import load_baseline
from demaudit.service.run.scan import local_map, read_inputs, scan_catalog
from demaudit.workers.errors import AuditError, OutputError
from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.rasters import read_tile
from demaudit.workers.outputs.folder import check_output_folder
from demaudit.workers.spec import ResolvedJob
from demaudit.workers.tile.datum import DEFAULT_GRID_DIRS
from demaudit.workers.tile.task import TileOptions


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
    catalog = scan_catalog(local_map, job, options, {}, inputs.regions)
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
