"""Talking to a demaudit server: the HTTP client, its problem documents, following a job."""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from typing import Any

from tqdm import tqdm

from demaudit.service.cli.exits import EXIT_BAD_INPUT, server_job_status
from demaudit.service.settings import Settings

__all__ = [
    "add_connection_options",
    "add_server_options",
    "call",
    "http_client",
    "print_job_links",
    "problem_text",
    "watch",
    "when",
]

ENDED = frozenset({"successful", "failed", "dismissed"})


def add_connection_options(p: argparse.ArgumentParser) -> None:
    """--server and --token."""
    p.add_argument("--server", required=True, help="base URL, e.g. http://127.0.0.1:8000")
    p.add_argument("--token", help="bearer token (default: DEMAUDIT_TOKEN)")


def add_server_options(p: argparse.ArgumentParser) -> None:
    """The connection options and --interval (polling a job)."""
    add_connection_options(p)
    p.add_argument("--interval", type=float, default=1.0, help="seconds between polls")


def http_client(args: argparse.Namespace, settings: Settings) -> Any:
    """An httpx client for --server with the bearer token (--token, else DEMAUDIT_TOKEN)."""
    import httpx

    token = args.token or settings.token
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    return httpx.Client(base_url=args.server.rstrip("/"), headers=headers, timeout=30.0)


def problem_text(response: Any) -> str:
    """One line from a problem document (or the bare HTTP status)."""
    try:
        body = response.json()
    except ValueError:
        return f"HTTP {response.status_code}"
    if isinstance(body, dict) and "detail" in body:
        return f"{body.get('title', 'error')} (HTTP {response.status_code}): {body['detail']}"
    return f"HTTP {response.status_code}"


def refused(response: Any) -> int:
    """Print the server's refusal; the exit status of bad input."""
    print(f"demaudit: error: {problem_text(response)}", file=sys.stderr)
    return EXIT_BAD_INPUT


def call(args: argparse.Namespace, settings: Settings, request: Callable[[Any], int]) -> int:
    """request(http client) -> exit status, with a readable error when the server is away."""
    import httpx

    try:
        with http_client(args, settings) as http:
            return int(request(http))
    except httpx.HTTPError as exc:
        print(f"demaudit: error: cannot reach {args.server}: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT


def when(stamp: str | None, zone: str | None = None) -> str:
    """An ISO time as 'YYYY-MM-DD HH:MM' in UTC (or on the clock of the IANA zone), or '-'."""
    if not stamp:
        return "-"
    from datetime import UTC, datetime
    from zoneinfo import ZoneInfo

    clock = ZoneInfo(zone) if zone else UTC
    return datetime.fromisoformat(stamp).astimezone(clock).strftime("%Y-%m-%d %H:%M")


def watch(http: Any, job_id: str, *, interval: float) -> int:
    """Poll the job with a progress bar (tiles) until it ends; the exit status says how."""
    bar = tqdm(total=None, unit="tile", desc=job_id[:12], file=sys.stderr)
    try:
        while True:
            response = http.get(f"/jobs/{job_id}")
            if response.status_code != 200:
                return refused(response)
            job = response.json()
            tiles = job.get("tiles", {})
            if tiles.get("total"):
                bar.total = tiles["total"]
                bar.update(tiles["done"] - bar.n)
            bar.set_postfix_str(job["status"])
            if job["status"] in ENDED:
                break
            time.sleep(interval)
    finally:
        bar.close()
    print(f"job {job_id} {job['status']}: {job['message']}")
    print_job_links(str(http.base_url), job_id, job["status"])
    return server_job_status(job["status"], job.get("message") or "", cause=job.get("cause"))


def print_job_links(server: str, job_id: str, status: str) -> None:
    """Where a person follows the job (its page) and, once it succeeded, reads its report."""
    page = f"{server.rstrip('/')}/jobs/{job_id}"
    print(f"page: {page} (in a browser, with the token)")
    if status == "successful":
        print(f"report: {page}/report (shown on the page; programs send the token)")
