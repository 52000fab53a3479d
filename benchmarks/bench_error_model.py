"""What the opt-in error model (spec section ``error_model:``) costs, and whether its client
memory stays flat as the archive grows. Prints measured figures; never run in CI.

1. ``--demo`` (``--demo-only``): the demo job (demo_tiles/demo.yaml, no checkpoints) run
   without and with ``error_model``, alternating, ``--rounds`` times each on one local cluster;
   median wall time, tile-task seconds summed over the workers (Dask task stream) and the
   client's fit (summary.json job.timings_s), and the error model's share of the run with it.
2. per tile (in process): summarise_pixels (the audit's own summaries) against
   tile_error_sample on synthetic tiles of 1 and 4 Mpx (processor time, best of 3).
3. client memory: tracemalloc peak of merging N synthetic tile samples (the sizes a 2,000 px
   square tile sends) and fitting the model, for N = 50, 200, 800.

    .venv/bin/python benchmarks/bench_error_model.py [--demo | --demo-only] [--rounds 3]
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


def _one_run(client, spec, out: Path) -> dict[str, float]:  # type: ignore[no-untyped-def]
    """Wall seconds, summed task seconds on the workers and the client phases of one run."""
    from distributed import get_task_stream

    from demaudit.service.run.runner import run_job
    from demaudit.workers import spec as job_spec

    start = time.perf_counter()
    with get_task_stream(client) as stream:
        doc = run_job(job_spec.resolve(spec, base_dir=ROOT / "demo_tiles"), out, client=client)
    wall = time.perf_counter() - start
    tasks = sum(
        s["stop"] - s["start"]
        for t in stream.data
        for s in t.get("startstops", ())
        if s.get("action") == "compute"
    )
    phases = doc["job"]["timings_s"]
    return {"wall": wall, "tasks": tasks, "fit": phases.get("error_model", 0.0)}


def demo(rounds: int) -> None:
    """The demo job without and with ``error_model``, alternating (rounds times each, on one
    cluster, after one run not counted); the medians and the error model's share of the run."""
    from demaudit.service.run.cluster import dask_client
    from demaudit.workers import spec as job_spec

    base = job_spec.load_spec_file(ROOT / "demo_tiles" / "demo.yaml")
    base.pop("checkpoints", None)
    runs: dict[str, list[dict[str, float]]] = {"without": [], "with": []}
    print(f"demo job, {rounds} alternating rounds (2 local workers)")
    with dask_client(None, workers=2, memory_limit="2GiB") as client:
        warm = job_spec.parse_spec(base | {"error_model": {}})  # compiles the workers' kernels
        _one_run(client, warm, Path("/tmp") / "bench_error_model_warm")
        for _ in range(rounds):
            for label, extra in (("without", {}), ("with", {"error_model": {}})):
                spec = job_spec.parse_spec(base | extra)
                out = Path("/tmp") / f"bench_error_model_{label}"
                runs[label].append(_one_run(client, spec, out))
    median = {
        label: {k: float(np.median([r[k] for r in rs])) for k in ("wall", "tasks", "fit")}
        for label, rs in runs.items()
    }
    for label, m in median.items():
        print(
            f"  {label:7s} error model: wall {m['wall']:6.1f} s, tile tasks {m['tasks']:6.1f} s "
            f"(summed over workers), client fit {m['fit']:5.1f} s   [medians]"
        )
    w, wo = median["with"], median["without"]
    wall_share = (w["wall"] - wo["wall"]) / w["wall"]
    print(
        f"  error model share of a full run with it: wall {wall_share:.0%}"
        f", tile tasks {(w['tasks'] - wo['tasks']) / w['tasks']:.0%}, client fit "
        f"{w['fit'] / w['wall']:.0%} of the wall time"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--demo", action="store_true", help="also run the demo job")
    parser.add_argument("--rounds", type=int, default=3, help="demo runs without and with")
    parser.add_argument("--demo-only", action="store_true", help="only the demo job")
    args = parser.parse_args()
    if not args.demo_only:
        per_tile()
        client_memory()
    if args.demo or args.demo_only:
        demo(args.rounds)


if __name__ == "__main__":
    main()
