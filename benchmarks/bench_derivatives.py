"""What the opt-in derived-parameter comparison (spec section ``derivatives:``) costs. Prints
measured figures; never run in CI.

1. per tile (in process, processor seconds, best of 3) on synthetic tiles of 1 and 4 Mpx: the
   audit's own dh summaries (summarise_pixels) against the whole derived comparison
   (tile_derivatives: both surfaces' parameters, four keyed summaries, D8 counts, overviews),
   and one surface's parameters by the compiled sweep against the numpy functions.
2. per demo tile (in process, processor seconds, best of 3): audit_tile on three test tiles of
   the demo archive (read, align, datum, dh summaries; with land cover, no regions) without and
   with the derived comparison: its share of a tile task's processor time.
3. ``--demo``: the demo job (demo_tiles/demo.yaml, no checkpoints) run on one local cluster
   without and with ``derivatives: {}`` (each twice, alternating; the faster of each is kept):
   wall times, the tile phase (summary.json job.timings_s) and the derivatives' share of the run.

    .venv/bin/python benchmarks/bench_derivatives.py [--demo]
"""

from __future__ import annotations

import argparse
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from demaudit.workers.tile.derivative_pass import DerivativeOptions, tile_derivatives
from demaudit.workers.tile.derivatives import surface_derivatives
from demaudit.workers.tile.one_pass import summarise_pixels
from demaudit.workers.tile.strata import ClassInfo

ROOT = Path(__file__).resolve().parents[1]
CLASSES = (ClassInfo(1, "open", "non_vegetated"), ClassInfo(2, "forest", "vegetated"))
EDGES = (0.0, 5.0, 15.0, 30.0, 45.0)


def best_of(fn: Callable[[], object], repeat: int = 3) -> float:
    times = []
    for _ in range(repeat):
        start = time.process_time()
        fn()
        times.append(time.process_time() - start)
    return min(times)


def synthetic_tile(n: int, seed: int) -> dict[str, Any]:
    """Hilly terrain at 5 m, a test with 0.5 m noise, two land-cover classes."""
    rng = np.random.default_rng(seed)
    row, col = np.mgrid[0:n, 0:n].astype(np.float64)
    reference = 80 * np.sin(row / 90) + 60 * np.cos(col / 70) + 0.2 * row
    test = reference + rng.normal(scale=0.5, size=reference.shape)
    landcover = rng.integers(1, 3, size=reference.shape).astype(np.float64)
    return {"test": test, "reference": reference, "landcover": landcover}


def per_tile() -> None:
    print("per tile, processor seconds (best of 3)")
    for n in (1000, 2000):
        audit, derived, compiled, numpy = measure(synthetic_tile(n, 0))
        print(
            f"  {n * n / 1e6:.0f} Mpx: dh summaries {audit:.3f} s, derived comparison "
            f"{derived:.3f} s ({derived / audit:.1f}x the dh summaries); one surface's "
            f"parameters: compiled {compiled:.3f} s, numpy {numpy:.3f} s"
        )


def measure(t: dict[str, Any]) -> tuple[float, float, float, float]:
    """Processor seconds of dh's summaries, the derived comparison, one surface's parameters
    compiled and by numpy."""
    test, reference = t["test"], t["reference"]
    common: dict[str, Any] = {
        "landcover": t["landcover"],
        "region_masks": {"A": np.ones(test.shape, bool)},
        "classes": CLASSES,
        "slope_edges": EDGES,
        "pixel_size_m": (5.0, 5.0),
    }
    size = {"pixel_size_x_m": 5.0, "pixel_size_y_m": 5.0}
    options = DerivativeOptions()
    return (
        best_of(lambda: summarise_pixels(test - reference, reference=reference, **common)),
        best_of(
            lambda: tile_derivatives(test, reference, options=options, overview_factor=8, **common)
        ),
        best_of(lambda: surface_derivatives(reference, **size)),
        best_of(lambda: surface_derivatives(reference, **size, compiled=False)),
    )


def demo_tiles() -> None:
    from dataclasses import replace

    from demaudit.workers import spec as job_spec
    from demaudit.workers.inputs.catalog import scan_landcover_tile, scan_tile
    from demaudit.workers.inputs.tile_index import TileIndex
    from demaudit.workers.tile.task import TileOptions, audit_tile

    raw = job_spec.load_spec_file(ROOT / "demo_tiles" / "demo.yaml")
    raw.pop("checkpoints", None)
    job = job_spec.resolve(job_spec.parse_spec(raw), base_dir=ROOT / "demo_tiles")
    options = replace(TileOptions.from_spec(job.spec), derivatives=None)
    derived = replace(options, derivatives=DerivativeOptions())
    references = TileIndex([scan_tile(p) for p in job.reference_tiles])  # type: ignore[misc]
    cover = TileIndex([scan_landcover_tile(p) for p in job.landcover_tiles])  # type: ignore[misc]
    print("per demo tile, processor seconds (best of 3): audit_tile without / with derivatives")
    for path in job.test_tiles[:3]:
        tile: Any = scan_tile(path)
        refs, lc = references.overlapping(tile.grid), cover.overlapping(tile.grid)
        without = best_of(lambda: audit_tile(tile, refs, [], options, lc))  # noqa: B023
        with_ = best_of(lambda: audit_tile(tile, refs, [], derived, lc))  # noqa: B023
        print(
            f"  {tile.tile_id} ({tile.grid.width} x {tile.grid.height} px): {without:.3f} s / "
            f"{with_:.3f} s: derivatives {(with_ - without) / with_:.0%} of the task with them"
        )


def demo() -> None:
    from demaudit.service.run.cluster import dask_client
    from demaudit.service.run.runner import run_job
    from demaudit.workers import spec as job_spec

    base = job_spec.load_spec_file(ROOT / "demo_tiles" / "demo.yaml")
    base.pop("checkpoints", None)
    print(f"demo job, wall seconds (2 local workers; load average {os.getloadavg()[0]:.1f})")
    best: dict[str, tuple[float, dict[str, float]]] = {}
    with dask_client(None, workers=2, memory_limit="2GiB") as client:
        for label in ("without", "with", "without", "with"):
            extra = {"derivatives": {}} if label == "with" else {}
            spec = job_spec.parse_spec(base | extra)
            out = Path("/tmp") / f"bench_derivatives_{label}"
            start = time.perf_counter()
            doc = run_job(job_spec.resolve(spec, base_dir=ROOT / "demo_tiles"), out, client=client)
            wall = time.perf_counter() - start
            phases = doc["job"]["timings_s"]
            print(f"  {label} derivatives: {wall:.1f} s; phases {phases}")
            if label not in best or wall < best[label][0]:
                best[label] = (wall, phases)
    (without, _), (with_, _) = best["without"], best["with"]
    print(
        f"  faster of two: without {without:.1f} s, with {with_:.1f} s: the derivatives are "
        f"{(with_ - without) / with_:.0%} of the run with them (+{with_ / without - 1:.0%})"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--demo", action="store_true", help="also run the demo job")
    args = parser.parse_args()
    per_tile()
    demo_tiles()
    if args.demo:
        demo()


if __name__ == "__main__":
    main()
