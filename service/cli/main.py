"""The ``demaudit`` command line: run or validate a job spec, run the shipped demo, make a demo
archive; serve the REST API, submit a spec to it and follow a job; manage a server's schedules."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as package_version

from demaudit.service.cli.demo_archive import add_make_demo_parser
from demaudit.service.cli.exits import EXIT_BAD_INPUT, EXIT_CODES, EXIT_INTERNAL, EXIT_INTERRUPTED
from demaudit.service.cli.local import add_demo_parser, add_run_parser, add_validate_parser
from demaudit.service.cli.schedules import add_schedule_parser
from demaudit.service.cli.serve import add_serve_parser
from demaudit.service.cli.server_jobs import add_status_parser, add_submit_parser
from demaudit.service.cli.tokens import add_token_parser
from demaudit.service.settings import Settings
from demaudit.workers.errors import AuditError

__all__ = ["build_parser", "main", "software_version"]

#: The commands in the order ``demaudit --help`` lists them.
COMMANDS = (
    add_run_parser,
    add_validate_parser,
    add_demo_parser,
    add_make_demo_parser,
    add_serve_parser,
    add_submit_parser,
    add_status_parser,
    add_schedule_parser,
    add_token_parser,
)


def software_version() -> str:
    """The installed demaudit version."""
    try:
        return package_version("demaudit")
    except PackageNotFoundError:  # running from a tree that was never installed
        return "unknown"


def main(argv: Sequence[str] | None = None, *, settings: Settings | None = None) -> int:
    """Entry point of the console script; returns the exit status (see EXIT_CODES). settings
    replaces the settings read from the environment (tests)."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.handler(args, settings if settings is not None else Settings()))
    except AuditError as exc:
        print(f"demaudit: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("demaudit: interrupted; nothing was changed in the output folder", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as exc:
        if args.traceback:
            raise
        print(
            f"demaudit: internal error: {type(exc).__name__}: {exc} (nothing was written; "
            "run again with --traceback and report it)",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


def build_parser() -> argparse.ArgumentParser:
    """The argument parser: global options, then one sub-parser per command."""
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
    for add_command in COMMANDS:
        add_command(sub)
    return parser


if __name__ == "__main__":
    raise SystemExit(main())
