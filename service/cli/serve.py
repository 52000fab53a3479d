"""``demaudit serve``: the REST API (OGC API - Processes) under uvicorn."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from demaudit.service.cli.exits import EXIT_BAD_INPUT, EXIT_CLEAN
from demaudit.service.settings import Settings

__all__ = ["add_serve_parser"]


def add_serve_parser(sub: Any) -> None:
    """``demaudit serve [--host H] [--port P]``."""
    serve = sub.add_parser("serve", help="serve the REST API (OGC API - Processes)")
    serve.add_argument("--host", default="127.0.0.1", help="address to bind (default 127.0.0.1)")
    serve.add_argument("--port", type=int, default=8000)
    serve.add_argument(
        "--insecure-local",
        action="store_true",
        help="allow serving without DEMAUDIT_API_TOKENS (loopback addresses only)",
    )
    serve.add_argument("--log-level", default="info", choices=["debug", "info", "warning"])
    serve.set_defaults(handler=serve_command)


def serve_command(args: argparse.Namespace, settings: Settings) -> int:
    """Check the settings are safe to serve with (before binding), then serve until stopped."""
    import uvicorn

    from demaudit.service.api.app import check_serving, create_app, log_config

    if args.insecure_local:
        settings = settings.model_copy(update={"insecure_local": True})
    try:
        check_serving(settings, host=args.host)
    except ValueError as exc:
        print(f"demaudit: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    uvicorn.run(
        create_app(settings),
        host=args.host,
        port=args.port,
        log_config=log_config(args.log_level.upper()),
        timeout_graceful_shutdown=5,
    )
    return EXIT_CLEAN
