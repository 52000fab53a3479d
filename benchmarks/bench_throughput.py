"""Throughput benchmark: demaudit against the decode limit and against a naive numpy script.

Run from the repository root:

    .venv/bin/python benchmarks/bench_throughput.py            # 4 and 16 tiles of 1500 px
    .venv/bin/python benchmarks/bench_throughput.py --quick    # 1 and 4 tiles of 1000 px
    .venv/bin/python benchmarks/bench_throughput.py --tiles 16,64 --pixels 1500

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
* ``decode+warp`` (reprojected archive only): per test tile, read it and warp the overlapping
  reference tiles onto its grid with GDAL (rasterio.warp.reproject, bilinear), in 2 processes;
* ``naive``: a script a user writes in an afternoon: per test tile (2 processes) read both (and
  for the reprojected archive warp as above and add N from PROJ evaluated every 8th pixel,
  nearest-neighbour upsampled), subtract, numpy median / NMAD / quantiles per tile, and the
  region figures by concatenating every dh in memory in the parent;
* ``demaudit``: ``demaudit run SPEC --workers 2 --quiet`` (default options, one region covering
  the domain, local cluster), and again with ``--workers 1`` for the scaling ratio.

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
import datetime as dt
import json
import math
import multiprocessing
import os
import platform
import shutil
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import psutil
import pyproj
import rasterio
import yaml
from rasterio.transform import Affine
from rasterio.warp import Resampling, reproject, transform_bounds

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from demaudit.workers.demo.archive import make_demo_archive  # noqa: E402
from demaudit.workers.demo.options import (  # noqa: E402
    LIDAR_NOISE_M,
    NODATA,
    TEST_CRS,
    DemoArchiveOptions,
    RandomStream,
)
from demaudit.workers.demo.release import release_tile  # noqa: E402
from demaudit.workers.demo.surface import true_terrain  # noqa: E402
from demaudit.workers.demo.world import build_world  # noqa: E402
from demaudit.workers.tile.datum import DEFAULT_GRID_DIRS  # noqa: E402

WORKERS = 2
SAMPLE_S = 0.05
NMAD_FACTOR = 1.4826
GEOID_STEP_PX = 8  # the naive script's PROJ lattice
REPEATS = 3
SAME_GRID, REPROJECTED = "same-grid", "reprojected"


def say(message: str = "") -> None:
    print(message, flush=True)


# -- archives -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Layout:
    """Tiles as a cols x rows block."""

    cols: int
    rows: int

    @property
    def count(self) -> int:
        return self.cols * self.rows


def layout_of(count: int) -> Layout:
    cols = math.ceil(math.sqrt(count))
    if count % cols:
        raise SystemExit(f"--tiles: {count} tiles do not make a block (use 1, 2, 4, 9, 16, 64...)")
    return Layout(cols, count // cols)


def demo_options(layout: Layout, pixels: int) -> DemoArchiveOptions:
    return DemoArchiveOptions(
        tiles_x=layout.cols, tiles_y=layout.rows, pixels=pixels, write_update=False
    )


def _write_float32(path: Path, heights: np.ndarray, transform: Affine) -> None:
    data = np.where(np.isnan(heights), NODATA, heights).astype(np.float32)
    profile = {
        "driver": "GTiff",
        "width": data.shape[1],
        "height": data.shape[0],
        "count": 1,
        "dtype": "float32",
        "crs": TEST_CRS,
        "transform": transform,
        "nodata": NODATA,
        "compress": "deflate",
        "predictor": 3,
        "tiled": True,
        "blockxsize": 256,
        "blockysize": 256,
    }
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data, 1)


def _same_grid_tile(folder: Path, options: DemoArchiveOptions, col: int, row: int) -> None:
    """One test tile and its reference on the same grid (worker process)."""
    world = build_world(options)
    grid = world.grid
    tile_id = grid.tile_id(col, row)
    west, north = grid.tile_origin(col, row)
    transform = Affine(grid.pixel_size_m, 0.0, west, 0.0, -grid.pixel_size_m, north)
    _write_float32(
        folder / "test" / f"{tile_id}.tif", release_tile(world, col, row).heights, transform
    )
    rng = np.random.default_rng([options.seed, RandomStream.REFERENCE, col, row])
    reference = true_terrain(world, *grid.pixel_axes(col, row))
    reference += LIDAR_NOISE_M * rng.standard_normal(reference.shape)
    _write_float32(folder / "reference" / f"{tile_id}.tif", reference, transform)


def make_same_grid(folder: Path, options: DemoArchiveOptions) -> None:
    for sub in ("test", "reference"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    tiles = [(c, r) for r in range(options.tiles_y) for c in range(options.tiles_x)]
    spawn = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(WORKERS, mp_context=spawn) as pool:
        for done, _ in enumerate(
            pool.map(
                _same_grid_tile, *zip(*[(folder, options, c, r) for c, r in tiles], strict=True)
            ),
            start=1,
        ):
            print(f"\r  same-grid tiles {done}/{len(tiles)}", end="", flush=True)
    say()


def ensure_archive(cache: Path, kind: str, layout: Layout, pixels: int) -> Path:
    """The archive folder, made (and timed) unless the cache holds it already."""
    options = demo_options(layout, pixels)
    folder = cache / f"{kind}-{layout.cols}x{layout.rows}-{pixels}"
    marker = folder / "bench_options.json"
    wanted = json.dumps({"kind": kind, **options.__dict__}, sort_keys=True)
    if marker.is_file() and marker.read_text() == wanted:
        say(f"[archive] {kind}: reusing {folder}")
        return folder
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True)
    started = time.perf_counter()
    if kind == SAME_GRID:
        make_same_grid(folder, options)
    else:
        make_demo_archive(
            folder,
            options,
            progress=lambda done, total: print(
                f"\r  demo archive tasks {done}/{total}", end="", flush=True
            ),
        )
        say()
    seconds = time.perf_counter() - started
    say(f"[archive] {kind}: {layout.count} tiles of {pixels} px made in {seconds:.1f} s")
    marker.write_text(wanted)
    return folder


# -- plans: which files each size reads ---------------------------------------------------------


@dataclass
class Plan:
    """What one size of one archive reads: test tiles, each with its overlapping references."""

    kind: str
    size: int
    pairs: list[tuple[str, list[str]]]
    reference_vertical_crs: str

    @property
    def references(self) -> list[str]:
        return sorted({r for _, refs in self.pairs for r in refs})

    @property
    def test_pixels(self) -> int:
        total = 0
        for test, _ in self.pairs:
            with rasterio.open(test) as src:
                total += src.width * src.height
        return total


def _bounds(path: Path) -> tuple[str, tuple[float, float, float, float]]:
    with rasterio.open(path) as src:
        return src.crs.to_wkt(), tuple(src.bounds)


def make_plan(folder: Path, kind: str, layout: Layout, subset: Layout) -> Plan:
    options = demo_options(layout, 8)
    grid = build_world(options).grid
    tests = [grid.tile_id(c, r) for r in range(subset.rows) for c in range(subset.cols)]
    if kind == SAME_GRID:
        pairs = [
            (str(folder / "test" / f"{t}.tif"), [str(folder / "reference" / f"{t}.tif")])
            for t in tests
        ]
        return Plan(kind, subset.count, pairs, "ellipsoidal")
    references = {p: _bounds(p) for p in sorted((folder / "lidar_2021").glob("*.tif"))}
    pairs = []
    for t in tests:
        path = folder / "release_2026_11" / f"{t}.tif"
        crs, box = _bounds(path)
        overlapping = []
        for ref, (ref_crs, ref_box) in references.items():
            left, bottom, right, top = transform_bounds(crs, ref_crs, *box, densify_pts=21)
            if (
                left < ref_box[2]
                and right > ref_box[0]
                and bottom < ref_box[3]
                and top > ref_box[1]
            ):
                overlapping.append(str(ref))
        pairs.append((str(path), overlapping))
    return Plan(kind, subset.count, pairs, "EPSG:5773")


def write_spec(plan: Plan, folder: Path) -> Path:
    """A demaudit job spec for the plan: one region (the domain), default options."""
    folder.mkdir(parents=True, exist_ok=True)
    boxes = [_bounds(Path(t))[1] for t, _ in plan.pairs]
    west, south = min(b[0] for b in boxes), min(b[1] for b in boxes)
    east, north = max(b[2] for b in boxes), max(b[3] for b in boxes)
    to_lonlat = pyproj.Transformer.from_crs(TEST_CRS, "EPSG:4326", always_xy=True)
    lon0, lat0, lon1, lat1 = to_lonlat.transform_bounds(
        west - 100, south - 100, east + 100, north + 100, densify_pts=21
    )
    region = {
        "type": "FeatureCollection",
        "features": [
            {
                "type": "Feature",
                "properties": {"code": "ALL"},
                "geometry": {
                    "type": "Polygon",
                    "coordinates": [
                        [[lon0, lat0], [lon1, lat0], [lon1, lat1], [lon0, lat1], [lon0, lat0]]
                    ],
                },
            }
        ],
    }
    (folder / "region.geojson").write_text(json.dumps(region))
    spec = {
        "name": f"throughput-{plan.kind}-{plan.size}",
        "test": {
            "tiles": [t for t, _ in plan.pairs],
            "vertical_crs": "ellipsoidal",
            "units": "metre",
        },
        "reference": {
            "tiles": plan.references,
            "vertical_crs": plan.reference_vertical_crs,
            "units": "metre",
        },
        "region": {"file": "region.geojson", "id_property": "code"},
    }
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec))
    return path


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
        if name == "decode":
            files = [t for t, _ in pairs] + sorted({r for _, refs in pairs for r in refs})
            for _ in pool.imap_unordered(_decode_one, files):
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


@dataclass
class Run:
    contender: str
    kind: str
    size: int
    pixels: int
    seconds: float
    peak_mib: float
    output: str = ""
    load: float = 0.0
    ok: bool = True  # a failed run (exit status not 0) counts in no figure


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


def run_all(plan: Plan, work: Path, contenders: Sequence[str]) -> list[Run]:
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
        runs.append(Run(contender, plan.kind, plan.size, pixels, seconds, peak, output, load, ok))
        say(
            f"  {plan.kind:<12}{plan.size:>4} tiles  {contender:<12}{seconds:8.1f} s"
            f"{pixels / seconds / 1e6:8.2f} Mpix/s (whole run){peak:9.0f} MiB peak, "
            f"load {load:.1f}"
        )
    return runs


# -- phases of one tile -------------------------------------------------------------------------


def best_of(fn: Callable[[], Any]) -> tuple[float, Any]:
    best, value = math.inf, None
    for _ in range(REPEATS):
        started = time.perf_counter()
        value = fn()
        best = min(best, time.perf_counter() - started)
    return best, value


def phases(spec_path: Path) -> list[tuple[str, float]]:
    """Seconds per phase of the first test tile, calling the worker functions directly."""
    from demaudit.workers import spec as job_spec
    from demaudit.workers.inputs import regions as region_ops
    from demaudit.workers.inputs.catalog import TileIndex, TileInfo, scan_tile
    from demaudit.workers.inputs.rasters import read_tile
    from demaudit.workers.tile import task as tile_task
    from demaudit.workers.tile.datum import to_metres, vertical_offset_on_grid
    from demaudit.workers.tile.difference import block_mean, difference

    job = job_spec.resolve(
        job_spec.parse_spec(job_spec.load_spec_file(spec_path)), base_dir=spec_path.parent
    )
    options = tile_task.TileOptions.from_spec(job.spec)
    test = scan_tile(job.test_tiles[0])
    references = [s for s in (scan_tile(p) for p in job.reference_tiles) if isinstance(s, TileInfo)]
    assert isinstance(test, TileInfo)
    refs = TileIndex(references).overlapping(test.grid)
    regions: list[Any] = []
    if job.region_file is not None and job.spec.region is not None:
        regions = region_ops.read_regions(job.region_file, id_property=job.spec.region.id_property)
        regions = region_ops.clip_to(region_ops.to_crs(regions, test.grid.crs), test.bounds)
    out: list[tuple[str, float]] = []
    seconds, heights = best_of(
        lambda: to_metres(read_tile(test, units=options.test_units), options.test_units)
    )
    out.append(("read test tile", seconds))
    seconds, mosaics = best_of(
        lambda: tile_task.read_mosaics(refs, test.grid, nodata=None, units=options.reference_units)
    )
    out.append((f"read reference ({len(refs)} tile(s))", seconds))
    seconds, aligned = best_of(
        lambda: tile_task.mosaics_onto(mosaics, test.grid, resampling=options.resampling)
    )
    out.append(("align (warp onto the test grid)", seconds))
    seconds, offset = best_of(
        lambda: vertical_offset_on_grid(
            test.grid,
            from_crs=options.reference_vertical_crs,
            to_crs=options.test_vertical_crs,
            grid_dirs=options.grid_dirs,
        )
    )
    out.append(("datum (geoid offset)", seconds))
    reference = aligned if offset is None else aligned + offset
    seconds, dh = best_of(lambda: difference(heights, reference))
    out.append(("difference", seconds))
    layers = tile_task.TileSurfaces(dh, reference, None, heights)
    seconds, _ = best_of(lambda: tile_task.summarise_tile(test, layers, regions, options))
    out.append(("slope, strata and summaries (summarise_tile)", seconds))
    seconds, _ = best_of(lambda: block_mean(dh, options.overview_factor))
    out.append(("overview (block mean)", seconds))
    seconds, _ = best_of(lambda: tile_task.audit_tile(test, refs, regions, options))
    out.append(("whole audit_tile", seconds))
    return out


# -- report -------------------------------------------------------------------------------------


@dataclass
class Marginal:
    mpix_s: float
    peaks: tuple[float, float]


def marginal(runs: Sequence[Run], contender: str, kind: str) -> Marginal | None:
    mine = sorted(
        (r for r in runs if r.contender == contender and r.kind == kind and r.ok),
        key=lambda r: r.size,
    )
    if len(mine) < 2 or mine[-1].seconds <= mine[0].seconds:
        return None
    small, big = mine[0], mine[-1]
    return Marginal(
        (big.pixels - small.pixels) / (big.seconds - small.seconds) / 1e6,
        (small.peak_mib, big.peak_mib),
    )


def machine_facts() -> list[str]:
    with open("/proc/meminfo") as fh:
        total_kib = int(fh.readline().split()[1])
    return [
        f"cores: {os.cpu_count()}, memory {total_kib / 2**20:.1f} GiB, python "
        f"{platform.python_version()}, numpy {np.__version__}, rasterio {rasterio.__version__}",
        "load average (1/5/15 min): " + ", ".join(f"{v:.2f}" for v in os.getloadavg()),
    ]


def report(
    runs: Sequence[Run],
    sizes: Sequence[int],
    pixels: int,
    phase_table: dict[str, list[tuple[str, float]]],
    command: str,
) -> str:
    lines = [
        "=" * 100,
        f"demaudit throughput benchmark, {dt.datetime.now(dt.UTC).isoformat(timespec='seconds')}",
        f"command: {command}",
    ]
    lines += machine_facts()
    lines.append(
        f"sizes: {sizes[0]} and {sizes[1]} test tiles of {pixels} x {pixels} px; "
        "marginal = extra pixels / extra seconds"
    )
    lines.append("")
    header = (
        f"{'archive':<13}{'contender':<14}{'marginal Mpix/s':>16}"
        f"{'peak MiB small -> large':>26}{'seconds small / large':>24}{'load 1 min':>14}"
    )
    lines.append(header)
    for kind in (SAME_GRID, REPROJECTED):
        for contender in ("decode", "decode+warp", "naive", "demaudit-w2", "demaudit-w1"):
            mine = sorted(
                (r for r in runs if r.contender == contender and r.kind == kind),
                key=lambda r: r.size,
            )
            if not mine:
                continue
            m = marginal(runs, contender, kind)
            rate = f"{m.mpix_s:.2f}" if m else "n/a"
            if not all(r.ok for r in mine):
                rate = "FAILED"
            peaks = f"{mine[0].peak_mib:,.0f} -> {mine[-1].peak_mib:,.0f}"
            secs = " / ".join(f"{r.seconds:.1f}" for r in mine)
            loads = " / ".join(f"{r.load:.1f}" for r in mine)
            lines.append(f"{kind:<13}{contender:<14}{rate:>16}{peaks:>26}{secs:>24}{loads:>14}")
    lines.append("")
    for kind, limit in ((SAME_GRID, "decode"), (REPROJECTED, "decode+warp")):
        d2, d1 = marginal(runs, "demaudit-w2", kind), marginal(runs, "demaudit-w1", kind)
        lim, naive = marginal(runs, limit, kind), marginal(runs, "naive", kind)
        parts = [f"{kind}:"]
        if d2 and lim:
            parts.append(f"demaudit/{limit} {d2.mpix_s / lim.mpix_s:.2f}")
        if d2 and naive:
            parts.append(f"demaudit/naive {d2.mpix_s / naive.mpix_s:.2f}")
        if d2 and d1:
            parts.append(f"2 workers / 1 worker {d2.mpix_s / d1.mpix_s:.2f}")
        lines.append("  ".join(parts))
    for kind, table in phase_table.items():
        lines.append("")
        lines.append(
            f"phases of one {pixels} px tile, {kind} (best of {REPEATS}, this process, seconds):"
        )
        for name, seconds in table:
            lines.append(f"  {name:<48}{seconds:8.3f}")
    naive_out = [r for r in runs if r.contender == "naive" and r.output.strip()]
    if naive_out:
        lines.append("")
        lines.append("naive script's overall figures (a sanity check against summary.json):")
        for r in naive_out:
            lines.append(f"  {r.kind} {r.size} tiles: {r.output.strip()}")
    lines.append("=" * 100)
    return "\n".join(lines)


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
    phase_table: dict[str, list[tuple[str, float]]] = {}
    work = args.cache / "runs"
    work.mkdir(parents=True, exist_ok=True)
    for kind in args.archives.split(","):
        folder = ensure_archive(args.cache, kind, big, pixels)
        contenders = ["decode", "naive", "demaudit-w2", "demaudit-w1"]
        if kind == REPROJECTED:
            contenders.insert(1, "decode+warp")
        plans = [make_plan(folder, kind, big, subset) for subset in (small, big)]
        for contender in contenders:  # the two sizes back to back: they see a similar load
            for plan in plans:
                runs += run_all(plan, work, [contender])
        spec = work / f"spec-{kind}-{small.count}" / "spec.yaml"
        phase_table[kind] = phases(spec)
    say(report(runs, sizes, pixels, phase_table, command))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
