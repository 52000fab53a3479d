"""Cost of a nightly re-check with 1 % of the tiles changed, relative to a full run.

Run:  .venv/bin/python benchmarks/bench_recheck.py [--tiles 10] [--pixels 400] [--cache DIR]

Generates (or reuses) a demo archive of tiles x tiles test tiles, runs a full audit, changes the
content of 1 % of the test tiles (at least one; spread evenly over the sorted tile names, or the
first ones with --pick first), and runs the re-check against the full run, both on the same fresh
local Dask cluster (2 workers, 1 thread each). Prints wall times, the ratio, how many tiles the
cluster audited in each run, their compute time on the workers, and each run's phases (from
summary.json job.timings_s). Numbers vary with whatever else the machine runs.
"""

from __future__ import annotations

import argparse
import os
import shutil
import time
from pathlib import Path

import numpy as np
import rasterio
from distributed import get_task_stream

from demaudit.service.run.cluster import dask_client
from demaudit.service.run.runner import run_job
from demaudit.service.run.tile_tasks import tiles_of_key
from demaudit.workers import spec as job_spec
from demaudit.workers.demo.archive import make_demo_archive
from demaudit.workers.demo.options import DemoArchiveOptions


def archive(cache: Path, tiles: int, pixels: int) -> Path:
    root = cache / f"recheck-{tiles}x{tiles}-{pixels}"
    if not (root / "demo.yaml").is_file():
        t0 = time.perf_counter()
        make_demo_archive(
            root,
            DemoArchiveOptions(tiles_x=tiles, tiles_y=tiles, pixels=pixels, write_update=False),
        )
        print(f"generated {tiles * tiles} tiles of {pixels} px in {time.perf_counter() - t0:.0f} s")
    return root


def change_tiles(root: Path, fraction: float, pick: str = "spread") -> list[str]:
    """Add 0.1 m to the valid pixels of ceil(fraction x n) test tiles: spread evenly over the
    sorted names, or the first ones."""
    tifs = sorted((root / "release_2026_11").glob("*.tif"))
    k = max(1, int(np.ceil(fraction * len(tifs))))
    if pick == "first":
        chosen = tifs[:k]
    else:
        chosen = [tifs[int((i + 0.5) * len(tifs) / k)] for i in range(k)]
    for tif in chosen:
        with rasterio.open(tif, "r+") as dst:
            data = dst.read(1)
            dst.write(np.where(data == dst.nodata, data, data + 0.1).astype(data.dtype), 1)
    return [t.stem for t in chosen]


def timed_run(
    client, root: Path, out: Path, baseline: Path | None
) -> tuple[float, int, float, dict]:
    """Wall time, tiles audited, their summed compute time on the workers, summary document."""
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "demo.yaml"))
    job = job_spec.resolve(spec, base_dir=root)
    with get_task_stream(client) as stream:
        t0 = time.perf_counter()
        doc = run_job(job, out, client=client, baseline=baseline)
        elapsed = time.perf_counter() - t0
    tasks = [t for t in stream.data if str(t["key"]).startswith("audit-tile-")]
    compute = sum(
        s["stop"] - s["start"] for t in tasks for s in t["startstops"] if s["action"] == "compute"
    )
    tiles = {tile for t in tasks for tile in tiles_of_key(t["key"])}
    return elapsed, len(tiles), compute, doc


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tiles", type=int, default=10, help="tiles per side (default 10)")
    parser.add_argument("--pixels", type=int, default=400)
    parser.add_argument("--cache", type=Path, default=Path("/tmp/demaudit-bench"))
    parser.add_argument("--archive", type=Path, help="use this demo archive instead (a copy)")
    parser.add_argument("--pick", choices=("spread", "first"), default="spread")
    args = parser.parse_args()
    source = args.archive or archive(args.cache, args.tiles, args.pixels)
    work = args.cache / "recheck-work"
    shutil.rmtree(work, ignore_errors=True)
    shutil.copytree(source, work / "archive")
    with dask_client(None, workers=2, memory_limit="6GiB") as client:
        full_s, full_n, full_cpu, full = timed_run(client, work / "archive", work / "full", None)
        changed = change_tiles(work / "archive", 0.01, args.pick)
        re_s, re_n, re_cpu, doc = timed_run(client, work / "archive", work / "night", work / "full")
    n = len(list((work / "archive" / "release_2026_11").glob("*.tif")))
    print(f"\narchive: {source} ({n} test tiles); changed ({args.pick}): {changed}")
    print(f"{'run':<24}{'wall s':>10}{'tiles audited':>15}{'tile compute s':>16}")
    print(f"{'full':<24}{full_s:>10.2f}{full_n:>15}{full_cpu:>16.2f}")
    print(f"{'re-check (1 % changed)':<24}{re_s:>10.2f}{re_n:>15}{re_cpu:>16.2f}")
    print(f"ratio re-check / full: {re_s / full_s:.3f} (target < 0.05)")
    print("phases (s, from summary.json job.timings_s):")
    phases = dict.fromkeys([*full["job"]["timings_s"], *doc["job"]["timings_s"]])
    for phase in phases:
        a, b = full["job"]["timings_s"].get(phase, 0.0), doc["job"]["timings_s"].get(phase, 0.0)
        print(f"  {phase:<28}{a:>10.2f}{b:>10.2f}")
    print(f"tiles recomputed per the change report: {doc['recheck']['tiles_recomputed']}")
    print(f"machine: {os.cpu_count()} cores, numpy {np.__version__}; other processes may run")


if __name__ == "__main__":
    main()
