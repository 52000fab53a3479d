"""The ``demaudit`` command line: run or validate a job spec, run the shipped demo, make a demo
archive; serve the REST API, submit a spec to it and follow a job; manage a server's schedules."""

from __future__ import annotations

import argparse
import re
import socket
import sys
import time
from collections.abc import Sequence
from contextlib import ExitStack
from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as package_version
from pathlib import Path
from typing import Any

from tqdm import tqdm

from demaudit.service.settings import Settings, get_settings
from demaudit.workers import spec as job_spec
from demaudit.workers.errors import AuditError, SpecError
from demaudit.workers.inputs.catalog import SUPERSEDED
from demaudit.workers.outputs.summary_document import CAUTIONS_ALWAYS

DEMO_SPEC = Path(__file__).resolve().parents[2] / "demo_tiles" / "demo.yaml"

#: Exit statuses, each with one meaning (also in the README and ``demaudit --help``).
EXIT_CLEAN = 0
EXIT_INCOMPLETE = 1
EXIT_BAD_INPUT = 2
EXIT_INTERNAL = 3

EXIT_CODES = """exit status:
  0  done: every test tile was audited (a checkpoint-only job: the points were)
  1  done, results written, but some tiles failed or were not audited (no reference, no
     valid pixels; see the cautions), or a followed server job was dismissed
  2  nothing was run or written: bad spec, input file, option, output folder, unreachable
     scheduler or server (the message names the file, field or option)
  3  internal error: a bug in demaudit; nothing was written (--traceback shows details)
  130  interrupted (Ctrl-C): nothing was written"""

#: How long `--scheduler` may take to answer before the run gives up (seconds).
SCHEDULER_CONNECT_TIMEOUT_S = 5.0


