"""Scaling benchmark: peak worker memory and throughput against archive size, and the cost of the
mergeable summaries against plain numpy.

Run from the repository root:

    .venv/bin/python benchmarks/bench_scaling.py [--sizes 16,64,256] [--pixels 1000]
                                                 [--cache /tmp/demaudit-bench] [--compare-tiles 8]

What one run does:

1. makes (or reuses from ``--cache``) a demo archive per size: 16, 64, 256 test tiles laid out
   4x4, 8x8, 16x16, each tile ``--pixels`` x ``--pixels``, seed 1, no update tiles. An archive in
   the cache is reused when its ``truth.json`` records exactly the wanted options. Generating takes
   about 1 CPU second per 1000 px tile (in worker processes), so timings are printed as it goes;
2. runs the real pipeline (``demaudit.service.run.runner.run_job``) on each archive on a FRESH
local Dask
   cluster (2 worker processes, 1 thread each, 6 GiB limit each), so each worker's peak resident
   memory belongs to that size alone; reports wall time and tiles/s. The peak is the worker's
   ``VmHWM`` (/proc/self/status, reset by exec). ``ru_maxrss`` is printed too but is NOT used:
   Linux carries the RSS of the process that forked the worker (here the client, which also
   generated the archives) over fork + exec into ``ru_maxrss``, so it measures the client;
3. prints the ratio of the peak worker memory of the largest size to that of the smallest and
   whether it stays within 15 % (the acceptance criterion of the "robust statistics at national
   scale" issue);
4. on a few tiles of the largest archive, computes dh in this process and times the mergeable
   summary (``summarise`` + ``statistics``) against numpy's median / quantiles / NMAD on the same
   valid pixels, the merge of the tiles' summaries, and the summary size;
5. prints a plain-text table with the machine facts.

This is a measurement, not a test: nothing here asserts on a time. Other processes may run on the
machine at the same time; the output says so.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import pickle
import platform
import shutil
import statistics as pystats
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import distributed
import numpy as np
from numpy.typing import NDArray

from demaudit.service.run.cluster import dask_client
from demaudit.service.run.runner import run_job
from demaudit.workers.demo.archive import make_demo_archive
from demaudit.workers.demo.options import DemoArchiveOptions
from demaudit.workers.inputs import regions as region_ops
from demaudit.workers.inputs.catalog import ScanFailure, TileInfo, scan_tile
from demaudit.workers.inputs.regions import Region
from demaudit.workers.inputs.tile_index import TileIndex
from demaudit.workers.spec import ResolvedJob, load_spec_file, parse_spec, resolve
from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.bins import LINEAR_LIMIT_M
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile.strata import excluded_mask
from demaudit.workers.tile.task import TileOptions, TileResult, audit_tile, tile_surfaces

WORKERS = 2
MEMORY_LIMIT = "6GiB"
FLATNESS_LIMIT = 1.15  # peak worker memory, largest / smallest size
SEED = 1
REPEATS = 5  # timing repeats per tile in the summary-vs-numpy comparison
SECONDS_PER_MEGAPIXEL_TILE = 1.1  # archive generation, CPU s per 1000 px tile (2026-12-02; was 8.5)
NMAD_FACTOR = dh_summary.NMAD_FACTOR


def say(message: str = "") -> None:
    """Print at once (the benchmark runs for long, often with output to a log file)."""
    print(message, flush=True)


# -- machine ------------------------------------------------------------------------------------


def machine_facts() -> dict[str, str]:
    """Cores, memory, library versions and the load when the benchmark started."""
    with open("/proc/meminfo") as fh:
        total_kib = int(fh.readline().split()[1])
    load = ", ".join(f"{v:.2f}" for v in os.getloadavg())
    return {
        "cores": f"{os.cpu_count()} (usable by this process: {len(os.sched_getaffinity(0))})",
        "memory": f"{total_kib / 2**20:.1f} GiB",
        "python": platform.python_version(),
        "numpy": np.__version__,
        "dask.distributed": distributed.__version__,
        "load average at start (1/5/15 min)": load,
    }


@dataclass(frozen=True)
class ProcessMemory:
    """Resident memory of one process, KiB: now, peak of its own (exec'd) image, ru_maxrss."""

    rss_kib: int
    hwm_kib: int
    ru_maxrss_kib: int


def process_memory() -> ProcessMemory:
    """Memory of the calling process (Linux). Run on each worker with client.run.

    VmHWM belongs to the process's own address space since its exec; ru_maxrss also keeps the
    peak of the address space it was forked from (see the module docstring).
    """
    import resource

    values: dict[str, int] = {}
    with open("/proc/self/status") as fh:
        for line in fh:
            key, _, rest = line.partition(":")
            if key in ("VmRSS", "VmHWM"):
                values[key] = int(rest.split()[0])
    ru_maxrss = int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
    return ProcessMemory(values.get("VmRSS", 0), values.get("VmHWM", 0), ru_maxrss)


def reset_client_peak() -> bool:
    """Reset this process's peak RSS (VmHWM) so it covers one run only; False if refused."""
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        return False
    return True


# -- archives -----------------------------------------------------------------------------------


def layout_of(size: int) -> int:
    """Tiles per side of a square archive of size tiles."""
    side = math.isqrt(size)
    if side * side != size:
        raise SystemExit(f"--sizes: {size} is not a square number of tiles (e.g. 16, 64, 256)")
    return side


def archive_options(size: int, pixels: int) -> DemoArchiveOptions:
    side = layout_of(size)
    return DemoArchiveOptions(
        tiles_x=side, tiles_y=side, pixels=pixels, seed=SEED, write_update=False
    )


def archive_dir(cache: Path, options: DemoArchiveOptions) -> Path:
    name = f"archive-{options.tiles_x}x{options.tiles_y}-{options.pixels}px-seed{options.seed}"
    return cache / name


def archive_matches(folder: Path, options: DemoArchiveOptions) -> bool:
    """True when folder holds a complete archive made with exactly these options."""
    truth_path, spec_path = folder / "truth.json", folder / "demo.yaml"
    if not (truth_path.is_file() and spec_path.is_file()):
        return False
    try:
        truth = json.loads(truth_path.read_text())
    except (OSError, json.JSONDecodeError):
        return False
    wanted = json.loads(json.dumps(asdict(options)))
    tiles = len(list((folder / "release_2026_11").glob("*.tif")))
    return bool(truth.get("options") == wanted and tiles == options.tiles_x * options.tiles_y)


@dataclass(frozen=True)
class Archive:
    size: int
    options: DemoArchiveOptions
    spec: Path
    seconds: float  # generation time, 0 when reused
    reused: bool


def ensure_archive(cache: Path, size: int, pixels: int) -> Archive:
    """The demo archive of size tiles of pixels x pixels, from the cache or freshly made."""
    options = archive_options(size, pixels)
    folder = archive_dir(cache, options)
    if archive_matches(folder, options):
        say(f"[archive] {size} tiles ({pixels} px): reusing {folder}")
        return Archive(size, options, folder / "demo.yaml", 0.0, True)
    estimate_min = size * SECONDS_PER_MEGAPIXEL_TILE * (pixels / 1000) ** 2 / 60
    say(
        f"[archive] {size} tiles ({pixels} px): generating into {folder}; this takes long "
        f"(roughly {estimate_min:.0f} min on a 2-core machine, one process)"
    )
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "truth.json").unlink(missing_ok=True)  # an interrupted run must not look complete
    started = time.perf_counter()
    spec = make_demo_archive(folder, options)
    seconds = time.perf_counter() - started
    say(f"[archive] {size} tiles: generated in {seconds:.0f} s ({seconds / size:.1f} s/tile)")
    return Archive(size, options, spec, seconds, False)


