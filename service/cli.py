"""The ``demaudit`` command line: run a job spec, run the shipped demo, make a demo archive."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from tqdm import tqdm

from service.cluster import dask_client
from service.runner import run_job
from service.settings import Settings, get_settings
from workers import spec as job_spec
from workers.errors import AuditError

DEMO_SPEC = Path(__file__).resolve().parent.parent / "demo_tiles" / "demo.yaml"


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the console script; returns the exit status."""
    parser = _parser()
    args = parser.parse_args(argv)
    settings = get_settings()
    try:
        return int(args.handler(args, settings))
    except AuditError as exc:
        print(f"demaudit: error: {exc}", file=sys.stderr)
        return 2


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="demaudit", description=__doc__)
    sub = parser.add_subparsers(required=True, metavar="COMMAND")

    run = sub.add_parser("run", help="audit a test DEM against a reference, as a job spec says")
    run.add_argument("spec", type=Path, help="job spec (YAML or JSON)")
    _add_run_options(run)
    run.set_defaults(handler=_cmd_run)

    demo = sub.add_parser("demo", help="run the shipped demo job on demo_tiles/")
    _add_run_options(demo)
    demo.set_defaults(handler=_cmd_demo, spec=DEMO_SPEC)

    make = sub.add_parser("make-demo-archive", help="generate an invented demo archive")
    make.add_argument("--out", type=Path, required=True, help="folder to write")
    make.add_argument("--tiles", default="6x6", help="test tiles, COLSxROWS (default 6x6)")
    make.add_argument("--pixels", type=int, default=160, help="test tile side in pixels")
    make.add_argument("--seed", type=int, default=1)
    make.set_defaults(handler=_cmd_make_demo)
    return parser


def _add_run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", type=Path, required=True, help="output folder")
    p.add_argument("--scheduler", help="external Dask scheduler, e.g. tcp://host:8786")
    p.add_argument("--workers", type=int, help="local cluster worker processes")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _cmd_run(args: argparse.Namespace, settings: Settings) -> int:
    spec_path = Path(args.spec)
    data = job_spec.load_spec_file(spec_path)
    spec = job_spec.parse_spec(data)
    job = job_spec.resolve(
        spec, base_dir=spec_path.resolve().parent, data_roots=settings.data_roots
    )
    scheduler = args.scheduler or settings.scheduler
    workers = args.workers or settings.local_workers
    with dask_client(
        scheduler, workers=workers, memory_limit=settings.worker_memory_limit
    ) as client:
        bar = tqdm(total=None, unit="tile", desc=spec.name, disable=args.quiet, file=sys.stderr)

        def progress(done: int, total: int) -> None:
            bar.total = total
            bar.update(done - bar.n)

        try:
            document = run_job(
                job, args.out, client=client, grid_dirs=settings.grid_dirs, progress=progress
            )
        finally:
            bar.close()
    _print_report(document, args.out)
    failed = document["job"]["tiles"]["failed"]
    return 1 if failed else 0


def _cmd_demo(args: argparse.Namespace, settings: Settings) -> int:
    if not DEMO_SPEC.is_file():
        print(
            f"demaudit: error: the demo spec {DEMO_SPEC} is not here (run from a source checkout)",
            file=sys.stderr,
        )
        return 2
    return _cmd_run(args, settings)


def _cmd_make_demo(args: argparse.Namespace, settings: Settings) -> int:
    from workers.demo_archive import DemoArchiveOptions, make_demo_archive

    try:
        cols, rows = (int(v) for v in args.tiles.lower().split("x"))
    except ValueError:
        print(f"demaudit: error: --tiles must look like 8x8, got {args.tiles!r}", file=sys.stderr)
        return 2
    options = DemoArchiveOptions(tiles_x=cols, tiles_y=rows, pixels=args.pixels, seed=args.seed)
    spec_path = make_demo_archive(args.out, options)
    print(f"demo archive written; job spec: {spec_path}")
    return 0


def _print_report(document: dict[str, Any], out_dir: Path) -> None:
    print(f"\nresults: {Path(out_dir).resolve()}/summary.json and results.zarr")
    print(f"dh = {document['sign']}, {document['units']}s\n")
    header = (
        f"{'region':<16}{'pixels':>12}{'median':>9}{'nmad':>9}{'q683_abs':>10}"
        f"{'q95_abs':>9}{'rmse':>9}"
    )
    print(header)
    rows = [(r["region"], r["stats"]) for r in document["regions"]]
    rows.append(("(all)", document["overall"]))
    for name, s in rows:
        if not s["count"]:
            print(f"{name:<16}{0:>12}  no valid pixels")
            continue
        print(
            f"{name:<16}{s['count']:>12,}{s['median']:>9.3f}{s['nmad']:>9.3f}"
            f"{s['q683_abs']:>10.3f}{s['q95_abs']:>9.3f}{s['rmse']:>9.3f}"
        )
    failed = [t for t in document["tiles"] if t["status"] == "failed"]
    for t in failed:
        print(f"tile {t['tile']} failed: {t.get('reason')}")
    print("\n" + document["cautions"][0])


if __name__ == "__main__":
    raise SystemExit(main())