def software_version() -> str:
    """The installed demaudit version."""
    try:
        return package_version("demaudit")
    except PackageNotFoundError:  # running from a tree that was never installed
        return "unknown"


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the console script; returns the exit status (see EXIT_CODES)."""
    parser = _parser()
    args = parser.parse_args(argv)
    try:
        settings = get_settings()
        return int(args.handler(args, settings))
    except AuditError as exc:
        print(f"demaudit: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("demaudit: interrupted; nothing was changed in the output folder", file=sys.stderr)
        return 130
    except Exception as exc:
        if args.traceback:
            raise
        print(
            f"demaudit: internal error: {type(exc).__name__}: {exc} (nothing was written; "
            "run again with --traceback and report it)",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="demaudit",
        description=__doc__,
        epilog=EXIT_CODES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"demaudit {software_version()}")
    parser.add_argument(
        "--traceback", action="store_true", help="show the traceback of an internal error"
    )
    sub = parser.add_subparsers(required=True, metavar="COMMAND")

    run = sub.add_parser("run", help="audit a test DEM against a reference, as a job spec says")
    run.add_argument("spec", type=Path, help="job spec (YAML or JSON)")
    _add_run_options(run)
    run.set_defaults(handler=_cmd_run)

    validate = sub.add_parser(
        "validate",
        help="check a job spec and its files (tile headers, regions, checkpoints) without "
        "running tiles",
    )
    validate.add_argument("spec", type=Path, help="job spec (YAML or JSON)")
    validate.add_argument("--out", type=Path, help="also check this output folder can be used")
    validate.add_argument("--baseline", type=Path, help="also check this baseline folder")
    validate.add_argument(
        "--pixels",
        action="store_true",
        help="also read every test tile and check its heights (void codes without a nodata tag)",
    )
    validate.set_defaults(handler=_cmd_validate)

    demo = sub.add_parser("demo", help="run the shipped demo job on demo_tiles/")
    _add_run_options(demo)
    demo.set_defaults(handler=_cmd_demo, spec=DEMO_SPEC)

    make = sub.add_parser("make-demo-archive", help="generate an invented demo archive")
    make.add_argument("--out", type=Path, required=True, help="folder to write")
    make.add_argument("--tiles", default="6x6", help="test tiles, COLSxROWS (default 6x6)")
    make.add_argument("--pixels", type=int, default=160, help="test tile side in pixels")
    make.add_argument("--seed", type=int, default=1)
    make.add_argument("--force", action="store_true", help="write into a folder that is not empty")
    make.add_argument("--quiet", action="store_true", help="no progress bar")
    make.set_defaults(handler=_cmd_make_demo)

    serve = sub.add_parser("serve", help="serve the REST API (OGC API - Processes)")
    serve.add_argument("--host", default="127.0.0.1", help="address to bind (default 127.0.0.1)")
    serve.add_argument("--port", type=int, default=8000)
    serve.add_argument(
        "--insecure-local",
        action="store_true",
        help="allow serving without DEMAUDIT_API_TOKENS (loopback addresses only)",
    )
    serve.add_argument("--log-level", default="info", choices=["debug", "info", "warning"])
    serve.set_defaults(handler=_cmd_serve)

    submit = sub.add_parser("submit", help="submit a job spec to a demaudit server")
    submit.add_argument(
        "spec",
        type=Path,
        help="job spec (YAML or JSON); relative paths resolve against the server's first data root",
    )
    _add_server_options(submit)
    submit.add_argument("--watch", action="store_true", help="follow the job to its end")
    submit.set_defaults(handler=_cmd_submit)

    status = sub.add_parser("status", help="show (or follow) a job on a demaudit server")
    status.add_argument("job", help="job id (or the job's URL)")
    _add_server_options(status)
    status.add_argument("--watch", action="store_true", help="progress bar until the job ends")
    status.set_defaults(handler=_cmd_status)

    schedule = sub.add_parser("schedule", help="run a job spec on a server on a cron schedule")
    schedules = schedule.add_subparsers(required=True, metavar="ACTION")
    add = schedules.add_parser("add", help="add a schedule (e.g. a nightly re-check)")
    add.add_argument(
        "spec",
        type=Path,
        help="job spec (YAML or JSON); relative paths resolve against the server's first data root",
    )
    add.add_argument(
        "--cron",
        required=True,
        help="when, on the --timezone clock: e.g. '0 2 * * *' (02:00 daily)",
    )
    add.add_argument(
        "--timezone",
        default="UTC",
        help="IANA time zone the cron follows, daylight-saving time included, e.g. Europe/Oslo "
        "(default UTC)",
    )
    add.add_argument("--name", help="name of the schedule (default: the spec's name)")
    add.add_argument("--webhook", help="URL to POST the change report to")
    add.add_argument(
        "--notify",
        choices=["regressions", "always"],
        default="regressions",
        help="call the webhook after runs with regressions (default) or after every run",
    )
    add.add_argument(
        "--baseline",
        choices=["latest"],
        help="'latest': re-check against the schedule's last successful run (else full runs)",
    )
    _add_connection_options(add)
    add.set_defaults(handler=_cmd_schedule_add)
    listing = schedules.add_parser("list", help="list the schedules and their last runs")
    _add_connection_options(listing)
    listing.set_defaults(handler=_cmd_schedule_list)
    remove = schedules.add_parser("remove", help="delete a schedule (its jobs stay)")
    remove.add_argument("id", help="schedule id")
    _add_connection_options(remove)
    remove.set_defaults(handler=_cmd_schedule_remove)
    _add_token_parser(sub)
    return parser


def _add_token_parser(sub: Any) -> None:
    token = sub.add_parser("token", help="make bearer tokens for the REST service")
    actions = token.add_subparsers(required=True, metavar="ACTION")
    new = actions.add_parser(
        "new", help="print a new token and the DEMAUDIT_PRINCIPALS entry (its hash) to configure"
    )
    new.add_argument("--name", default="user", help="principal name (default 'user')")
    new.add_argument("--admin", action="store_true", help="the admin role (sees all jobs)")
    new.set_defaults(handler=_cmd_token_new)


def _cmd_token_new(args: argparse.Namespace, settings: Settings) -> int:
    from demaudit.service.api.auth import ADMIN, USER, TokenPolicyError, hash_token, new_token
    from demaudit.service.api.auth import parse_principal_line as check_line

    token = new_token()
    line = f"{args.name}:{ADMIN if args.admin else USER}:{hash_token(token)}"
    try:
        check_line(line, where="--name")
    except TokenPolicyError as exc:
        print(f"demaudit: error: {exc}", file=sys.stderr)
        return 2
    print(f"token: {token}")
    print(f"DEMAUDIT_PRINCIPALS entry: {line}")
    print(
        "give the token to its holder (shown only now; e.g. DEMAUDIT_TOKEN for the CLI); the "
        "server needs only the entry",
        file=sys.stderr,
    )
    return 0


def _add_connection_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--server", required=True, help="base URL, e.g. http://127.0.0.1:8000")
    p.add_argument("--token", help="bearer token (default: DEMAUDIT_TOKEN)")


def _add_server_options(p: argparse.ArgumentParser) -> None:
    _add_connection_options(p)
    p.add_argument("--interval", type=float, default=1.0, help="seconds between polls")


def _add_run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--out",
        type=Path,
        required=True,
        help="output folder (built beside it and swapped in when complete; an earlier result "
        "there is replaced as a whole)",
    )
    p.add_argument(
        "--scheduler", type=_scheduler_address, help="external Dask scheduler, e.g. tcp://host:8786"
    )
    p.add_argument("--workers", type=_positive_int, help="local cluster worker processes (>= 1)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument(
        "--baseline",
        type=Path,
        help="folder of an earlier run of this spec: recompute only changed tiles and report "
        "what changed (nightly re-check)",
    )


def _positive_int(text: str) -> int:
    """argparse type: an integer of at least 1."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {value}")
    return value


