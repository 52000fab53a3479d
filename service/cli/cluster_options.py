"""The ``--scheduler`` and ``--workers`` options of a local run: parsed, checked to answer."""

from __future__ import annotations

import argparse
import re
import socket

from demaudit.service.settings import Settings
from demaudit.workers.errors import SpecError

__all__ = [
    "SCHEDULER_CONNECT_TIMEOUT_S",
    "cluster_options",
    "positive_int",
    "reachable",
    "scheduler_address",
]

#: How long `--scheduler` may take to answer before the run gives up (seconds).
SCHEDULER_CONNECT_TIMEOUT_S = 5.0

_ADDRESS = re.compile(
    r"^(?:(?P<scheme>[a-z]+)://)?(?P<host>\[[0-9a-fA-F:]+\]|[^:/\s]+):(?P<port>\d+)/?$"
)


def positive_int(text: str) -> int:
    """argparse type: an integer of at least 1."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {value}")
    return value


def scheduler_address(text: str) -> str:
    """argparse type: a Dask scheduler address, [tcp://]host:port."""
    match = _ADDRESS.match(text.strip())
    if match is None or not 0 < int(match["port"]) < 65536:
        raise argparse.ArgumentTypeError(f"expected an address like tcp://host:8786, got {text!r}")
    return text.strip()


def reachable(address: str, *, option: str) -> None:
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


def cluster_options(args: argparse.Namespace, settings: Settings) -> tuple[str | None, int]:
    """The scheduler (checked to answer) or the local worker count (checked to be >= 1)."""
    if args.scheduler and args.workers is not None:
        raise SpecError(
            "--workers sizes the local cluster; with --scheduler the workers are the scheduler's"
        )
    if args.scheduler:
        reachable(args.scheduler, option="--scheduler")
        return args.scheduler, 0
    if settings.scheduler:
        reachable(settings.scheduler, option="DEMAUDIT_SCHEDULER")
        return settings.scheduler, 0
    workers = args.workers if args.workers is not None else settings.local_workers
    if workers < 1:
        raise SpecError(f"DEMAUDIT_LOCAL_WORKERS: must be at least 1, got {workers}")
    return None, workers
