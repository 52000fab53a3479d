"""Cost of the figures and report.html against the whole job, on a 256-tile demo archive.

Run:  .venv/bin/python benchmarks/bench_figures.py [--tiles 16] [--pixels 250] [--cache DIR]
          [--at-end]

Generates (or reuses) a demo archive of tiles x tiles test tiles, runs a full audit on a fresh
local Dask cluster (2 workers, 1 thread each) and reads the phase ``figures_and_report`` from
summary.json (job.timings_s), then draws the figures and the report again on the finished output
folder, --repeat times, outside the job: wall and CPU time of this process, per figure. Prints the
share of the job's wall time and of its CPU time (this process and the workers; target < 5 %).
Wall times vary with whatever else the machine runs; the CPU-time share is the figure least
disturbed by other processes.

The job draws the figures that need only the statistics on a background thread while the
checkpoints and the change report are worked out (figures/background.py); the phase
``figures_and_report`` is what is left to wait for at the end, and the background thread's own
wall and CPU seconds are printed beside it. ``--at-end`` draws every figure at the end instead
(the earlier behaviour), for a side-by-side run.
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import time
from pathlib import Path
from typing import Any

from demaudit.service.run import runner
from demaudit.service.run.cluster import dask_client
from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec
from demaudit.workers.demo.archive import make_demo_archive
from demaudit.workers.demo.options import DemoArchiveOptions
from demaudit.workers.inputs import regions as region_ops
from demaudit.workers.outputs import figures
from demaudit.workers.outputs.figures import background
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
    and CPU seconds of each figure (its builder and its PNG, written as the job writes it)."""
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
        t0, c0 = time.perf_counter(), time.process_time()
        drawn = build(ctx)
        if drawn is not None:
            drawn[0].savefig(out / f"bench-{name}", dpi=figures.DPI, **figures.PNG_OPTIONS)
            each[name] = (time.perf_counter() - t0, time.process_time() - c0)
            (out / f"bench-{name}").unlink()
    return wall, cpu, each


class Capture:
    """Wraps the runner's start_figures: keeps the drawing (for its thread's seconds) or, with
    at_end, draws every figure when the job finishes them, as before the background thread."""

    def __init__(self, *, at_end: bool) -> None:
        self.at_end = at_end
        self.drawing: background.FigureDrawing | None = None

    def __call__(self, out_dir: Path, document: Any, **kwargs: Any) -> Any:
        if self.at_end:
            return _AtTheEnd(out_dir, kwargs)
        self.drawing = background.start_figures(out_dir, document, **kwargs)
        return self.drawing


class _AtTheEnd:
    def __init__(self, out_dir: Path, kwargs: dict[str, Any]) -> None:
        self.out_dir, self.kwargs = out_dir, kwargs

    def finish(self, document: Any) -> dict[str, Any]:
        return figures.write_figures(self.out_dir, document, **self.kwargs)


def run(job: job_spec.ResolvedJob, out: Path, capture: Capture) -> tuple[dict, float, float, float]:
    """The job's document, wall seconds, this process's CPU seconds and the whole CPU seconds."""
    shutil.rmtree(out, ignore_errors=True)
    runner.start_figures = capture  # type: ignore[attr-defined]
    with dask_client(None, workers=2, memory_limit="6GiB") as client:
        workers0 = client.run(time.process_time)
        t0, cpu0 = time.perf_counter(), time.process_time()
        document = run_job(job, out, client=client)
        job_s, client_cpu = time.perf_counter() - t0, time.process_time() - cpu0
        workers1 = client.run(time.process_time)
    job_cpu = client_cpu + sum(workers1[w] - workers0[w] for w in workers0)
    return document, job_s, client_cpu, job_cpu


def report_job(document: dict, job_s: float, client_cpu: float, job_cpu: float) -> None:
    print(f"job wall time: {job_s:.2f} s; phases (summary.json job.timings_s):")
    for phase, seconds in document["job"]["timings_s"].items():
        print(f"  {phase:<28}{seconds:>9.2f}")
    print(f"job CPU time: {job_cpu:.2f} s (this process {client_cpu:.2f} s, the rest on workers)")
    in_job = document["job"]["timings_s"]["figures_and_report"]
    print(f"figures + report inside the job: {in_job:.2f} s = {in_job / job_s:.1%} of the job")


def report_redraws(runs: list, job_s: float, job_cpu: float) -> None:
    wall = statistics.median(r[0] for r in runs)
    cpu = statistics.median(r[1] for r in runs)
    print(
        f"redrawn on the finished folder (median of {len(runs)}): wall {wall:.2f} s "
        f"({wall / job_s:.1%} of the job's wall time), CPU {cpu:.2f} s ({cpu / job_cpu:.1%} of "
        "the job's CPU time); target < 5 %"
    )
    print(
        "each redraw (wall s / CPU s; the first pays matplotlib's font and glyph caches): "
        + ", ".join(f"{w:.2f} / {c:.2f}" for w, c, _ in runs)
    )
    print("per figure (wall s / CPU s, best of the redraws; the dh map's reads the overview):")
    for name in runs[-1][2]:
        wall_s = min(r[2][name][0] for r in runs)
        cpu_s = min(r[2][name][1] for r in runs)
        print(f"  {name:<24}{wall_s:>7.3f} /{cpu_s:>6.3f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tiles", type=int, default=16, help="tiles per side (default 16)")
    parser.add_argument("--pixels", type=int, default=250)
    parser.add_argument("--cache", type=Path, default=Path("/tmp/demaudit-bench"))
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--at-end", action="store_true", help="draw every figure at the end")
    args = parser.parse_args()
    root = archive(args.cache, args.tiles, args.pixels)
    out = args.cache / f"figures-out-{args.tiles}x{args.tiles}-{args.pixels}"
    job = job_spec.resolve(
        job_spec.parse_spec(job_spec.load_spec_file(root / "demo.yaml")), base_dir=root
    )
    load0 = os.getloadavg()[0]
    capture = Capture(at_end=args.at_end)
    document, job_s, client_cpu, job_cpu = run(job, out, capture)
    n = document["job"]["tiles"]["test"]
    mode = "all at the end" if args.at_end else "background thread + the rest at the end"
    print(f"\narchive: {root} ({n} test tiles of {args.pixels} px); figures drawn: {mode}")
    report_job(document, job_s, client_cpu, job_cpu)
    if capture.drawing is not None and capture.drawing.seconds is not None:
        wall, cpu = capture.drawing.seconds
        print(f"background thread drew for {wall:.2f} s wall, {cpu:.2f} s CPU (its own thread)")
    report_redraws([redraw(out, document, job) for _ in range(args.repeat)], job_s, job_cpu)
    size = (out / REPORT_NAME).stat().st_size
    print(f"report.html: {size / 1e6:.2f} MB with {len(document['figures'])} figures embedded")
    load = os.getloadavg()[0]
    print(f"machine: {os.cpu_count()} cores, load average {load0:.1f} before, {load:.1f} after")


if __name__ == "__main__":
    main()
