"""Cost and error of the geoid undulation N on one tile, three ways.

Run:  .venv/bin/python benchmarks/bench_geoid.py [--pixels 1500] [--repeat 7]

For tiles of 30 m and 90 m pixels over steep EGM96 (Puerto Rico trench, Himalaya) it times
  former  N from PROJ on a 64-pixel lattice, interpolated linearly (demaudit before issue 11),
  grid    demaudit.workers.tile.datum.undulation_on_grid (the geoid grid's bilinear form at every
  pixel),
  proj    PROJ at every pixel centre (exact, the reference),
and prints each one's best and median processor time (this process, all threads) and its
largest |error| against the reference. Numbers vary with whatever else the machine runs; the
three are interleaved so they share it.
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable

import numpy as np
from pyproj import CRS, Transformer

from demaudit.workers.tile.datum import LonLatLattice, geoid_undulation, undulation_on_grid
from demaudit.workers.tile.grid import Grid

SITES = {
    "puerto_rico_trench": (32619, 760_000.0, 2_130_000.0),
    "himalaya": (32644, 330_000.0, 3_345_000.0),
}
VERTICAL = "EPSG:5773"


def former(grid: Grid) -> np.ndarray:
    lattice = LonLatLattice.of(grid, step_px=64)
    return lattice.to_pixels(geoid_undulation(lattice.lon, lattice.lat, vertical_crs=VERTICAL))


def per_pixel(grid: Grid) -> np.ndarray:
    rows, cols = np.indices(grid.shape, dtype=np.float64)
    x, y = grid.pixel_centres(rows, cols)
    lon, lat = Transformer.from_crs(grid.pyproj_crs, 4326, always_xy=True).transform(x, y)
    return geoid_undulation(lon, lat, vertical_crs=VERTICAL)


def on_grid(grid: Grid) -> np.ndarray:
    return undulation_on_grid(grid, vertical_crs=VERTICAL)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--pixels", type=int, default=1500)
    parser.add_argument("--repeat", type=int, default=7)
    args = parser.parse_args()
    methods: dict[str, Callable[[Grid], np.ndarray]] = {
        "former": former,
        "grid": on_grid,
        "proj": per_pixel,
    }
    for site, (epsg, left, top) in SITES.items():
        for res in (30.0, 90.0):
            grid = Grid(
                CRS.from_epsg(epsg).to_wkt(),
                (res, 0.0, left, 0.0, -res, top),
                args.pixels,
                args.pixels,
            )
            reference = per_pixel(grid)
            times: dict[str, list[float]] = {name: [] for name in methods}
            errors = {}
            for _ in range(args.repeat):
                for name, method in methods.items():
                    t0 = time.process_time()
                    n = method(grid)
                    times[name].append(time.process_time() - t0)
                    errors[name] = float(np.max(np.abs(n - reference)))
            print(f"{site}, {res:g} m pixels, {args.pixels} x {args.pixels}:")
            for name in methods:
                best, median = min(times[name]), statistics.median(times[name])
                print(
                    f"  {name:7s} best {best * 1000:8.1f} ms  median {median * 1000:8.1f} ms"
                    f"  max |error| {errors[name] * 1000:8.4f} mm"
                )


if __name__ == "__main__":
    main()