def load_job(spec_path: Path) -> ResolvedJob:
    spec = parse_spec(load_spec_file(spec_path))
    return resolve(spec, base_dir=spec_path.parent)


# -- pipeline runs ------------------------------------------------------------------------------


@dataclass(frozen=True)
class RunMeasurement:
    size: int
    pixels: int
    cluster_start_s: float
    wall_s: float
    tiles_ok: int
    tiles_failed: int
    workers_before: list[ProcessMemory]  # after the cluster started, before run_job
    workers_after: list[ProcessMemory]
    client_before_kib: int
    client_after_kib: int
    client_peak_kib: int | None  # None when the kernel refused to reset the peak

    @property
    def worker_peak_kib(self) -> list[int]:
        return [m.hwm_kib for m in self.workers_after]

    @property
    def tiles_per_s(self) -> float:
        return self.size / self.wall_s

    @property
    def max_worker_peak_kib(self) -> int:
        return max(self.worker_peak_kib)


def progress_printer(size: int) -> Callable[[int, int], None]:
    """Print progress at every tenth of the tiles."""
    started = time.perf_counter()
    shown: set[int] = set()

    def progress(done: int, total: int) -> None:
        tenth = done * 10 // max(total, 1)
        if tenth not in shown:
            shown.add(tenth)
            say(f"[run {size}] {done}/{total} tiles, {time.perf_counter() - started:.0f} s")

    return progress