_ADDRESS = re.compile(
    r"^(?:(?P<scheme>[a-z]+)://)?(?P<host>\[[0-9a-fA-F:]+\]|[^:/\s]+):(?P<port>\d+)/?$"
)


def _scheduler_address(text: str) -> str:
    """argparse type: a Dask scheduler address, [tcp://]host:port."""
    match = _ADDRESS.match(text.strip())
    if match is None or not 0 < int(match["port"]) < 65536:
        raise argparse.ArgumentTypeError(f"expected an address like tcp://host:8786, got {text!r}")
    return text.strip()


def _reachable(address: str, *, option: str) -> None:
    """SpecError naming option unless a Dask scheduler answers at address within
    SCHEDULER_CONNECT_TIMEOUT_S: the TCP connection must open and (plain tcp) the server must
    send its greeting, as a Dask scheduler does at once. Other schemes are left to Dask."""
    match = _ADDRESS.match(address)
    scheme = (match["scheme"] or "tcp") if match else ""
    if match is None or scheme not in {"tcp", "tls"}:
        return
    host, port = match["host"].strip("[]"), int(match["port"])
    timeout = SCHEDULER_CONNECT_TIMEOUT_S
    try:
        with socket.create_connection((host, port), timeout=timeout) as probe:
            if scheme == "tcp" and not probe.recv(1):
                raise ConnectionResetError(0, "closed the connection without a greeting")
    except OSError as exc:
        if isinstance(exc, TimeoutError):
            reason = f"no answer within {timeout:g} s"
        else:
            reason = exc.strerror or str(exc)
        raise SpecError(
            f"{option}: cannot reach a Dask scheduler at {address} ({reason})"
        ) from None


def _load_job(spec_path: Path, settings: Settings) -> job_spec.ResolvedJob:
    data = job_spec.load_spec_file(spec_path)
    spec = job_spec.parse_spec(data)
    return job_spec.resolve(
        spec, base_dir=spec_path.resolve().parent, data_roots=settings.data_roots
    )


