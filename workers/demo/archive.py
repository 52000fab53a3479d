"""Make the invented demo archive of the Valdmark Survey Office scenario.

The archive pairs a test release (release 2026-11: WGS 84 / UTM 32N, ellipsoidal heights, with
injected errors) with a reference (lidar 2021: ETRS89-LAEA Europe, EGM96 orthometric heights, finer
pixels on another tiling), plus land cover, provinces, checkpoints, a truth file and a job spec.
The world itself is pure (options, waves, world, surface, release); the files are written by
tile_files (GeoTIFF tiles), survey_points (checkpoints CSV) and documents (GeoJSON, JSON, README,
YAML); grids holds the lidar tiling, the geoid and the projection lattice. This module plans the
archive, checks that it fits, and runs one task per tile, so memory does not grow with the size
of the archive; big archives run their tasks in worker processes (spawned, so a parent with
threads is safe).
"""

from __future__ import annotations

import multiprocessing
import os
import shutil
from collections.abc import Callable, Iterator
from concurrent.futures import Future, ProcessPoolExecutor, as_completed
from contextlib import contextmanager
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from demaudit.workers.demo.documents import (
    SPEC,
    write_provinces,
    write_readme,
    write_truth,
)
from demaudit.workers.demo.grids import Egm96Geoid, ReferenceGrid, reference_layout
from demaudit.workers.demo.options import DemoArchiveOptions, tilted_tiles
from demaudit.workers.demo.survey_points import write_checkpoints
from demaudit.workers.demo.tile_files import (
    LANDCOVER_DIR,
    REFERENCE_DIR,
    RELEASE_DIR,
    UPDATE_DIR,
    ReleaseSummary,
    reference_summary,
    write_reference_tile,
    write_release_tile,
)
from demaudit.workers.demo.world import DemoWorld, build_world

#: The entry points; make_demo_archive takes a workers.demo.options.DemoArchiveOptions.
__all__ = [
    "ArchiveSize",
    "archive_size",
    "clean_options",
    "make_demo_archive",
    "size_problem",
]

#: Below this many test pixels an archive is made in this process (starting workers costs more).
PARALLEL_FROM_PIXELS = 4_000_000


def clean_options(**overrides: Any) -> DemoArchiveOptions:
    """Options with no shift, no noise, no canopy/roofs, no blunders, no voids, no tilt.

    The vertical bias is kept unless overridden; any field may be overridden by keyword.
    """
    clean = DemoArchiveOptions(
        shift_east_m=0.0,
        shift_north_m=0.0,
        canopy=False,
        noise_sigma_m=0.0,
        blunder_fraction=0.0,
        void_patches=0,
        tilt_m_per_km=0.0,
    )
    return replace(clean, **overrides)


_DEFAULT_OPTIONS = DemoArchiveOptions()


#: Peak bytes per pixel of one tile task (float64 fields, the random draws, the float32 copy);
#: measured with tracemalloc on 1000 px tiles: 160-180 for a test tile, 140-170 for a lidar tile
#: (875 px, evaluated as a whole raster).
TASK_BYTES_PER_PIXEL = 200


@dataclass(frozen=True)
class ArchiveSize:
    """What an archive needs: uncompressed bytes of its tiles (an upper bound of the files,
    which are DEFLATE-compressed) and the peak memory of one tile task, both in bytes."""

    disk_bytes: int
    task_memory_bytes: int


def archive_size(options: DemoArchiveOptions) -> ArchiveSize:
    """Estimate the archive's size from the options alone (nothing is allocated): test tiles
    x pixels^2 x (4 bytes of heights + 1 of land cover), the update tiles and the lidar tiles
    at 4 bytes a pixel."""
    test_pixels = options.tiles_x * options.tiles_y * options.pixels**2
    update_pixels = len(tilted_tiles(options)) * options.pixels**2 if options.write_update else 0
    layout = reference_layout(options)
    lidar_pixels = len(layout.cols) * len(layout.rows) * layout.tile_pixels**2
    largest_tile = max(options.pixels, layout.tile_pixels) ** 2
    return ArchiveSize(
        disk_bytes=5 * test_pixels + 4 * update_pixels + 4 * lidar_pixels,
        task_memory_bytes=TASK_BYTES_PER_PIXEL * largest_tile,
    )


def size_problem(options: DemoArchiveOptions, out_dir: Path) -> str | None:
    """Why the archive cannot be made here (too big for the free disk space below out_dir or
    for the available memory), or None. Nothing is allocated or written."""
    size = archive_size(options)
    free_disk = shutil.disk_usage(_existing_parent(Path(out_dir))).free
    if size.disk_bytes > free_disk:
        return (
            f"the archive needs up to {_gib(size.disk_bytes)} (uncompressed tiles) but only "
            f"{_gib(free_disk)} are free on the disk of {out_dir}"
        )
    memory = _available_memory()
    if size.task_memory_bytes > memory:
        return (
            f"one tile of {options.pixels} x {options.pixels} pixels needs about "
            f"{_gib(size.task_memory_bytes)} of memory but only {_gib(memory)} are available"
        )
    return None


def _existing_parent(path: Path) -> Path:
    path = path.absolute()
    while not path.exists() and path != path.parent:
        path = path.parent
    return path


def _available_memory() -> int:
    import psutil  # a dependency of dask.distributed

    return int(psutil.virtual_memory().available)


def _gib(count: int) -> str:
    return f"{count / 2**30:,.1f} GiB"


ProgressCallback = Callable[[int, int], None]