def run_size(archive: Archive, out_dir: Path) -> RunMeasurement:
    """Run the whole pipeline on one archive on a fresh local cluster and measure it."""
    job = load_job(archive.spec)
    shutil.rmtree(out_dir, ignore_errors=True)
    peak_reset = reset_client_peak()
    client_before = process_memory()
    say(f"[run {archive.size}] starting a fresh local cluster ({WORKERS} workers, {MEMORY_LIMIT})")
    started = time.perf_counter()
    with dask_client(None, workers=WORKERS, memory_limit=MEMORY_LIMIT) as client:
        cluster_start_s = time.perf_counter() - started
        before = client.run(process_memory)
        started = time.perf_counter()
        document = run_job(job, out_dir, client=client, progress=progress_printer(archive.size))
        wall_s = time.perf_counter() - started
        after = client.run(process_memory)
    client_after = process_memory()
    tiles = document["tiles"]
    failed = sum(1 for t in tiles if t["status"] == "failed")
    for t in tiles:
        if t["status"] == "failed":
            say(f"[run {archive.size}] FAILED tile {t['tile']}: {t.get('reason')}")
    measurement = RunMeasurement(
        size=archive.size,
        pixels=archive.options.pixels,
        cluster_start_s=cluster_start_s,
        wall_s=wall_s,
        tiles_ok=sum(1 for t in tiles if t["status"] == "ok"),
        tiles_failed=failed,
        workers_before=[before[k] for k in sorted(before)],
        workers_after=[after[k] for k in sorted(after)],
        client_before_kib=client_before.rss_kib,
        client_after_kib=client_after.rss_kib,
        client_peak_kib=client_after.hwm_kib if peak_reset else None,
    )
    say(
        f"[run {archive.size}] {wall_s:.1f} s, {measurement.tiles_per_s:.2f} tiles/s, "
        f"peak worker RSS {mib(measurement.max_worker_peak_kib)} MiB (VmHWM), "
        f"ru_maxrss {mib(max(m.ru_maxrss_kib for m in measurement.workers_after))} MiB"
    )
    return measurement


def mib(kib: int) -> str:
    return f"{kib / 1024:,.0f}"


# -- summaries against numpy --------------------------------------------------------------------


@dataclass
class TileComparison:
    tile_id: str
    pixels: int
    summarise_ms: float
    statistics_ms: float
    numpy_ms: float
    summary_bytes: int
    pickled_bytes: int
    bins: int
    differences: dict[str, float] = field(default_factory=dict)
    bound_use: dict[str, float] = field(default_factory=dict)
    tail_fraction: float = 0.0  # share of pixels with |dh| >= 2 m (geometric bins)
    result_summaries: int = 0  # summaries in the tile's TileResult (tile, regions, strata)
    result_bytes: int = 0  # pickled TileResult, what a worker sends to the client

    @property
    def summary_ms(self) -> float:
        return self.summarise_ms + self.statistics_ms


@dataclass
class SummaryComparison:
    archive: Archive
    tiles: list[TileComparison]
    merge_ms: float
    merged_statistics_ms: float
    numpy_all_ms: float
    merged_pixels: int
    merged_bytes: int
    merged_differences: dict[str, float]
    merged_bound_use: dict[str, float]


