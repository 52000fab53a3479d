"""Exit statuses of the ``demaudit`` command, each with one meaning, and how a finished run or a
followed server job maps onto them."""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any

from demaudit.workers.inputs.catalog import SUPERSEDED

__all__ = [
    "COMPLETE_STATUSES",
    "CAUSE_STATUSES",
    "EXIT_BAD_INPUT",
    "EXIT_CLEAN",
    "EXIT_CODES",
    "EXIT_INCOMPLETE",
    "EXIT_INTERNAL",
    "EXIT_INTERRUPTED",
    "failed_job_status",
    "run_status",
    "server_job_status",
]

EXIT_CLEAN = 0
EXIT_INCOMPLETE = 1
EXIT_BAD_INPUT = 2
EXIT_INTERNAL = 3
EXIT_INTERRUPTED = 130

#: The exit statuses as ``demaudit --help`` shows them (also in the README).
EXIT_CODES = """exit status:
  0  done: every test tile was audited (a checkpoint-only job: the points were)
  1  done, results written, but some tiles failed or were not audited (no reference, no
     valid pixels; see the cautions), or a followed server job was dismissed
  2  nothing was run or written: bad spec, input file, option, output folder, unreachable
     scheduler or server (the message names the file, field or option)
  3  the run failed, not its input: a bug in demaudit (--traceback shows details), or the
     machine, cluster or server gave out (out of memory, disk full on a server, lost Dask
     scheduler, server restarted); nothing was written
  130  interrupted (Ctrl-C): nothing was written"""

#: Tile statuses of a complete run: audited; a checkpoint-only job's tiles ('not_audited' by
#: design); a re-delivered tile whose every pixel an earlier-listed tile counted ('superseded').
COMPLETE_STATUSES = frozenset({"ok", "not_audited", SUPERSEDED})


def run_status(document: dict[str, Any]) -> int:
    """1 when some test tile failed or was left out of the statistics (no reference, no valid
    pixels, or any status not known to be complete), else 0."""
    statuses = {t["status"] for t in document["tiles"]}
    return EXIT_INCOMPLETE if statuses - COMPLETE_STATUSES else EXIT_CLEAN


def server_job_status(
    status: str, message: str = "", *, cause: Mapping[str, Any] | None = None
) -> int:
    """The exit status for a server job: a successful job whose message counts failed or
    unaudited tiles is incomplete (1); a failed job had bad input (2) or failed in the server's
    run (3), see :func:`failed_job_status`; a dismissed one is incomplete (1)."""
    if status in {"accepted", "running"}:
        return EXIT_CLEAN
    if status == "successful":
        counts = [int(n) for n in re.findall(r"(\d+) (?:failed|not audited)", message)]
        return EXIT_INCOMPLETE if any(counts) else EXIT_CLEAN
    if status == "failed":
        return failed_job_status(message, cause)
    return EXIT_INCOMPLETE


CAUSE_PREFIX = "urn:demaudit:problem:"
"""How the ``type`` of a failed job's ``cause`` begins (demaudit.service.api.problems)."""

#: A failed server job's cause (``cause.type`` after CAUSE_PREFIX; the server's
#: demaudit.service.api.problems.FAILURE_CAUSES) -> exit status, as the same failure of a local
#: run: the caller's spec or files -> 2; the server, its cluster or its resources -> 3.
CAUSE_STATUSES: dict[str, int] = {
    "invalid-input": EXIT_BAD_INPUT,
    "tile-unreadable": EXIT_BAD_INPUT,
    "resources-exhausted": EXIT_INTERNAL,
    "cluster-unavailable": EXIT_INTERNAL,
    "interrupted": EXIT_INTERNAL,
    "internal": EXIT_INTERNAL,
}

#: How the messages of the server's own failures begin (demaudit.service.run.faults,
#: watchdog, job_thread): read only when a server sends no ``cause`` (before it had one).
SERVER_FAULT_MESSAGES = (
    "internal error",
    "out of memory",
    "disk full",
    "a task of the job ended its worker process",
    "the Dask cluster failed the job",
    "the connection to the Dask scheduler was lost",
    "the Dask scheduler does not answer",
    "no tile finished for",
    "server restarted",
    "server shut down",
)


def failed_job_status(message: str, cause: Mapping[str, Any] | None = None) -> int:
    """The exit status of a failed server job: from its ``cause`` (a known type, else its HTTP
    status: 4xx is bad input, 2; 5xx a failure of the run, 3); without a usable cause (an
    older server), 3 when the message is one of the server's own failures, else 2."""
    from_cause = _cause_status(cause)
    if from_cause is not None:
        return from_cause
    return EXIT_INTERNAL if message.startswith(SERVER_FAULT_MESSAGES) else EXIT_BAD_INPUT


def _cause_status(cause: object) -> int | None:
    """The exit status a ``cause`` member gives, or None when it gives none."""
    if not isinstance(cause, Mapping):
        return None
    kind = cause.get("type")
    if isinstance(kind, str) and kind.startswith(CAUSE_PREFIX):
        known = CAUSE_STATUSES.get(kind.removeprefix(CAUSE_PREFIX))
        if known is not None:
            return known
    status = cause.get("status")
    if isinstance(status, int) and not isinstance(status, bool):
        if 400 <= status < 500:
            return EXIT_BAD_INPUT
        if 500 <= status < 600:
            return EXIT_INTERNAL
    return None