def make_demo_archive(
    out_dir: Path,
    options: DemoArchiveOptions = _DEFAULT_OPTIONS,
    *,
    workers: int | None = None,
    progress: ProgressCallback | None = None,
) -> Path:
    """Write the archive; return the path of the demo job spec (demo.yaml) inside out_dir.

    GeoTIFFs left in the archive's tile folders by an earlier run are removed first. ``workers``
    is the number of processes making the tiles (None: this process alone below
    PARALLEL_FROM_PIXELS test pixels, else one per CPU, at most 8); the files do not depend on
    it. ``progress(done, total)`` is called after each tile task (a test tile with its land
    cover and update tile, or a lidar tile). Raises demaudit.workers.errors.GeoidGridError if the
    EGM96
    grid cannot be found.
    """
    out_dir = Path(out_dir)
    Egm96Geoid()  # no grid: fail before anything is written
    world = build_world(options)
    layout = reference_layout(options)
    for folder in (RELEASE_DIR, UPDATE_DIR, REFERENCE_DIR, LANDCOVER_DIR):
        for stale in (out_dir / folder).glob("*.tif"):
            stale.unlink()
        if folder != UPDATE_DIR or options.write_update:
            (out_dir / folder).mkdir(parents=True, exist_ok=True)
    tasks = [_TileTask(RELEASE_DIR, col, row) for col, row in world.grid.tiles()]
    tasks += [_TileTask(REFERENCE_DIR, col, row) for col, row in layout.tiles()]
    done = _run_tasks(
        out_dir, world, layout, tasks, workers=_worker_count(options, workers), progress=progress
    )
    release = ReleaseSummary()
    written = 0
    for task, outcome in zip(tasks, done, strict=True):
        if task.kind == REFERENCE_DIR:
            written += int(outcome["written"])
            continue
        release.blunders += outcome["blunders"]
        release.voids.extend(outcome["voids"])
        if outcome["update"]:
            release.update_tiles.append(outcome["update"])
    reference = reference_summary(world, layout, written=written)
    write_provinces(out_dir / "provinces.geojson", world)
    points = write_checkpoints(out_dir / "checkpoints.csv", world)
    write_truth(out_dir / "truth.json", world, release, reference, points)
    write_readme(out_dir / "README.md", options)
    spec = out_dir / "demo.yaml"
    spec.write_text(SPEC)
    return spec


@dataclass(frozen=True)
class _TileTask:
    """One tile to make: kind is RELEASE_DIR (test tile, land cover, update) or REFERENCE_DIR."""

    kind: str
    col: int
    row: int


def _worker_count(options: DemoArchiveOptions, workers: int | None) -> int:
    if workers is not None:
        return max(1, workers)
    if options.tiles_x * options.tiles_y * options.pixels**2 < PARALLEL_FROM_PIXELS:
        return 1
    fit = _available_memory() // max(1, archive_size(options).task_memory_bytes)
    return max(1, min(8, len(os.sched_getaffinity(0)), fit))


def _run_tasks(
    out_dir: Path,
    world: DemoWorld,
    layout: ReferenceGrid,
    tasks: list[_TileTask],
    *,
    workers: int,
    progress: ProgressCallback | None,
) -> list[dict[str, Any]]:
    """Every task's outcome, in the order of the tasks; in this process or in ``workers``."""
    report = progress or (lambda done, total: None)
    total = len(tasks)
    report(0, total)
    if workers == 1 or total == 1:
        outcomes = []
        for number, task in enumerate(tasks, start=1):
            outcomes.append(_make_tile(out_dir, world, layout, task))
            report(number, total)
        return outcomes
    spawn = multiprocessing.get_context("spawn")  # safe when the caller runs threads
    with (
        _worker_environment(),
        ProcessPoolExecutor(max_workers=min(workers, total), mp_context=spawn) as pool,
    ):
        futures: list[Future[dict[str, Any]]] = [
            pool.submit(_make_tile, out_dir, world, layout, task) for task in tasks
        ]
        for number, future in enumerate(as_completed(futures), start=1):
            future.result()  # a failed tile stops the archive here
            report(number, total)
        return [future.result() for future in futures]


#: Set for the worker processes (unless already set): one BLAS thread each (they run one per
#: core already; the small products of Waves are faster on one thread), and glibc malloc keeps
#: freed tile-sized arrays (< 32 MiB) in its heap instead of returning them to the system, so a
#: task does not fault in fresh zeroed pages for every temporary (system time -85 %, measured).
_WORKER_VARIABLES = {
    "OPENBLAS_NUM_THREADS": "1",
    "OMP_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
    "MALLOC_MMAP_THRESHOLD_": str(32 * 2**20),
    "MALLOC_TRIM_THRESHOLD_": str(512 * 2**20),
}


@contextmanager
def _worker_environment() -> Iterator[None]:
    """Workers started inside get _WORKER_VARIABLES; variables already set are kept."""
    added = [name for name in _WORKER_VARIABLES if name not in os.environ]
    for name in added:
        os.environ[name] = _WORKER_VARIABLES[name]
    try:
        yield
    finally:
        for name in added:
            os.environ.pop(name, None)


def _make_tile(
    out_dir: Path, world: DemoWorld, layout: ReferenceGrid, task: _TileTask
) -> dict[str, Any]:
    """Make and write one tile task (runs in a worker process for big archives)."""
    if task.kind == RELEASE_DIR:
        return write_release_tile(out_dir, world, task.col, task.row)
    return {"written": write_reference_tile(out_dir, world, layout, task.col, task.row)}