def best_of(fn: Callable[[], Any], repeats: int = REPEATS) -> tuple[float, Any]:
    """Median wall time (ms) of repeats calls, and the last result."""
    times = []
    result = None
    for _ in range(repeats):
        started = time.perf_counter()
        result = fn()
        times.append((time.perf_counter() - started) * 1000)
    return pystats.median(times), result


def numpy_statistics(v: NDArray[np.float64]) -> dict[str, float]:
    """(b): median, quantiles 68.3 % and 95 % of |dh| and NMAD with plain numpy."""
    median = float(np.median(v))
    q683, q95 = np.quantile(np.abs(v), [0.683, 0.95])
    nmad = NMAD_FACTOR * float(np.median(np.abs(v - median)))
    return {"median": median, "nmad": nmad, "q683_abs": float(q683), "q95_abs": float(q95)}


def summary_statistics(v: NDArray[np.float64]) -> tuple[DhSummary, dict[str, Any]]:
    """(a): the mergeable summary and the statistics read from it."""
    s = dh_summary.summarise(v)
    return s, dh_summary.statistics(s)


def differences(a: dict[str, Any], b: dict[str, float]) -> dict[str, float]:
    """|(a) - (b)| per statistic, in metres."""
    return {key: abs(float(a[key]) - b[key]) for key in b}


def stated_bounds(b: dict[str, float]) -> dict[str, float]:
    """The accuracy workers/stats/summary.py states for each statistic (metres), at numpy's
    values."""
    bounds = {key: dh_summary.quantile_bound_m(b[key]) for key in ("median", "q683_abs", "q95_abs")}
    bounds["nmad"] = dh_summary.nmad_bound_m(b["median"], b["nmad"])
    return bounds


def bound_use(a: dict[str, Any], b: dict[str, float]) -> dict[str, float]:
    """|(a) - (b)| as a fraction of the stated bound (above 1: outside the bound)."""
    bounds = stated_bounds(b)
    return {key: value / bounds[key] for key, value in differences(a, b).items()}


def pick_tiles(tiles: Sequence[TileInfo], count: int) -> list[TileInfo]:
    """count tiles spread evenly over the archive (sorted by id)."""
    ordered = sorted(tiles, key=lambda t: t.tile_id)
    if count >= len(ordered):
        return ordered
    step = len(ordered) / count
    return [ordered[int(i * step)] for i in range(count)]


def scan_all(paths: Sequence[Path]) -> list[TileInfo]:
    scanned = [scan_tile(p) for p in paths]
    for s in scanned:
        if isinstance(s, ScanFailure):
            say(f"[compare] cannot scan {s.path}: {s.reason}")
    return [s for s in scanned if isinstance(s, TileInfo)]


def valid_dh(
    test: TileInfo,
    refs: TileIndex,
    cover: TileIndex,
    options: TileOptions,
) -> NDArray[np.float64]:
    """The tile's valid dh pixels as the pipeline counts them (finite, class not excluded)."""
    layers = tile_surfaces(
        test, refs.overlapping(test.grid), options, landcover=cover.overlapping(test.grid)
    )
    valid = np.isfinite(layers.dh)
    excluded = excluded_mask(layers.landcover, options.landcover_classes)
    if excluded is not None:
        valid &= ~excluded
    return np.ascontiguousarray(layers.dh[valid])


def compare_tile(tile_id: str, v: NDArray[np.float64]) -> tuple[TileComparison, DhSummary]:
    summarise_ms, s = best_of(lambda: dh_summary.summarise(v))
    statistics_ms, stats = best_of(lambda: dh_summary.statistics(s))
    numpy_ms, reference = best_of(lambda: numpy_statistics(v))
    comparison = TileComparison(
        tile_id=tile_id,
        pixels=int(v.size),
        summarise_ms=summarise_ms,
        statistics_ms=statistics_ms,
        numpy_ms=numpy_ms,
        summary_bytes=s.nbytes,
        pickled_bytes=len(pickle.dumps(s, protocol=pickle.HIGHEST_PROTOCOL)),
        bins=int(s.bins.size),
        differences=differences(stats, reference),
        bound_use=bound_use(stats, reference),
        tail_fraction=float(np.mean(np.abs(v) >= LINEAR_LIMIT_M)),
    )
    return comparison, s


