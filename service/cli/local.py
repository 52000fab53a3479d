"""The commands that run on this machine: ``run`` and ``demo`` (audit a job spec on a local or
external Dask cluster) and ``validate`` (check a spec and its files without running tiles)."""

from __future__ import annotations

import argparse
import math
import sys
from contextlib import ExitStack
from pathlib import Path
from typing import Any

from tqdm import tqdm

from demaudit.service.cli.cluster_options import cluster_options, positive_int, scheduler_address
from demaudit.service.cli.exits import EXIT_BAD_INPUT, EXIT_CLEAN, EXIT_INCOMPLETE, run_status
from demaudit.service.cli.report import print_report
from demaudit.service.settings import Settings
from demaudit.workers import spec as job_spec
from demaudit.workers.errors import SpecError

__all__ = ["DEMO_SPEC", "add_demo_parser", "add_run_parser", "add_validate_parser"]

DEMO_SPEC = Path(__file__).resolve().parents[2] / "demo_tiles" / "demo.yaml"

SPEC_HELP = "job spec (YAML or JSON)"


def add_run_parser(sub: Any) -> None:
    """``demaudit run SPEC --out DIR``."""
    run = sub.add_parser("run", help="audit a test DEM against a reference, as a job spec says")
    run.add_argument("spec", type=Path, help=SPEC_HELP)
    _add_run_options(run)
    run.set_defaults(handler=run_command)


def add_validate_parser(sub: Any) -> None:
    """``demaudit validate SPEC``."""
    validate = sub.add_parser(
        "validate",
        help="check a job spec and its files (tile headers, regions, checkpoints) without "
        "running tiles",
    )
    validate.add_argument("spec", type=Path, help=SPEC_HELP)
    validate.add_argument("--out", type=Path, help="also check this output folder can be used")
    validate.add_argument("--baseline", type=Path, help="also check this baseline folder")
    validate.add_argument(
        "--pixels",
        action="store_true",
        help="also read every test tile and check its heights (void codes without a nodata tag)",
    )
    validate.set_defaults(handler=validate_command)


def add_demo_parser(sub: Any) -> None:
    """``demaudit demo --out DIR``: the run command on the shipped demo spec."""
    demo = sub.add_parser("demo", help="run the shipped demo job on demo_tiles/")
    _add_run_options(demo)
    demo.set_defaults(handler=demo_command, spec=DEMO_SPEC)


def _add_run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--out",
        type=Path,
        required=True,
        help="output folder (built beside it and swapped in when complete; an earlier result "
        "there is replaced as a whole)",
    )
    p.add_argument(
        "--scheduler", type=scheduler_address, help="external Dask scheduler, e.g. tcp://host:8786"
    )
    p.add_argument("--workers", type=positive_int, help="local cluster worker processes (>= 1)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument(
        "--baseline",
        type=Path,
        help="folder of an earlier run of this spec: recompute only changed tiles and report "
        "what changed (nightly re-check)",
    )
    p.add_argument(
        "--tile-timeout",
        type=tile_timeout,
        metavar="SECONDS",
        help="cancel a tile task that has run this long and record the tile as failed (default: "
        "DEMAUDIT_TILE_TIMEOUT_S, else 1800; 0: no limit)",
    )


def tile_timeout(text: str) -> float:
    """argparse type of --tile-timeout: seconds, at least 0 (0: no limit)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected seconds, got {text!r}") from None
    if not math.isfinite(value) or value < 0:
        raise argparse.ArgumentTypeError(f"must be 0 (no limit) or more seconds, got {text}")
    return value


def load_job(spec_path: Path, settings: Settings) -> job_spec.ResolvedJob:
    """The spec file parsed and its paths resolved (relative ones against its folder)."""
    data = job_spec.load_spec_file(spec_path)
    spec = job_spec.parse_spec(data)
    return job_spec.resolve(
        spec, base_dir=spec_path.resolve().parent, data_roots=settings.data_roots
    )


def run_command(args: argparse.Namespace, settings: Settings) -> int:
    """Run the job; print its report; the exit status says whether every tile was audited."""
    # imported here: the client commands (submit, status, schedule) start without Dask
    from demaudit.service.run.runner import run_job
    from demaudit.service.run.scan import read_inputs
    from demaudit.service.run.validate import check_output

    job = load_job(Path(args.spec), settings)
    inputs = read_inputs(job)  # a bad region or checkpoint file stops here, before the cluster
    check_output(args.out)
    scheduler, workers = cluster_options(args, settings)
    with ExitStack() as stack:
        client = _enter_client(stack, scheduler, workers, settings)
        bar = tqdm(total=None, unit="tile", desc=job.spec.name, disable=args.quiet, file=sys.stderr)

        def progress(done: int, total: int) -> None:
            bar.total = total
            bar.update(done - bar.n)

        try:
            document = run_job(
                job,
                args.out,
                client=client,
                grid_dirs=settings.grid_dirs,
                progress=progress,
                baseline=args.baseline,
                inputs=inputs,
                tile_timeout_s=_tile_timeout_s(args, settings),
            )
        finally:
            bar.close()
    print_report(document, args.out)
    return run_status(document)


def _tile_timeout_s(args: argparse.Namespace, settings: Settings) -> float | None:
    """The run's tile time limit: --tile-timeout (0: none), else the setting."""
    given: float | None = getattr(args, "tile_timeout", None)
    if given is None:
        return settings.tile_timeout_s
    return given or None


def _enter_client(stack: ExitStack, scheduler: str | None, workers: int, settings: Settings) -> Any:
    """A Dask client that lives as long as stack (a local cluster without scheduler); an
    external scheduler that does not answer as one is a SpecError naming --scheduler."""
    from demaudit.service.run.cluster import dask_client

    memory_limit = settings.worker_memory_limit
    try:
        return stack.enter_context(
            dask_client(scheduler, workers=workers, memory_limit=memory_limit)
        )
    except (OSError, TimeoutError) as exc:
        if scheduler is None:
            raise
        raise SpecError(
            f"--scheduler: {scheduler} did not answer as a Dask scheduler "
            f"({type(exc).__name__}: {exc})"
        ) from None


def validate_command(args: argparse.Namespace, settings: Settings) -> int:
    """Check the spec and its files; 1 when some tile has a problem, else 0."""
    from demaudit.service.run.validate import validate_job

    job = load_job(Path(args.spec), settings)
    notes, problems = validate_job(
        job,
        grid_dirs=settings.grid_dirs,
        out_dir=args.out,
        baseline=args.baseline,
        pixels=args.pixels,
    )
    for note in notes:
        print(f"  {note}")
    for problem in problems:
        print(f"  ! {problem}")
    if problems:
        print(f"{args.spec}: valid, but {len(problems)} tile problem(s) above; nothing was run")
        return EXIT_INCOMPLETE
    print(f"{args.spec}: valid; nothing was run")
    return EXIT_CLEAN


def demo_command(args: argparse.Namespace, settings: Settings) -> int:
    """The run command on the shipped demo spec (a source checkout only)."""
    if not DEMO_SPEC.is_file():
        print(
            f"demaudit: error: the demo spec {DEMO_SPEC} is not here (run from a source checkout)",
            file=sys.stderr,
        )
        return EXIT_BAD_INPUT
    return run_command(args, settings)
