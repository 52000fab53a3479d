"""Throughput benchmark: demaudit against the decode limit and against a naive numpy script.

Run from the repository root:

    .venv/bin/python benchmarks/bench_throughput.py            # 4 and 16 tiles of 1500 px
    .venv/bin/python benchmarks/bench_throughput.py --quick    # 1 and 4 tiles of 1000 px
    .venv/bin/python benchmarks/bench_throughput.py --tiles 16,64 --pixels 1500
    .venv/bin/python benchmarks/bench_throughput.py --tiles 16,256 --archives same-grid \
        --contenders decode,demaudit-w2,demaudit-w1      # memory from 16 to 256 tiles

What one run does, for two archives it writes itself (kept in ``--cache`` and reused):

* ``same-grid``: test and reference on one grid (EPSG:32632, 5 m), float32 DEFLATE tiled
  GeoTIFFs (256 px blocks, predictor 3), one reference tile per test tile. The test is the demo's
  release surface (noise, blunders, voids, canopy, shift) without the geoid, the reference is the
  demo's terrain plus 3 cm of noise; both are ellipsoidal, so there is no datum step.
* ``reprojected``: the demo archive (``make_demo_archive``, no update tiles): reference in
  EPSG:3035 on another tiling with 4 m pixels and EGM96 heights, so the test needs a warp and a
  geoid offset.

For each archive and each of the two sizes (the first ``--tiles`` test tiles as a block at the
north-west corner, then all of them) it runs, each in a fresh subprocess whose whole process tree
is sampled with psutil every 50 ms for the peak resident memory (a contender's two sizes run
back to back, so that both see a similar load from other processes):

* ``decode``: rasterio reads every test tile and every reference tile that overlaps them, in 2
  processes, and computes nothing;
* ``decode-own`` (same-grid archive only): the same files read by demaudit's own block decoder
  (workers/inputs/tiff_blocks.py: libdeflate and a compiled predictor sweep, no GDAL), which the
  workers use for such files; the ratio to it is what demaudit adds to its own reads;
* ``decode+warp`` (reprojected archive only): per test tile, read it and warp the overlapping
  reference tiles onto its grid with GDAL (rasterio.warp.reproject, bilinear), in 2 processes;
* ``naive``: a script a user writes in an afternoon: per test tile (2 processes) read both (and
  for the reprojected archive warp as above and add N from PROJ evaluated every 8th pixel,
  nearest-neighbour upsampled), subtract, numpy median / NMAD / quantiles per tile, and the
  region figures by concatenating every dh in memory in the parent;
* ``demaudit``: ``demaudit run SPEC --workers 2 --quiet`` (default options, one region covering
  the domain, local cluster), and again with ``--workers 1`` for the scaling ratio.

A warm-up runs each contender once on the small size first and is not counted: the first run
after an install fills numba's disk cache (a demaudit job then takes twice as long) and the
first reads fill the page cache. ``--repeat N`` then runs every contender's two sizes N times,
round after round (all contenders in each round, so that each sees the same load); a marginal
figure is taken from each size's fastest run, the one least slowed by other processes. Every
counted run's seconds and load are printed.

Marginal throughput = (test pixels of the large size - of the small size) / (seconds of the large
run - of the small run): start-up costs (interpreters, cluster, catalog) cancel. Ratios are of
marginal throughputs. Then, on one tile of each archive, the phases of a tile are timed by calling
the worker functions directly in this process (best of 3): read, align, datum, difference,
slope + strata + summaries (``summarise_tile``), overview.

This is a measurement, not a test: nothing here asserts on a time. Other processes may run on the
machine at the same time; the output prints the load average.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import multiprocessing
import os
import shutil
import subprocess
import sys
import threading
import time
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import psutil
import pyproj
import rasterio
from rasterio.warp import Resampling, reproject

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from throughput_archives import (  # noqa: E402
    REPROJECTED,
    SAME_GRID,
    WORKERS,
    Plan,
    ensure_archive,
    layout_of,
    make_plan,
    say,
    write_spec,
)
from throughput_report import Run, machine_facts, phases, report  # noqa: E402
from tile_loop import scaling_lines  # noqa: E402

from demaudit.workers.inputs.tiff_blocks import block_layout, read_band  # noqa: E402
from demaudit.workers.tile.datum import DEFAULT_GRID_DIRS  # noqa: E402

SAMPLE_S = 0.05
NMAD_FACTOR = 1.4826
GEOID_STEP_PX = 8  # the naive script's PROJ lattice


# -- contenders (run in a subprocess: this script with --contender) -----------------------------


def _read(path: str) -> np.ndarray:
    with rasterio.open(path) as src:
        data = src.read(1).astype(np.float64)
        nodata = src.nodata
    if nodata is not None:
        data[data == nodata] = np.nan
    return data


def _decode_one(path: str) -> int:
    with rasterio.open(path) as src:
        return int(src.read(1).size)


def _decode_own_one(path: str) -> int:
    """Read as demaudit's workers read a tile of a covered layout: its own block decoder."""
    fd = os.open(path, os.O_RDONLY)
    try:
        layout = block_layout(fd)
        band = read_band(fd, (layout.height, layout.width))
    finally:
        os.close(fd)
    if band is None:
        raise SystemExit(f"{path}: not a layout demaudit reads without GDAL")
    return int(band.size)