def _cluster_options(args: argparse.Namespace, settings: Settings) -> tuple[str | None, int]:
    """The scheduler (checked to answer) or the local worker count (checked to be >= 1)."""
    if args.scheduler and args.workers is not None:
        raise SpecError(
            "--workers sizes the local cluster; with --scheduler the workers are the scheduler's"
        )
    if args.scheduler:
        _reachable(args.scheduler, option="--scheduler")
        return args.scheduler, 0
    if settings.scheduler:
        _reachable(settings.scheduler, option="DEMAUDIT_SCHEDULER")
        return settings.scheduler, 0
    workers = args.workers if args.workers is not None else settings.local_workers
    if workers < 1:
        raise SpecError(f"DEMAUDIT_LOCAL_WORKERS: must be at least 1, got {workers}")
    return None, workers


def _cmd_run(args: argparse.Namespace, settings: Settings) -> int:
    # imported here: the client commands (submit, status, schedule) start without Dask
    from demaudit.service.run.cluster import dask_client
    from demaudit.service.run.runner import check_output, read_inputs, run_job

    job = _load_job(Path(args.spec), settings)
    inputs = read_inputs(job)  # a bad region or checkpoint file stops here, before the cluster
    check_output(args.out)
    scheduler, workers = _cluster_options(args, settings)
    spec = job.spec
    with ExitStack() as stack:
        try:
            client = stack.enter_context(
                dask_client(scheduler, workers=workers, memory_limit=settings.worker_memory_limit)
            )
        except (OSError, TimeoutError) as exc:
            if scheduler is None:
                raise
            raise SpecError(
                f"--scheduler: {scheduler} did not answer as a Dask scheduler "
                f"({type(exc).__name__}: {exc})"
            ) from None
        bar = tqdm(total=None, unit="tile", desc=spec.name, disable=args.quiet, file=sys.stderr)

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
            )
        finally:
            bar.close()
    _print_report(document, args.out)
    return run_status(document)


#: Tile statuses of a complete run: audited; a checkpoint-only job's tiles ('not_audited' by
#: design); a re-delivered tile whose every pixel an earlier-listed tile counted ('superseded').
COMPLETE_STATUSES = frozenset({"ok", "not_audited", SUPERSEDED})


def run_status(document: dict[str, Any]) -> int:
    """1 when some test tile failed or was left out of the statistics (no reference, no valid
    pixels, or any status not known to be complete), else 0."""
    statuses = {t["status"] for t in document["tiles"]}
    return EXIT_INCOMPLETE if statuses - COMPLETE_STATUSES else EXIT_CLEAN


def _cmd_validate(args: argparse.Namespace, settings: Settings) -> int:
    from demaudit.service.run.runner import validate_job

    job = _load_job(Path(args.spec), settings)
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


def _cmd_demo(args: argparse.Namespace, settings: Settings) -> int:
    if not DEMO_SPEC.is_file():
        print(
            f"demaudit: error: the demo spec {DEMO_SPEC} is not here (run from a source checkout)",
            file=sys.stderr,
        )
        return 2
    return _cmd_run(args, settings)


def _cmd_make_demo(args: argparse.Namespace, settings: Settings) -> int:
    from demaudit.workers.demo.archive import DemoArchiveOptions, make_demo_archive, size_problem

    def error(message: str) -> int:
        print(f"demaudit: error: {message}", file=sys.stderr)
        return 2

    try:
        cols, rows = (int(v) for v in args.tiles.lower().split("x"))
    except ValueError:
        return error(f"--tiles must look like 8x8, got {args.tiles!r}")
    try:
        options = DemoArchiveOptions(tiles_x=cols, tiles_y=rows, pixels=args.pixels, seed=args.seed)
    except ValueError as exc:
        return error(f"{exc} (--tiles {args.tiles}, --pixels {args.pixels}, --seed {args.seed})")
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        return error(f"--out {out} exists and is not a folder")
    if out.is_dir() and any(out.iterdir()) and not args.force:
        return error(
            f"--out {out} is not empty; choose a new or empty folder, or add --force to write "
            "the demo archive into it (files of an earlier demo archive there are replaced)"
        )
    problem = size_problem(options, out)
    if problem:
        return error(
            f"--tiles {args.tiles} --pixels {args.pixels} is too big here: {problem}; "
            "use fewer --tiles or smaller --pixels"
        )
    bar = tqdm(total=None, unit="tile", desc="demo archive", disable=args.quiet, file=sys.stderr)

    def progress(done: int, total: int) -> None:
        bar.total = total
        bar.update(done - bar.n)

    try:
        spec_path = make_demo_archive(out, options, progress=progress)
    except OSError as exc:
        return error(f"cannot write the demo archive into {out}: {exc}")
    finally:
        bar.close()
    print(f"demo archive written; job spec: {spec_path}")
    return 0