def tile_result_payload(
    test: TileInfo,
    refs: TileIndex,
    cover: TileIndex,
    regions: Sequence[Region],
    options: TileOptions,
) -> tuple[int, int]:
    """Number of summaries in the tile's full TileResult and its pickled size in bytes."""
    result: TileResult = audit_tile(
        test,
        refs.overlapping(test.grid),
        region_ops.clip_to(regions, test.bounds),
        options,
        cover.overlapping(test.grid),
    )
    count = 1 + len(result.regions) + sum(len(d) for d in result.strata.values())
    return count, len(pickle.dumps(result, protocol=pickle.HIGHEST_PROTOCOL))


def job_regions(job: ResolvedJob, crs: str) -> list[Region]:
    """The job's regions in the given CRS (none without a region file)."""
    if job.region_file is None or job.spec.region is None:
        return []
    regions = region_ops.read_regions(job.region_file, id_property=job.spec.region.id_property)
    return region_ops.to_crs(regions, crs)


def compare_summaries(archive: Archive, count: int) -> SummaryComparison:
    """Time (a) summary + statistics against (b) numpy on count tiles of the archive."""
    job = load_job(archive.spec)
    options = TileOptions.from_spec(job.spec)
    say(f"[compare] scanning the {archive.size}-tile archive in this process")
    tests = pick_tiles(scan_all(job.test_tiles), count)
    refs = TileIndex(scan_all(job.reference_tiles))
    cover = TileIndex(scan_all(job.landcover_tiles))
    tiles: list[TileComparison] = []
    summaries: list[DhSummary] = []
    pixels: list[NDArray[np.float64]] = []
    regions_by_crs = {crs: job_regions(job, crs) for crs in {t.grid.crs for t in tests}}
    for test in tests:
        v = valid_dh(test, refs, cover, options)
        comparison, s = compare_tile(test.tile_id, v)
        comparison.result_summaries, comparison.result_bytes = tile_result_payload(
            test, refs, cover, regions_by_crs[test.grid.crs], options
        )
        say(
            f"[compare] {test.tile_id}: {v.size:,} px, summary {comparison.summary_ms:.1f} ms, "
            f"numpy {comparison.numpy_ms:.1f} ms, TileResult {comparison.result_bytes:,} bytes"
        )
        tiles.append(comparison)
        summaries.append(s)
        pixels.append(v)
    merge_ms, merged = best_of(lambda: dh_summary.merge_all(summaries))
    merged_statistics_ms, merged_stats = best_of(lambda: dh_summary.statistics(merged))
    everything = np.concatenate(pixels)
    numpy_all_ms, numpy_all = best_of(lambda: numpy_statistics(everything))
    return SummaryComparison(
        archive=archive,
        tiles=tiles,
        merge_ms=merge_ms,
        merged_statistics_ms=merged_statistics_ms,
        numpy_all_ms=numpy_all_ms,
        merged_pixels=int(everything.size),
        merged_bytes=merged.nbytes,
        merged_differences=differences(merged_stats, numpy_all),
        merged_bound_use=bound_use(merged_stats, numpy_all),
    )


# -- report -------------------------------------------------------------------------------------


def flatness(runs: Sequence[RunMeasurement]) -> tuple[float, bool]:
    """Peak worker memory of the largest size over that of the smallest, and whether it passes."""
    smallest = min(runs, key=lambda r: r.size)
    largest = max(runs, key=lambda r: r.size)
    ratio = largest.max_worker_peak_kib / smallest.max_worker_peak_kib
    return ratio, ratio <= FLATNESS_LIMIT