def _warped_reference(test_path: str, references: Sequence[str]) -> np.ndarray:
    """The references warped onto the test tile's grid (GDAL bilinear), NaN where none."""
    with rasterio.open(test_path) as src:
        shape, transform, crs = (src.height, src.width), src.transform, src.crs
    out = np.full(shape, np.nan)
    for ref in references:
        with rasterio.open(ref) as src:
            data = src.read(1)
            part = np.full(shape, np.nan, dtype=np.float32)
            reproject(
                data,
                part,
                src_transform=src.transform,
                src_crs=src.crs,
                src_nodata=src.nodata,
                dst_transform=transform,
                dst_crs=crs,
                dst_nodata=np.nan,
                resampling=Resampling.bilinear,
            )
        np.copyto(out, part, where=np.isnan(out) & ~np.isnan(part))
    return out


def _decode_warp_one(pair: tuple[str, list[str]]) -> int:
    test = _read(pair[0])
    _warped_reference(pair[0], pair[1])
    return int(test.size)


def _geoid_naive(test_path: str) -> np.ndarray:
    """N (metres) every GEOID_STEP_PX pixels by PROJ, repeated to every pixel."""
    with rasterio.open(test_path) as src:
        shape, transform, crs = (src.height, src.width), src.transform, src.crs
    rows = np.arange(0, shape[0], GEOID_STEP_PX) + GEOID_STEP_PX / 2
    cols = np.arange(0, shape[1], GEOID_STEP_PX) + GEOID_STEP_PX / 2
    x = transform.c + cols[None, :] * transform.a + 0 * rows[:, None]
    y = transform.f + rows[:, None] * transform.e + 0 * cols[None, :]
    lon, lat = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(x, y)
    for folder in DEFAULT_GRID_DIRS:  # where egm96_15.gtx is (else PROJ returns N = 0)
        pyproj.datadir.append_data_dir(folder)
    to_ellipsoid = pyproj.Transformer.from_crs("EPSG:4326+5773", "EPSG:4979", always_xy=True)
    _, _, n = to_ellipsoid.transform(lon, lat, np.zeros(lon.shape), errcheck=True)
    big = np.repeat(np.repeat(n, GEOID_STEP_PX, axis=0), GEOID_STEP_PX, axis=1)
    return big[: shape[0], : shape[1]]


def _stats(dh: np.ndarray) -> dict[str, float]:
    median = float(np.median(dh))
    absolute = np.abs(dh)
    q683, q95 = np.quantile(absolute, [0.683, 0.95])
    return {
        "count": int(dh.size),
        "median": median,
        "nmad": NMAD_FACTOR * float(np.median(np.abs(dh - median))),
        "q683_abs": float(q683),
        "q95_abs": float(q95),
        "rmse": float(np.sqrt(np.mean(dh * dh))),
    }