def _cmd_serve(args: argparse.Namespace, settings: Settings) -> int:
    import uvicorn

    from demaudit.service.api.app import check_serving, create_app, log_config

    if args.insecure_local:
        settings = settings.model_copy(update={"insecure_local": True})
    try:
        check_serving(settings, host=args.host)
    except ValueError as exc:
        print(f"demaudit: error: {exc}", file=sys.stderr)
        return 2
    uvicorn.run(
        create_app(settings),
        host=args.host,
        port=args.port,
        log_config=log_config(args.log_level.upper()),
        timeout_graceful_shutdown=5,
    )
    return 0


def _http(args: argparse.Namespace, settings: Settings) -> Any:
    import httpx

    token = args.token or settings.token
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    return httpx.Client(base_url=args.server.rstrip("/"), headers=headers, timeout=30.0)


def _problem_text(response: Any) -> str:
    try:
        body = response.json()
    except ValueError:
        return f"HTTP {response.status_code}"
    if isinstance(body, dict) and "detail" in body:
        return f"{body.get('title', 'error')} (HTTP {response.status_code}): {body['detail']}"
    return f"HTTP {response.status_code}"


def _cmd_submit(args: argparse.Namespace, settings: Settings) -> int:
    import httpx

    data = job_spec.load_spec_file(args.spec)
    try:
        with _http(args, settings) as http:
            response = http.post(
                "/processes/dem-audit/execution",
                json={"inputs": data},
                headers={"Prefer": "respond-async"},
            )
            if response.status_code != 201:
                print(f"demaudit: error: {_problem_text(response)}", file=sys.stderr)
                return 2
            job = response.json()
            print(f"job {job['jobID']} {job['status']}: {response.headers.get('Location')}")
            if args.watch:
                return _watch(http, job["jobID"], interval=args.interval)
    except httpx.HTTPError as exc:
        print(f"demaudit: error: cannot reach {args.server}: {exc}", file=sys.stderr)
        return 2
    return 0


def _cmd_status(args: argparse.Namespace, settings: Settings) -> int:
    import httpx

    job_id = args.job.rstrip("/").rsplit("/", 1)[-1]
    try:
        with _http(args, settings) as http:
            if args.watch:
                return _watch(http, job_id, interval=args.interval)
            response = http.get(f"/jobs/{job_id}")
            if response.status_code != 200:
                print(f"demaudit: error: {_problem_text(response)}", file=sys.stderr)
                return 2
            job = response.json()
            print(f"job {job['jobID']} {job['status']} ({job['progress']} %): {job['message']}")
            _print_job_links(args.server, job["jobID"], job["status"])
            return _exit_status(job["status"], job.get("message") or "")
    except httpx.HTTPError as exc:
        print(f"demaudit: error: cannot reach {args.server}: {exc}", file=sys.stderr)
        return 2


def _cmd_schedule_add(args: argparse.Namespace, settings: Settings) -> int:
    data = job_spec.load_spec_file(args.spec)
    name = args.name or (data.get("name") if isinstance(data, dict) else None) or args.spec.stem
    body: dict[str, Any] = {"name": str(name), "cron": args.cron, "inputs": data}
    body["timezone"] = args.timezone
    body["notify"] = args.notify
    if args.webhook:
        body["webhook"] = args.webhook
    if args.baseline:
        body["baseline"] = args.baseline

    def added(response: Any) -> int:
        if response.status_code != 201:
            print(f"demaudit: error: {_problem_text(response)}", file=sys.stderr)
            return 2
        schedule = response.json()
        next_run = _when(schedule["nextRun"])
        zone = schedule.get("timezone", "UTC")
        if zone != "UTC" and schedule["nextRun"]:
            next_run += f" UTC ({_when(schedule['nextRun'], zone)} {zone})"
        print(f"schedule {schedule['id']} added: next run {next_run}")
        if schedule.get("webhookSecret"):
            print(f"webhook signing secret (shown only now): {schedule['webhookSecret']}")
        return 0

    return _call(args, settings, lambda http: added(http.post("/schedules", json=body)))


