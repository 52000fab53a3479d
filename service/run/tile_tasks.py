"""The tile phase's tasks on the cluster: a few tiles per task (workers/tile/batch.py), keys that
name their tiles, and what a task's outcome means for each of its tiles.

    tiles ──► batches of tiles_per_task ──► one task each, key audit-tile-<a>|<b>|<c>-<run id>
                                                 │
      a result per tile ◄── the task's results ◄─┤ (a lost worker: retried, then every tile
                                                 │  of the task failed with the cause)
      split: one task per tile again ◄── the time limit cut the task short (only the hung
                                          tile then fails; the others are audited anew)

Batches stay small (at most MAX_TILES_PER_TASK, and at least TASKS_PER_WORKER tasks per worker
thread) so that the work still spreads evenly over the workers and the progress a person follows
on the job page moves in small steps; a small job keeps one tile per task. The tile ids in a key
are for people, task streams and tests (tiles_of_key); the runner keeps its own map from key to
tiles.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Sequence

from distributed import Future, as_completed

from demaudit.service.run.tile_limit import TileClock
from demaudit.workers.tile.batch import TileCall, audit_tiles
from demaudit.workers.tile.records import FAILED, TileResult

__all__ = [
    "MAX_TILES_PER_TASK",
    "TASKS_PER_WORKER",
    "TileTasks",
    "task_key",
    "tiles_of_key",
    "tiles_per_task",
]

KEY_PREFIX = "audit-tile-"
_SEPARATOR = "|"
#: Most tiles in one task, and the fewest tasks each worker thread gets (measured on the
#: 2-core machine: benchmarks/RESULTS.md, issue 13).
MAX_TILES_PER_TASK = 4
TASKS_PER_WORKER = 16


def tiles_per_task(tiles: int, *, workers: int) -> int:
    """How many tiles go in one task for a phase of ``tiles`` on ``workers`` worker threads:
    as many as leave every thread TASKS_PER_WORKER tasks, 1 to MAX_TILES_PER_TASK."""
    return max(1, min(MAX_TILES_PER_TASK, tiles // (max(1, workers) * TASKS_PER_WORKER)))


def task_key(tile_ids: Sequence[str], run_id: str) -> str:
    """The key of the task of these tiles: ``audit-tile-<a>|<b>-<run id>``."""
    return f"{KEY_PREFIX}{_SEPARATOR.join(tile_ids)}-{run_id}"


def tiles_of_key(key: object) -> list[str]:
    """The tile ids a task key names (task_key; for reading task streams: a tile id that
    itself holds '|' reads as two)."""
    return str(key).removeprefix(KEY_PREFIX).rsplit("-", 1)[0].split(_SEPARATOR)


class TileTasks:
    """Submits a phase's tile calls in batches and knows each task's tiles."""

    def __init__(
        self,
        submit: Callable[..., Future],
        *,
        run_id: str,
        per_task: int,
        function: Callable[[list[TileCall]], list[TileResult]] = audit_tiles,
    ) -> None:
        self._submit = submit
        self._calls: dict[str, TileCall] = {}
        self._run_id = run_id
        self._per_task = max(1, per_task)
        self._tiles: dict[str, tuple[str, ...]] = {}
        self._function = function
        self.futures: list[Future] = []  # every task submitted (to cancel them all)

    def submit_all(self, calls: Iterable[TileCall]) -> list[Future]:
        """One task per batch of per_task tiles, in the calls' order, each submitted as soon
        as its calls are made (the workers start while the client makes the rest)."""
        futures: list[Future] = []
        batch: list[str] = []
        for call in calls:
            self._calls[call.tile_id] = call
            batch.append(call.tile_id)
            if len(batch) == self._per_task:
                futures.append(self._task(batch))
                batch = []
        if batch:
            futures.append(self._task(batch))
        return futures

    def arrivals(
        self, futures: list[Future], clock: TileClock | None
    ) -> Iterator[list[TileResult]]:
        """The results of each task as it finishes (TileTasks.results). A task of several tiles
        that the clock cut short is run again one tile per task (their results come later), so
        that only the hung tile fails."""
        arriving = as_completed(futures)
        for future in arriving:
            timed_out = clock.reason(future.key) if clock is not None else None
            if timed_out is not None and len(self.tiles(future.key)) > 1:
                alone = self.split(future)
                future.release()
                if clock is not None:
                    clock.watch(alone)
                for again in alone:
                    arriving.add(again)
                continue
            results = self.results(future, timed_out)
            future.release()
            yield results

    def split(self, future: Future) -> list[Future]:
        """The tiles of future's task, one task each (after the time limit cut it short)."""
        return [self._task([t], suffix=".alone") for t in self.tiles(future.key)]

    def tiles(self, key: object) -> tuple[str, ...]:
        """The tiles of the task of key."""
        return self._tiles[str(key)]

    def results(self, future: Future, timed_out: str | None = None) -> list[TileResult]:
        """A result per tile of future's task: its own, or a failure naming why the task gave
        none (timed_out: the time limit's reason; or the error of a lost task)."""
        tiles = self.tiles(future.key)
        if timed_out is not None:
            return [TileResult(t, FAILED, timed_out) for t in tiles]
        try:
            results: list[TileResult] = future.result()
        except Exception as exc:  # noqa: BLE001 - report, never lose the job
            reason = f"task failed on the cluster: {type(exc).__name__}: {exc}"
            return [TileResult(t, FAILED, reason) for t in tiles]
        if [r.tile_id for r in results] != list(tiles):  # never a tile silently left out
            got = ", ".join(r.tile_id for r in results) or "none"
            reason = f"the task returned results for other tiles ({got})"
            return [TileResult(t, FAILED, reason) for t in tiles]
        return results

    def _task(self, tile_ids: list[str], *, suffix: str = "") -> Future:
        key = task_key(tile_ids, self._run_id + suffix)
        self._tiles[key] = tuple(tile_ids)
        calls = [self._calls[t] for t in tile_ids]
        future: Future = self._submit(self._function, calls, key=key, pure=False)
        self.futures.append(future)
        return future
