"""Exit statuses of the ``demaudit`` command, each with one meaning, and how a finished run or a
followed server job maps onto them."""

from __future__ import annotations

import re
from typing import Any

from demaudit.workers.inputs.catalog import SUPERSEDED

__all__ = [
    "COMPLETE_STATUSES",
    "EXIT_BAD_INPUT",
    "EXIT_CLEAN",
    "EXIT_CODES",
    "EXIT_INCOMPLETE",
    "EXIT_INTERNAL",
    "EXIT_INTERRUPTED",
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
  3  internal error: a bug in demaudit; nothing was written (--traceback shows details)
  130  interrupted (Ctrl-C): nothing was written"""

#: Tile statuses of a complete run: audited; a checkpoint-only job's tiles ('not_audited' by
#: design); a re-delivered tile whose every pixel an earlier-listed tile counted ('superseded').
COMPLETE_STATUSES = frozenset({"ok", "not_audited", SUPERSEDED})


def run_status(document: dict[str, Any]) -> int:
    """1 when some test tile failed or was left out of the statistics (no reference, no valid
    pixels, or any status not known to be complete), else 0."""
    statuses = {t["status"] for t in document["tiles"]}
    return EXIT_INCOMPLETE if statuses - COMPLETE_STATUSES else EXIT_CLEAN


def server_job_status(status: str, message: str = "") -> int:
    """The exit status for a server job: a successful job whose message counts failed or
    unaudited tiles is incomplete (1); a failed job had bad input (2) or hit an internal error
    (3); a dismissed one is incomplete (1)."""
    if status in {"accepted", "running"}:
        return EXIT_CLEAN
    if status == "successful":
        counts = [int(n) for n in re.findall(r"(\d+) (?:failed|not audited)", message)]
        return EXIT_INCOMPLETE if any(counts) else EXIT_CLEAN
    if status == "failed":
        return EXIT_INTERNAL if message.startswith("internal error") else EXIT_BAD_INPUT
    return EXIT_INCOMPLETE
