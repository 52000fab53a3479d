"""A time limit per tile task: a tile whose task has RUN longer than the limit is cancelled and
recorded as failed ("tile X did not finish within N s; cancelled"); the rest of the job goes on.

The rule counts running time only. Each Dask worker tells the scheduler, in every heartbeat
(every 0.5 s on clusters of up to 10 workers, longer on bigger ones), how long each task it
executes has run since it started on a thread. :class:`TileClock` asks the scheduler for these
figures every ``poll_s`` seconds (from a daemon thread) and cancels the job's tasks whose running
time exceeds the limit. A task that waits (in the scheduler's queue or on a worker) has no running
time, so a long queue of quick tiles on few workers is never cancelled however long the job
takes; a task run again after a lost worker starts from zero. A task may run up to about
``poll_s`` plus one heartbeat beyond the limit before it is cancelled. A task of several tiles
(service/run/tile_tasks.py) has the limit once per tile; when it is cut short the job runs its
tiles again one per task, so that only the hung tile fails.

What cancelling can and cannot do: Dask cannot stop a Python thread. Cancelling releases the
task (the job no longer waits for it), but the worker's thread stays inside the hung call and
Dask still counts it as busy, so the tasks the scheduler has already handed to that worker would
wait behind it for ever. The clock therefore restarts that worker (its nanny starts a fresh
process; the tasks queued there go to other workers; tasks of other jobs running there run
again). A worker without a nanny cannot be restarted: that is logged, and tasks queued on it
wait for the hung call (in the service, the stall watchdog does not see them either).
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable, Iterable, Sequence
from typing import Any

__all__ = [
    "DEFAULT_TILE_TIMEOUT_S",
    "TileClock",
    "poll_interval",
    "running_tasks",
    "timeout_reason",
]

log = logging.getLogger("demaudit.jobs")

#: Default limit on one tile task's running time (seconds): generous (a tile of the size the
#: workers are made for takes seconds to a minute), so that only a hung tile reaches it.
DEFAULT_TILE_TIMEOUT_S = 1800.0

#: How long a worker restart may take before the clock gives up on it (seconds).
RESTART_TIMEOUT_S = 60.0

Running = dict[str, tuple[str, float]]
"""Task key -> (worker address, seconds it has run)."""


def timeout_reason(tile_id: str, limit_s: float) -> str:
    """The failure reason of a tile cancelled at its time limit."""
    return f"tile {tile_id} did not finish within {limit_s:g} s; cancelled"


def poll_interval(limit_s: float) -> float:
    """How often the clock looks: a tenth of the limit, between 0.2 s and 10 s."""
    return min(10.0, max(0.2, limit_s / 10.0))


def _scheduler_query() -> Callable[..., Running]:
    """The function run on the scheduler (nested, so that it is pickled by value: the scheduler
    need not have demaudit installed)."""

    def running(dask_scheduler: Any) -> Running:
        import time as clock

        now = clock.time()
        return {
            str(ts.key): (address, seconds + max(0.0, now - ws.last_seen))
            for address, ws in dask_scheduler.workers.items()
            for ts, seconds in ws.executing.items()
        }

    return running


def running_tasks(client: Any) -> Running:
    """Every task a worker executes now: its worker and how long it has run (the workers' last
    heartbeats plus the time since)."""
    answer: Running = client.run_on_scheduler(_scheduler_query())
    return answer


class TileClock:
    """Watches the futures of one job's tile tasks and cancels those running past limit_s.

    ``tile_of(key)`` names the tile of a task key; :meth:`reason` gives the failure reason of
    a cancelled task's key (None for the others). Use as a context manager (the watching thread
    runs inside it), or call :meth:`check` for one look.
    """

    def __init__(
        self,
        client: Any,
        futures: Iterable[Any],
        limit_s: float,
        *,
        tiles_of: Callable[[str], Sequence[str]],
        poll_s: float | None = None,
    ) -> None:
        self._client = client
        self._futures = {str(f.key): f for f in futures}
        self._lock = threading.Lock()
        self.limit_s = limit_s
        self._tiles_of = tiles_of
        self.poll_s = poll_interval(limit_s) if poll_s is None else poll_s
        self._reasons: dict[str, str] = {}
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def watch(self, futures: Iterable[Any]) -> None:
        """Watch these futures too (tasks submitted after the clock started)."""
        with self._lock:
            self._futures.update({str(f.key): f for f in futures})

    def reason(self, key: Any) -> str | None:
        """Why the task of key was cancelled (None: it was not)."""
        return self._reasons.get(str(key))

    def __enter__(self) -> TileClock:
        self._thread = threading.Thread(target=self._watch, name="demaudit-tile-clock", daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=RESTART_TIMEOUT_S + 10)

    def _watch(self) -> None:
        failures = 0
        while not self._stop.wait(self.poll_s):
            try:
                self.check()
            except Exception:  # noqa: BLE001 - a failed look is retried at the next poll
                level = logging.WARNING if failures == 0 else logging.DEBUG  # say it once
                log.log(level, "the tile time limit could not be checked", exc_info=True)
                failures += 1

    def check(self) -> list[str]:
        """One look: cancel the tasks running past the limit, restart their workers; the keys
        cancelled."""
        with self._lock:
            self._futures = {k: f for k, f in self._futures.items() if not f.done()}
            if not self._futures:
                return []
            watched = dict(self._futures)
        overdue = {
            key: worker
            for key, (worker, seconds) in running_tasks(self._client).items()
            if key in watched and seconds > self.limit_s * len(self._tiles_of(key))
        }
        if not overdue:
            return []
        for key in overdue:  # the reason first: the job's thread reads it once the task ends
            tiles = self._tiles_of(key)
            limit = self.limit_s * len(tiles)
            self._reasons[key] = timeout_reason(", ".join(tiles), limit)
            log.warning("%s", self._reasons[key])
        with self._lock:
            cancelled = [self._futures.pop(k) for k in overdue if k in self._futures]
        _cancel(self._client, cancelled)
        self._restart(sorted(set(overdue.values())))
        return sorted(overdue)

    def _restart(self, workers: list[str]) -> None:
        """Restart the workers stuck in a cancelled task (see the module docstring)."""
        try:
            self._client.restart_workers(workers, timeout=RESTART_TIMEOUT_S)
        except Exception as exc:  # noqa: BLE001 - the job goes on; queued tasks may wait
            log.warning("could not restart the stuck worker(s) %s: %s", ", ".join(workers), exc)


def _cancel(client: Any, futures: list[Any]) -> None:
    """Cancel these futures on purpose (a job's client then does not take it for a lost
    cluster)."""
    cancel_tasks = getattr(client, "cancel_tasks", None)
    if cancel_tasks is not None:
        cancel_tasks(futures)
    else:
        client.cancel(futures)
