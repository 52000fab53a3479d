"""Wall time of a run's phases, and the time stamps of summary.json."""

from __future__ import annotations

import datetime as dt
import time


class Phases:
    """Wall time of the phases of a run (seconds, in the order they ran), for summary.json."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self._last = time.perf_counter()

    def mark(self, phase: str) -> None:
        now = time.perf_counter()
        self.seconds[phase] = round(self.seconds.get(phase, 0.0) + now - self._last, 3)
        self._last = now


def now() -> str:
    """The current time, ISO 8601 UTC to the second."""
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds")