def _naive_one(job: tuple[str, list[str], bool]) -> tuple[dict[str, float], np.ndarray]:
    test_path, references, reprojected = job
    test = _read(test_path)
    if reprojected:
        reference = _warped_reference(test_path, references) + _geoid_naive(test_path)
    else:
        reference = _read(references[0])
    dh = test - reference
    dh = dh[np.isfinite(dh)]
    return _stats(dh), dh


def run_contender(name: str, plan_path: Path) -> None:
    plan_data = json.loads(plan_path.read_text())
    pairs = [(t, list(r)) for t, r in plan_data["pairs"]]
    spawn = multiprocessing.get_context("spawn")
    with spawn.Pool(WORKERS) as pool:
        if name in ("decode", "decode-own"):
            files = [t for t, _ in pairs] + sorted({r for _, refs in pairs for r in refs})
            one = _decode_one if name == "decode" else _decode_own_one
            for _ in pool.imap_unordered(one, files):
                pass
        elif name == "decode+warp":
            for _ in pool.imap_unordered(_decode_warp_one, pairs):
                pass
        elif name == "naive":
            reprojected = plan_data["kind"] == REPROJECTED
            jobs = [(t, refs, reprojected) for t, refs in pairs]
            every = [dh for _, dh in pool.imap(_naive_one, jobs)]
            everything = np.concatenate(every)
            print(json.dumps({"overall": _stats(everything)}))
        else:
            raise SystemExit(f"unknown contender {name}")


# -- measuring a subprocess ---------------------------------------------------------------------


def measure(command: list[str]) -> tuple[float, float, str, bool]:
    """Wall seconds, peak RSS (MiB) of the whole process tree, stdout of a command, and
    whether it ended with exit status 0."""
    started = time.perf_counter()
    proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = 0
    stop = threading.Event()

    def sample() -> None:
        nonlocal peak
        root = psutil.Process(proc.pid)
        while not stop.is_set():
            try:
                tree = [root, *root.children(recursive=True)]
                total = 0
                for p in tree:
                    with contextlib.suppress(psutil.Error):
                        total += p.memory_info().rss
                peak = max(peak, total)
            except psutil.Error:
                pass
            stop.wait(SAMPLE_S)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    out, err = proc.communicate()
    seconds = time.perf_counter() - started
    stop.set()
    sampler.join()
    if proc.returncode != 0:
        say(f"  FAILED ({proc.returncode}): {' '.join(command)}\n{err[-2000:]}")
    return seconds, peak / 2**20, out, proc.returncode == 0


def job_timings(summary_path: Path) -> dict[str, float] | None:
    """The job's own clock, seconds per phase (summary.json job.timings_s); None without it."""
    try:
        timings = json.loads(summary_path.read_text())["job"]["timings_s"]
    except (OSError, ValueError, KeyError, TypeError):
        return None
    return {str(k): float(v) for k, v in timings.items()}