def report_runs(runs: Sequence[RunMeasurement], archives: dict[int, Archive]) -> list[str]:
    header = (
        f"{'tiles':>5} {'layout':>6} {'px':>5} {'archive':>12} {'run_s':>7} {'tiles/s':>7} "
        f"{'worker peak MiB':>15} {'max':>5} {'idle':>5} {'end':>5} {'ru_maxrss':>9} "
        f"{'client MiB':>16} {'failed':>6}"
    )
    lines = [header]
    for r in runs:
        a = archives[r.size]
        made = "reused" if a.reused else f"made {a.seconds:.0f}s"
        side = a.options.tiles_x
        peak = mib(r.client_peak_kib) if r.client_peak_kib is not None else "?"
        client = f"{mib(r.client_before_kib)}/{peak}/{mib(r.client_after_kib)}"
        lines.append(
            f"{r.size:>5} {f'{side}x{side}':>6} {r.pixels:>5} {made:>12} {r.wall_s:>7.1f} "
            f"{r.tiles_per_s:>7.2f} {' / '.join(mib(k) for k in r.worker_peak_kib):>15} "
            f"{mib(r.max_worker_peak_kib):>5} "
            f"{mib(max(m.hwm_kib for m in r.workers_before)):>5} "
            f"{mib(max(m.rss_kib for m in r.workers_after)):>5} "
            f"{mib(max(m.ru_maxrss_kib for m in r.workers_after)):>9} "
            f"{client:>16} {r.tiles_failed:>6}"
        )
    if len(runs) >= 2:
        ratio, ok = flatness(runs)
        lo, hi = min(r.size for r in runs), max(r.size for r in runs)
        verdict = "PASS" if ok else "FAIL"
        lines.append(
            f"peak worker memory {hi} / {lo} tiles = {ratio:.3f} "
            f"(criterion: flat within {FLATNESS_LIMIT - 1:.0%}, i.e. <= {FLATNESS_LIMIT:.2f}) "
            f"-> {verdict}"
        )
    else:
        lines.append("peak worker memory ratio: needs at least two sizes")
    return lines


def report_comparison(c: SummaryComparison) -> list[str]:
    n = len(c.tiles)

    def mean(values: list[float]) -> float:
        return float(np.mean(values))

    summarise_ms = mean([t.summarise_ms for t in c.tiles])
    statistics_ms = mean([t.statistics_ms for t in c.tiles])
    numpy_ms = mean([t.numpy_ms for t in c.tiles])
    summary_ms = summarise_ms + statistics_ms
    pixels = mean([float(t.pixels) for t in c.tiles])
    worst = {k: max(t.differences[k] for t in c.tiles) for k in c.tiles[0].differences}
    worst_use = {k: max(t.bound_use[k] for t in c.tiles) for k in c.tiles[0].bound_use}
    lines = [
        f"{n} tiles of the {c.archive.size}-tile archive ({c.archive.options.pixels} px), "
        f"{pixels:,.0f} valid dh pixels per tile on average; median of {REPEATS} repeats, "
        "mean over tiles",
        f"  (a) summarise                         {summarise_ms:9.1f} ms/tile",
        f"  (a) statistics from the summary       {statistics_ms:9.1f} ms/tile",
        f"  (a) total                             {summary_ms:9.1f} ms/tile",
        f"  (b) numpy median + quantiles + NMAD   {numpy_ms:9.1f} ms/tile",
        f"  ratio (a)/(b)                         {summary_ms / numpy_ms:9.2f}",
        f"  merge of the {n} summaries             {c.merge_ms:9.2f} ms "
        f"({c.merge_ms / max(n - 1, 1):.2f} ms per merge)",
        f"  statistics of the merged summary      {c.merged_statistics_ms:9.1f} ms",
        f"  (b) numpy on the {n} tiles' pixels       {c.numpy_all_ms:9.1f} ms "
        f"({c.merged_pixels:,} px)",
        f"  summary size per tile (bins+counts)   {mean([t.summary_bytes for t in c.tiles]):9,.0f}"
        f" bytes (pickled {mean([t.pickled_bytes for t in c.tiles]):,.0f}; "
        f"{mean([t.bins for t in c.tiles]):,.0f} non-empty bins; "
        f"raw dh {pixels * 8:,.0f} bytes)",
        f"  merged summary size                   {c.merged_bytes:9,} bytes",
        f"  whole TileResult per tile (pickled)   {mean([t.result_bytes for t in c.tiles]):9,.0f}"
        f" bytes ({mean([t.result_summaries for t in c.tiles]):.0f} summaries: tile, regions, "
        "region x stratum)",
        "  largest |(a) - (b)| over the tiles, mm (x stated bound): "
        + ", ".join(f"{k} {v * 1000:.3f} ({worst_use[k]:.2f})" for k, v in worst.items()),
        "  |(a) - (b)| after merging, mm (x stated bound):          "
        + ", ".join(
            f"{k} {v * 1000:.3f} ({c.merged_bound_use[k]:.2f})"
            for k, v in c.merged_differences.items()
        ),
    ]
    lines.append(
        "  per tile: summarise / statistics / numpy (ms); share of |dh| >= 2 m; "
        "summaries and pickled TileResult"
    )
    for t in c.tiles:
        lines.append(
            f"    {t.tile_id:<14} {t.pixels:>10,} px  {t.summarise_ms:7.1f} / "
            f"{t.statistics_ms:6.1f} / {t.numpy_ms:7.1f}   {t.tail_fraction:6.1%}   "
            f"{t.result_summaries:3d} {t.result_bytes / 1e6:6.1f} MB"
        )
    return lines


