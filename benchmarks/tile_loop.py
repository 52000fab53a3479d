"""How much faster two processes do the tile work than one, without Dask (bench_throughput.py
--tile-loop N): the ceiling the machine itself sets on '2 workers / 1 worker'.

A process audits N tiles in a loop (task.audit_tile: read, align, difference, summaries; no
results store, no cluster); then two processes do it at the same time, each on N other tiles.
Gain = 2 x (seconds a tile alone) / (seconds a tile of the slower of the two). Below 2 when the
two cores slow each other down (shared caches, memory bandwidth, a host that gives the second
core less); the Dask job's own cost (client, scheduler, transfers) comes on top of that.
"""

from __future__ import annotations

import multiprocessing
import statistics
import time
from pathlib import Path
from typing import Any

#: The tile calls of one process: (test tile, its reference tiles, its regions, options).
Calls = list[tuple[Any, list[Any], list[Any], Any]]


def tile_calls(spec_path: Path, count: int) -> Calls:
    """The first ``count`` test tiles of a job, each with its reference tiles, its regions (in
    the tile's CRS, clipped to it) and the tile options: audit_tile's arguments."""
    from demaudit.workers import spec as job_spec
    from demaudit.workers.inputs import regions as region_ops
    from demaudit.workers.inputs.catalog import TileIndex, TileInfo, scan_tile
    from demaudit.workers.tile import task as tile_task

    job = job_spec.resolve(
        job_spec.parse_spec(job_spec.load_spec_file(spec_path)), base_dir=spec_path.parent
    )
    options = tile_task.TileOptions.from_spec(job.spec)
    index = TileIndex([t for t in map(scan_tile, job.reference_tiles) if isinstance(t, TileInfo)])
    regions: list[Any] = []
    if job.region_file is not None and job.spec.region is not None:
        regions = region_ops.read_regions(job.region_file, id_property=job.spec.region.id_property)
    calls: Calls = []
    for path in job.test_tiles[:count]:
        test = scan_tile(path)
        assert isinstance(test, TileInfo)
        mine = region_ops.clip_to(region_ops.to_crs(regions, test.grid.crs), test.bounds)
        calls.append((test, index.overlapping(test.grid), mine, options))
    return calls


def _loop(calls: Calls) -> tuple[float, float]:
    """Seconds and CPU seconds a tile, auditing calls in turn (after one tile to warm up)."""
    from demaudit.workers.tile.task import audit_tile

    audit_tile(*calls[0])
    wall, cpu = time.perf_counter(), time.process_time()
    for call in calls:
        audit_tile(*call)
    return (time.perf_counter() - wall) / len(calls), (time.process_time() - cpu) / len(calls)


def scaling_lines(spec_path: Path, per_process: int, rounds: int) -> list[str]:
    """One line per round: a tile's seconds alone and two at once, and the gain; then the
    median gain."""
    calls = tile_calls(spec_path, 2 * per_process)
    first, second = calls[:per_process], calls[per_process:]
    if len(second) < per_process:
        return [f"tile loop: needs {2 * per_process} test tiles, the job has {len(calls)}"]
    context = multiprocessing.get_context("spawn")
    lines = [
        f"tile work without Dask (audit_tile in a loop, {per_process} tiles a process; "
        "ms a tile, CPU ms in brackets):"
    ]
    gains = []
    for round_no in range(rounds):
        with context.Pool(1) as pool:
            (alone,) = pool.map(_loop, [first])
        with context.Pool(2) as pool:
            both = pool.map(_loop, [first, second])
        slower = max(seconds for seconds, _ in both)
        gains.append(2 * alone[0] / slower)
        at_once = " / ".join(f"{s * 1e3:.1f} ({c * 1e3:.1f})" for s, c in both)
        lines.append(
            f"  round {round_no + 1}: alone {alone[0] * 1e3:.1f} ({alone[1] * 1e3:.1f}), "
            f"two at once {at_once}: gain {gains[-1]:.2f}"
        )
    lines.append(f"  2 processes / 1 process, median of rounds: {statistics.median(gains):.2f}")
    return lines