def run_all(plan: Plan, work: Path, contenders: Sequence[str], *, round_no: int = 0) -> list[Run]:
    plan_path = work / f"plan-{plan.kind}-{plan.size}.json"
    plan_path.write_text(json.dumps({"kind": plan.kind, "pairs": plan.pairs}))
    spec = write_spec(plan, work / f"spec-{plan.kind}-{plan.size}")
    pixels = plan.test_pixels
    runs = []
    for contender in contenders:
        if contender.startswith("demaudit"):
            workers = contender.split("-w")[1]
            out_dir = work / f"out-{plan.kind}-{plan.size}-{workers}"
            shutil.rmtree(out_dir, ignore_errors=True)
            demaudit = str(Path(sys.executable).with_name("demaudit"))
            command = [demaudit, "run", str(spec), "--out", str(out_dir)]
            command += ["--workers", workers, "--quiet"]
        else:
            command = [sys.executable, __file__, "--contender", contender, "--plan", str(plan_path)]
        seconds, peak, output, ok = measure(command)
        load = os.getloadavg()[0]
        kind, size = plan.kind, plan.size
        run = Run(contender, kind, size, pixels, seconds, peak, output, load, ok, round_no)
        if contender.startswith("demaudit") and ok:
            run.timings = job_timings(out_dir / "summary.json")
        runs.append(run)
        say(
            f"  {plan.kind:<12}{plan.size:>4} tiles  {contender:<12}{seconds:8.1f} s"
            f"{pixels / seconds / 1e6:8.2f} Mpix/s (whole run){peak:9.0f} MiB peak, "
            f"load {load:.1f}"
        )
    return runs


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--quick", action="store_true", help="1 and 4 tiles of 1000 px")
    parser.add_argument(
        "--tiles", help="the two sizes in test tiles, e.g. 4,16 (default; quick 1,4)"
    )
    parser.add_argument("--pixels", type=int, help="test tile side (default 1500; quick 1000)")
    parser.add_argument("--cache", type=Path, default=Path("/tmp/demaudit-throughput"))
    parser.add_argument("--archives", default=f"{SAME_GRID},{REPROJECTED}")
    parser.add_argument(
        "--repeat",
        type=int,
        default=1,
        help="run every contender's two sizes this many times (marginal from the fastest)",
    )
    parser.add_argument(
        "--contenders",
        help="comma-separated subset of decode,decode-own,decode+warp,naive,demaudit-w2,"
        "demaudit-w1 "
        "(default all; leave naive out for large sizes: it holds every dh in memory)",
    )
    parser.add_argument(
        "--tile-loop",
        type=int,
        default=0,
        metavar="N",
        help="also time the tile work without Dask, N tiles in one process and then in two at "
        "once (tile_loop.py; --repeat rounds; same-grid archive; default off)",
    )
    parser.add_argument("--contender", help=argparse.SUPPRESS)
    parser.add_argument("--plan", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.contender:
        run_contender(args.contender, args.plan)
        return 0
    sizes = [int(v) for v in (args.tiles or ("1,4" if args.quick else "4,16")).split(",")]
    if len(sizes) != 2 or sizes[0] >= sizes[1]:
        raise SystemExit("--tiles takes two sizes, small first, e.g. 4,16")
    pixels = args.pixels or (1000 if args.quick else 1500)
    big, small = layout_of(sizes[1]), layout_of(sizes[0])
    if small.cols > big.cols or small.rows > big.rows:
        raise SystemExit("--tiles: the small block must fit in the large one")
    command = "python benchmarks/bench_throughput.py " + " ".join(sys.argv[1:])
    say("\n".join(machine_facts()))
    runs: list[Run] = []
    loop_lines: list[str] = []
    phase_table: dict[str, list[tuple[str, float]]] = {}
    work = args.cache / "runs"
    work.mkdir(parents=True, exist_ok=True)
    for kind in args.archives.split(","):
        folder = ensure_archive(args.cache, kind, big, pixels)
        contenders = ["decode", "naive", "demaudit-w2", "demaudit-w1"]
        if kind == SAME_GRID:
            contenders.insert(1, "decode-own")
        if kind == REPROJECTED:
            contenders.insert(1, "decode+warp")
        if args.contenders:
            contenders = [c for c in contenders if c in args.contenders.split(",")]
        plans = [make_plan(folder, kind, big, subset) for subset in (small, big)]
        say(f"  warm-up ({kind}): each contender once on the small size, not counted")
        for contender in contenders:  # numba's disk cache, the page cache, imports
            run_all(plans[0], work, [contender], round_no=-1)
        for round_no in range(args.repeat):  # contenders side by side in each round
            for contender in contenders:  # the two sizes back to back: a similar load
                for plan in plans:
                    runs += run_all(plan, work, [contender], round_no=round_no)
        spec = work / f"spec-{kind}-{small.count}" / "spec.yaml"
        phase_table[kind] = phases(spec)
        if args.tile_loop and kind == SAME_GRID:
            large = work / f"spec-{kind}-{big.count}" / "spec.yaml"
            loop_lines = scaling_lines(large, args.tile_loop, max(1, args.repeat))
    say(report(runs, sizes, pixels, phase_table, command))
    if loop_lines:
        say("\n".join(loop_lines))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