def final_table(
    facts: dict[str, str],
    runs: Sequence[RunMeasurement],
    archives: dict[int, Archive],
    comparison: SummaryComparison | None,
    command: str,
) -> str:
    now = dt.datetime.now().astimezone().isoformat(timespec="seconds")
    lines = [
        "=" * 100,
        f"demaudit scaling benchmark, finished {now}",
        f"command: {command}",
        *(f"{k}: {v}" for k, v in facts.items()),
        "CAVEAT: other processes may be running on this machine at the same time; wall times and "
        "tiles/s are indicative only.",
        "",
        f"Pipeline: run_job on a fresh LocalCluster per size ({WORKERS} worker processes x 1 "
        f"thread, memory_limit {MEMORY_LIMIT} each).",
        "worker peak = VmHWM of each worker process after the run (max = the larger); idle = "
        "VmHWM before the run; end = VmRSS after it;",
        "ru_maxrss = what getrusage reports on the workers (includes the client's RSS at fork, "
        "so not used); client = this process's RSS before / peak during / after the run.",
        *report_runs(runs, archives),
        "",
        "Mergeable summaries (workers/stats/summary.py) against numpy, in this process:",
        *(report_comparison(comparison) if comparison else ["  (skipped)"]),
        "=" * 100,
    ]
    return "\n".join(lines)


# -- main ---------------------------------------------------------------------------------------


def parse_args(argv: Sequence[str] | None = None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sizes", default="16,64,256", help="numbers of tiles, square numbers")
    parser.add_argument("--pixels", type=int, default=1000, help="pixels per tile side")
    parser.add_argument("--cache", type=Path, default=Path("/tmp/demaudit-bench"))
    parser.add_argument(
        "--compare-tiles", type=int, default=8, help="tiles for the summary-vs-numpy timing"
    )
    return parser.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    args = parse_args(argv)
    sizes = sorted({int(s) for s in args.sizes.split(",") if s.strip()})
    for size in sizes:
        layout_of(size)
    facts = machine_facts()
    command = " ".join([Path(sys.executable).name, *sys.argv])
    say(f"demaudit scaling benchmark: sizes {sizes}, {args.pixels} px, cache {args.cache}")
    say("Note: other processes may be running on this machine; timings are indicative.")
    args.cache.mkdir(parents=True, exist_ok=True)
    archives = {size: ensure_archive(args.cache, size, args.pixels) for size in sizes}
    runs = [
        run_size(archives[size], args.cache / "runs" / f"{size}-tiles-{args.pixels}px")
        for size in sizes
    ]
    comparison = None
    if args.compare_tiles > 0:
        comparison = compare_summaries(archives[sizes[-1]], args.compare_tiles)
    say(final_table(facts, runs, archives, comparison, command))
    return 0


if __name__ == "__main__":
    sys.exit(main())
