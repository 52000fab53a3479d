"""What the opt-in error model (spec section ``error_model:``) costs, and whether its client
memory stays flat as the archive grows. Prints measured figures; never run in CI.

1. ``--demo``: the demo job (demo_tiles/demo.yaml, no checkpoints) run twice on one local
   cluster, without and with ``error_model``; wall times and the runs' phases
   (summary.json job.timings_s), the error model's share of the run.
2. per tile (in process): summarise_pixels (the audit's own summaries) against
   tile_error_sample on synthetic tiles of 1 and 4 Mpx (processor time, best of 3).
3. client memory: tracemalloc peak of merging N synthetic tile samples (the sizes a 2,000 px
   square tile sends) and fitting the model, for N = 50, 200, 800.

    .venv/bin/python benchmarks/bench_error_model.py [--demo]
"""

from __future__ import annotations

import argparse
import time
import tracemalloc
from dataclasses import replace
from pathlib import Path

import numpy as np

from demaudit.workers.tile.one_pass import summarise_pixels
from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.uncertainty import error_model as em

ROOT = Path(__file__).resolve().parents[1]
CLASSES = (ClassInfo(1, "open", "non_vegetated"), ClassInfo(2, "forest", "vegetated"))


def synthetic_tile(n: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    axis = np.arange(n) * 5.0
    reference = 40 * np.sin(axis / 300)[None, :] + 30 * np.cos(axis / 170)[:, None]
    dh = rng.standard_normal((n, n)) * 0.3
    landcover = np.where(rng.random((n, n)) < 0.7, 1.0, 2.0)
    return {"dh": dh, "reference": reference, "landcover": landcover}


def sample_of(tile: dict[str, np.ndarray], tile_id: str, offset: float) -> em.TileErrorSample:
    n = tile["dh"].shape[0]
    return em.tile_error_sample(
        tile["dh"],
        reference=tile["reference"],
        landcover=tile["landcover"],
        classes=CLASSES,
        region_masks={"A": np.ones((n, n), bool)},
        pixel_centres=lambda r, c: (offset + (c + 0.5) * 5.0, (r + 0.5) * 5.0),
        crs="EPSG:32632",
        pixel_size_m=(5.0, 5.0),
        tile_id=tile_id,
        options=em.ErrorModelOptions(seed=1),
    )


def best_of(fn, repeat: int = 3) -> float:  # type: ignore[no-untyped-def]
    times = []
    for _ in range(repeat):
        start = time.process_time()
        fn()
        times.append(time.process_time() - start)
    return min(times)


def per_tile() -> None:
    print("per tile, processor seconds (best of 3)")
    for n in (1000, 2000):
        tile = synthetic_tile(n, 0)
        audit = best_of(
            lambda t=tile, n=n: summarise_pixels(
                t["dh"],
                reference=t["reference"],
                landcover=t["landcover"],
                region_masks={"A": np.ones((n, n), bool)},
                classes=CLASSES,
                slope_edges=(0, 5, 15, 30, 45),
                pixel_size_m=(5.0, 5.0),
            )
        )
        extra = best_of(lambda t=tile: sample_of(t, "t", 0.0))
        print(
            f"  {n * n / 1e6:.0f} Mpx: summaries {audit:.3f} s, error-model sample {extra:.3f} s "
            f"(+{extra / audit:.0%} of the summaries)"
        )


def client_memory() -> None:
    print("client: merge N tile samples and fit (tracemalloc peak, wall seconds)")
    tile = synthetic_tile(400, 0)
    for count in (50, 200, 800):
        samples = [sample_of(tile, f"t{i}", 2000.0 * i) for i in range(4)]
        tracemalloc.start()
        start = time.perf_counter()
        acc = em.ErrorModelAccumulator(max_points=100_000)
        rng = np.random.default_rng(count)
        for i in range(count):  # a fresh priority per tile, as distinct tiles have
            s = samples[i % 4]
            acc.add(replace(s, priority=rng.random(len(s.priority)), x=s.x + 2000.0 * i))
        model = em.fit_error_model(acc, max_distance_m=5000.0, seed=0)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        print(
            f"  {count:4d} tiles: peak {peak / 2**20:6.1f} MiB, "
            f"{time.perf_counter() - start:5.1f} s, {model.samples} samples kept"
        )


def demo() -> None:
    from demaudit.service.run.cluster import dask_client
    from demaudit.service.run.runner import run_job
    from demaudit.workers import spec as job_spec

    base = job_spec.load_spec_file(ROOT / "demo_tiles" / "demo.yaml")
    base.pop("checkpoints", None)
    print("demo job, wall seconds (2 local workers)")
    with dask_client(None, workers=2, memory_limit="2GiB") as client:
        for label, extra in (("without", {}), ("with", {"error_model": {}})):
            spec = job_spec.parse_spec(base | extra)
            out = Path("/tmp") / f"bench_error_model_{label}"
            start = time.perf_counter()
            doc = run_job(
                job_spec.resolve(spec, base_dir=ROOT / "demo_tiles"), out, client=client
            )
            wall = time.perf_counter() - start
            phases = doc["job"]["timings_s"]
            print(f"  {label} error model: {wall:.1f} s; phases {phases}")
            if label == "with":
                fit = phases.get("error_model", 0.0)
                print(f"  client fit: {fit:.1f} s = {fit / wall:.0%} of the run")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--demo", action="store_true", help="also run the demo job twice")
    args = parser.parse_args()
    per_tile()
    client_memory()
    if args.demo:
        demo()


if __name__ == "__main__":
    main()