def _cmd_schedule_list(args: argparse.Namespace, settings: Settings) -> int:
    def listed(response: Any) -> int:
        if response.status_code != 200:
            print(f"demaudit: error: {_problem_text(response)}", file=sys.stderr)
            return 2
        rows = response.json()["schedules"]
        if not rows:
            print("no schedules")
            return 0
        print(f"{'id':<34}{'name':<22}{'cron':<16}{'time zone':<20}{'next run (UTC)':<19}last run")
        for s in rows:
            last = s.get("lastRun")
            done = "-"
            if last:
                done = f"{_when(last['slot'])} {last['outcome']}"
                if last.get("jobStatus"):
                    done += f" (job {last['jobID'][:12]} {last['jobStatus']})"
            zone = s.get("timezone", "UTC")
            print(
                f"{s['id']:<34}{s['name'][:21]:<22}{s['cron']:<16}{zone[:19]:<20}"
                f"{_when(s['nextRun']):<19}{done}"
            )
        return 0

    return _call(
        args, settings, lambda http: listed(http.get("/schedules", params={"limit": 1000}))
    )


def _cmd_schedule_remove(args: argparse.Namespace, settings: Settings) -> int:
    def removed(response: Any) -> int:
        if response.status_code != 204:
            print(f"demaudit: error: {_problem_text(response)}", file=sys.stderr)
            return 2
        print(f"schedule {args.id} removed")
        return 0

    return _call(args, settings, lambda http: removed(http.delete(f"/schedules/{args.id}")))


def _call(args: argparse.Namespace, settings: Settings, request: Any) -> int:
    """request(http client) -> exit status, with a readable error when the server is away."""
    import httpx

    try:
        with _http(args, settings) as http:
            return int(request(http))
    except httpx.HTTPError as exc:
        print(f"demaudit: error: cannot reach {args.server}: {exc}", file=sys.stderr)
        return 2


def _when(stamp: str | None, zone: str | None = None) -> str:
    """An ISO time as 'YYYY-MM-DD HH:MM' in UTC (or on the clock of the IANA zone), or '-'."""
    if not stamp:
        return "-"
    from datetime import UTC, datetime
    from zoneinfo import ZoneInfo

    clock = ZoneInfo(zone) if zone else UTC
    return datetime.fromisoformat(stamp).astimezone(clock).strftime("%Y-%m-%d %H:%M")


def _watch(http: Any, job_id: str, *, interval: float) -> int:
    """Poll the job with a progress bar (tiles) until it ends; the exit status says how."""
    bar = tqdm(total=None, unit="tile", desc=job_id[:12], file=sys.stderr)
    try:
        while True:
            response = http.get(f"/jobs/{job_id}")
            if response.status_code != 200:
                print(f"demaudit: error: {_problem_text(response)}", file=sys.stderr)
                return 2
            job = response.json()
            tiles = job.get("tiles", {})
            if tiles.get("total"):
                bar.total = tiles["total"]
                bar.update(tiles["done"] - bar.n)
            bar.set_postfix_str(job["status"])
            if job["status"] in {"successful", "failed", "dismissed"}:
                break
            time.sleep(interval)
    finally:
        bar.close()
    print(f"job {job_id} {job['status']}: {job['message']}")
    _print_job_links(str(http.base_url), job_id, job["status"])
    return _exit_status(job["status"], job.get("message") or "")


def _print_job_links(server: str, job_id: str, status: str) -> None:
    """Where a person follows the job (its page) and, once it succeeded, reads its report."""
    page = f"{server.rstrip('/')}/jobs/{job_id}"
    print(f"page: {page} (in a browser, with the token)")
    if status == "successful":
        print(f"report: {page}/report (shown on the page; programs send the token)")


