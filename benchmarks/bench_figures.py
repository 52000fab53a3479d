"""Cost of the figures and report.html against the whole job, on a 256-tile demo archive.

Run:  .venv/bin/python benchmarks/bench_figures.py [--tiles 16] [--pixels 250] [--cache DIR]

Generates (or reuses) a demo archive of tiles x tiles test tiles, runs a full audit on a fresh
local Dask cluster (2 workers, 1 thread each) and reads the phase ``figures_and_report`` from
summary.json (job.timings_s), then draws the figures and the report again on the finished output
folder, --repeat times, outside the job: wall and CPU time of this process, per figure. Prints the
share of the job's wall time and of its CPU time (this process and the workers; target < 5 %).
Wall times vary with whatever else the machine runs; the CPU-time share is the figure least
disturbed by other processes.
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import time
from pathlib import Path

import numpy as np

from demaudit.service.run.cluster import dask_client
from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec
from demaudit.workers.demo.archive import DemoArchiveOptions, make_demo_archive
from demaudit.workers.inputs import regions as region_ops
from demaudit.workers.outputs import figures
from demaudit.workers.outputs.layout import REPORT_NAME
from demaudit.workers.outputs.report_html import write_report


def archive(cache: Path, tiles: int, pixels: int) -> Path:
    root = cache / f"figures-{tiles}x{tiles}-{pixels}"
    if not (root / "demo.yaml").is_file():
        t0 = time.perf_counter()
        make_demo_archive(
            root,
            DemoArchiveOptions(tiles_x=tiles, tiles_y=tiles, pixels=pixels, write_update=False),
        )
        print(f"generated {tiles * tiles} tiles of {pixels} px in {time.perf_counter() - t0:.0f} s")
    return root


def redraw(out: Path, document: dict, job: job_spec.ResolvedJob) -> tuple[float, float, dict]:
    """Wall and CPU seconds of write_figures + write_report on a finished folder, and the wall
    seconds of each figure (its builder and its PNG)."""
    crs = figures.overview_crs(out)
    regions = []
    if job.region_file is not None and job.spec.region is not None and crs is not None:
        read = region_ops.read_regions(job.region_file, id_property=job.spec.region.id_property)
        regions = [(r.region_id, r.name, r.geometry) for r in region_ops.to_crs(read, crs)]
    wall0, cpu0 = time.perf_counter(), time.process_time()
    overall, strata = figures.stored_totals(out, document)
    meta = figures.write_figures(
        out, document, overall=overall, strata=strata, regions=regions, crs=crs
    )
    write_report(out, document | {"figures": meta})
    wall, cpu = time.perf_counter() - wall0, time.process_time() - cpu0
    ctx = figures.FigureContext(out, document, overall, strata or {}, regions, crs)
    each = {}
    for name, build in figures.BUILDERS:
        t0 = time.perf_counter()
        drawn = build(ctx)
        if drawn is not None:
            drawn[0].savefig(out / f"bench-{name}", dpi=figures.DPI)
            each[name] = time.perf_counter() - t0
            (out / f"bench-{name}").unlink()
    return wall, cpu, each


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tiles", type=int, default=16, help="tiles per side (default 16)")
    parser.add_argument("--pixels", type=int, default=250)
    parser.add_argument("--cache", type=Path, default=Path("/tmp/demaudit-bench"))
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    root = archive(args.cache, args.tiles, args.pixels)
    out = args.cache / f"figures-out-{args.tiles}x{args.tiles}-{args.pixels}"
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "demo.yaml"))
    job = job_spec.resolve(spec, base_dir=root)
    shutil.rmtree(out, ignore_errors=True)
    with dask_client(None, workers=2, memory_limit="6GiB") as client:
        workers0 = client.run(time.process_time)
        t0, cpu0 = time.perf_counter(), time.process_time()
        document = run_job(job, out, client=client)
        job_s, client_cpu = time.perf_counter() - t0, time.process_time() - cpu0
        workers1 = client.run(time.process_time)
    job_cpu = client_cpu + sum(workers1[w] - workers0[w] for w in workers0)
    in_job = document["job"]["timings_s"]["figures_and_report"]
    runs = [redraw(out, document, job) for _ in range(args.repeat)]
    wall = statistics.median(r[0] for r in runs)
    cpu = statistics.median(r[1] for r in runs)
    n = document["job"]["tiles"]["test"]
    print(f"\narchive: {root} ({n} test tiles of {args.pixels} px)")
    print(f"job wall time: {job_s:.2f} s; phases (summary.json job.timings_s):")
    for phase, seconds in document["job"]["timings_s"].items():
        print(f"  {phase:<28}{seconds:>9.2f}")
    print(
        f"job CPU time: {job_cpu:.2f} s (this process {client_cpu:.2f} s, the rest on the "
        f"{len(workers0)} workers)"
    )
    print(f"figures + report inside the job: {in_job:.2f} s = {in_job / job_s:.1%} of the job")
    print(
        f"redrawn on the finished folder (median of {args.repeat}): wall {wall:.2f} s "
        f"({wall / job_s:.1%} of the job's wall time), CPU {cpu:.2f} s ({cpu / job_cpu:.1%} of "
        "the job's CPU time); target < 5 %"
    )
    print(
        "each redraw (wall s / CPU s; the first pays matplotlib's font and glyph caches): "
        + ", ".join(f"{w:.2f} / {c:.2f}" for w, c, _ in runs)
    )
    print("per figure (wall s, last redraw):")
    for name, seconds in runs[-1][2].items():
        print(f"  {name:<24}{seconds:>7.2f}")
    size = (out / REPORT_NAME).stat().st_size
    print(f"report.html: {size / 1e6:.2f} MB with {len(document['figures'])} figures embedded")
    load = os.getloadavg()
    print(f"machine: {os.cpu_count()} cores, load average {load[0]:.1f}, numpy {np.__version__}")


if __name__ == "__main__":
    main()
