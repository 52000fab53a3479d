"""Tile tasks in batches: how many tiles a task gets, keys that name them, a result per tile
whatever happens to the task, and a batch cut short by the time limit run again tile by tile so
that only the hung tile fails (stand-ins, then the session's real LocalCluster)."""

from __future__ import annotations

from typing import Any

import pytest

from demaudit.service.run.cluster import JobClient
from demaudit.service.run.tile_limit import TileClock, timeout_reason
from demaudit.service.run.tile_tasks import (
    MAX_TILES_PER_TASK,
    TileTasks,
    task_key,
    tiles_of_key,
    tiles_per_task,
)
from demaudit.workers.tile.batch import TileCall
from demaudit.workers.tile.records import FAILED, OK, TileResult


class Done:
    """A finished (or failed) Dask future stand-in."""

    def __init__(self, key: str, value: Any = None, error: Exception | None = None) -> None:
        self.key, self._value, self._error = key, value, error

    def result(self) -> Any:
        if self._error is not None:
            raise self._error
        return self._value


def calls(*ids: str) -> list[TileCall]:
    return [TileCall(t, ()) for t in ids]


def test_tiles_per_task_leaves_sixteen_tasks_per_worker_and_at_most_four_tiles():
    assert tiles_per_task(16, workers=2) == 1  # a small job (the demo's 36 tiles too): as before
    assert tiles_per_task(36, workers=2) == 1
    assert tiles_per_task(64, workers=2) == 2
    assert tiles_per_task(128, workers=2) == MAX_TILES_PER_TASK == 4
    assert tiles_per_task(10_000, workers=2) == 4
    assert tiles_per_task(10_000, workers=400) == 1 and tiles_per_task(0, workers=2) == 1


def test_keys_name_their_tiles():
    assert task_key(["t_0_0"], "abc") == "audit-tile-t_0_0-abc"  # one tile: the key as before
    assert tiles_of_key(task_key(["t_0_0", "t_0_1", "t_1_0"], "abc")) == ["t_0_0", "t_0_1", "t_1_0"]


def test_tiles_go_in_batches_in_order_and_each_task_knows_its_tiles():
    submitted: list[tuple[Any, list[TileCall], str]] = []

    def submit(function: Any, batch: list[TileCall], *, key: str, pure: bool) -> Done:
        submitted.append((function, batch, key))
        return Done(key)

    tasks = TileTasks(submit, run_id="r", per_task=2)
    futures = tasks.submit_all(calls("a", "b", "c", "d", "e"))
    assert [k for _, _, k in submitted] == [
        "audit-tile-a|b-r",
        "audit-tile-c|d-r",
        "audit-tile-e-r",
    ]
    assert [[c.tile_id for c in b] for _, b, _ in submitted] == [["a", "b"], ["c", "d"], ["e"]]
    assert [tasks.tiles(f.key) for f in futures] == [("a", "b"), ("c", "d"), ("e",)]
    alone = tasks.split(futures[0])
    assert [f.key for f in alone] == ["audit-tile-a-r.alone", "audit-tile-b-r.alone"]
    assert [tiles_of_key(f.key) for f in alone] == [["a"], ["b"]]
    assert tasks.futures == [*futures, *alone]  # every task, to cancel them all


def test_every_tile_of_a_lost_task_fails_with_the_cause_and_a_finished_task_gives_its_results():
    tasks = TileTasks(lambda *a, **k: Done(k["key"]), run_id="r", per_task=2)
    [future] = tasks.submit_all(calls("a", "b"))
    lost = Done(future.key, error=RuntimeError("worker died"))
    failed = tasks.results(lost)  # type: ignore[arg-type]
    assert [(r.tile_id, r.status) for r in failed] == [("a", FAILED), ("b", FAILED)]
    assert all(r.reason == "task failed on the cluster: RuntimeError: worker died" for r in failed)
    own = [TileResult("a", OK, None), TileResult("b", OK, None)]
    assert tasks.results(Done(future.key, own)) == own  # type: ignore[arg-type]
    short = tasks.results(Done(future.key, own[:1]))  # type: ignore[arg-type]
    assert [(r.tile_id, r.status) for r in short] == [("a", FAILED), ("b", FAILED)]
    assert short[0].reason == "the task returned results for other tiles (a)"


@pytest.mark.integration
def test_a_batch_with_a_hung_tile_is_run_again_tile_by_tile_and_only_that_tile_fails(
    dask_client: Any,
):
    client: Any = JobClient(dask_client)  # as the service runs a job
    ids = ("q0", "hung", "q1", "q2", "q3", "q4")

    def submit(*args: Any, **kwargs: Any) -> Any:
        return client.submit(*args, **kwargs)

    def tiles_of(batch: list[Any]) -> list[Any]:
        """Stand-in for batch.audit_tiles (nested: pickled by value, the workers need not
        import the tests): tile 'hung' hangs, the others finish."""
        import time

        from demaudit.workers.tile.records import OK, TileResult

        out = []
        for call in batch:
            if call.tile_id == "hung":
                time.sleep(120)
            out.append(TileResult(call.tile_id, OK, None))
        return out

    tasks = TileTasks(submit, run_id="b1", per_task=3, function=tiles_of)
    futures = tasks.submit_all(calls(*ids))
    with TileClock(client, futures, 1.0, tiles_of=tasks.tiles) as clock:
        results = {r.tile_id: r for batch in tasks.arrivals(futures, clock) for r in batch}
    assert sorted(results) == sorted(ids)  # a result for every tile, each once
    assert results["hung"].status == FAILED
    assert results["hung"].reason == timeout_reason("hung", 1.0)
    assert all(results[t].status == OK for t in ids if t != "hung")
    assert not client.lost()