def _exit_status(status: str, message: str = "") -> int:
    """The exit status for a server job (see EXIT_CODES): a successful job whose message counts
    failed or unaudited tiles is incomplete (1); a failed job had bad input (2) or hit an
    internal error (3); a dismissed one is incomplete (1)."""
    if status in {"accepted", "running"}:
        return EXIT_CLEAN
    if status == "successful":
        counts = [int(n) for n in re.findall(r"(\d+) (?:failed|not audited)", message)]
        return EXIT_INCOMPLETE if any(counts) else EXIT_CLEAN
    if status == "failed":
        return EXIT_INTERNAL if message.startswith("internal error") else EXIT_BAD_INPUT
    return EXIT_INCOMPLETE


def _print_report(document: dict[str, Any], out_dir: Path) -> None:
    folder = Path(out_dir).resolve()
    print(f"\nresults: {folder}/report.html (for people), summary.json, results.zarr")
    print(f"dh = {document['sign']}, {document['units']}s\n")
    header = (
        f"{'region':<26}{'pixels':>12}{'median':>9}{'nmad':>9}{'q683_abs':>10}"
        f"{'q95_abs':>9}{'rmse':>9}"
    )
    print(header)
    rows = [(f"{r['region']} {r.get('name', '')}", r["stats"]) for r in document["regions"]]
    rows.append(("(all)", document["overall"]))
    by_stratum = {s["stratum"]: s["stats"] for s in document["overall_detail"]["strata"]}
    if "cover_group:non_vegetated" in by_stratum:
        rows.append(("(all) non-vegetated", by_stratum["cover_group:non_vegetated"]))
    for name, s in rows:
        if not s["count"]:
            print(f"{name:<26}{0:>12}  no valid pixels")
            continue
        print(
            f"{name:<26}{s['count']:>12,}{s['median']:>9.3f}{s['nmad']:>9.3f}"
            f"{s['q683_abs']:>10.3f}{s['q95_abs']:>9.3f}{s['rmse']:>9.3f}"
        )
    checkpoints = document.get("checkpoints")
    if checkpoints:
        counts, stats = checkpoints["counts"], checkpoints["stats"]
        print(
            f"\ncheckpoints: {counts['used']} of {counts['read']} used; median "
            f"{_metres(stats['median'])}, RMSE_z {_metres(stats['rmse'])}"
        )
        for grade in checkpoints["grading"]:
            verdict = {True: "met", False: "NOT met", None: "not decided"}[grade.get("met")]
            if "accuracy_z_95_m" in grade and "met" not in grade:
                verdict = f"Accuracy_z (95 %) {_metres(grade['accuracy_z_95_m'])}"
            if grade.get("scope") and grade.get("met") is not None:
                verdict += " (non-vegetated checks only)"
            label = f"{grade['standard']} {grade.get('class', '')}".strip()
            print(f"  {label}: {verdict}")
    failed = [t for t in document["tiles"] if t["status"] == "failed"]
    for t in failed:
        print(f"tile {t['tile']} failed: {t.get('reason')}")
    recheck = document.get("recheck")
    if recheck:
        print(
            f"\nre-check against {recheck['baseline']}: {len(recheck['tiles_recomputed'])} "
            f"tile(s) recomputed, {recheck['tiles_reused']} reused, "
            f"{recheck['regressions']} regression(s)"
        )
        for t in recheck["tiles"]:
            print(f"  {t['tile']:<20} {t['verdict']:<10} {t['why']}")
    notable = [c for c in document["cautions"] if c not in CAUTIONS_ALWAYS]
    if notable:
        print("\ncautions:")
        for caution in notable:
            print(f"  ! {caution}")
    print(f"\nreport: {folder / 'report.html'}")
    print(document["cautions"][0])


def _metres(value: float | None) -> str:
    return "–" if value is None else f"{value:.3f} m"


if __name__ == "__main__":
    raise SystemExit(main())
