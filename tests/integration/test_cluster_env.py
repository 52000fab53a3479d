"""The embedded cluster's workers run single-threaded numeric and GDAL code
(service/run/cluster.py)."""

from __future__ import annotations

import os

import pytest

from demaudit.service.run.cluster import PRE_SPAWN_ENV, WORKER_ENV


def _worker_env() -> dict[str, str | None]:
    return {name: os.environ.get(name) for name in WORKER_ENV}


def test_every_worker_has_the_worker_env(dask_client) -> None:
    seen = dask_client.run(_worker_env)
    assert len(seen) == 2
    for env in seen.values():
        assert env == WORKER_ENV


def _start_env() -> dict[str, str]:
    """The environment the process was started with (what glibc's malloc read)."""
    with open("/proc/self/environ", "rb") as f:
        pairs = [p.split(b"=", 1) for p in f.read().split(b"\0") if b"=" in p]
    return {k.decode(): v.decode() for k, v in pairs}


def test_malloc_settings_are_there_when_the_worker_process_starts(dask_client) -> None:
    if not os.path.exists("/proc/self/environ"):
        pytest.skip("needs /proc (Linux)")
    for env in dask_client.run(_start_env).values():
        assert {k: env.get(k) for k in PRE_SPAWN_ENV} == {k: WORKER_ENV[k] for k in PRE_SPAWN_ENV}


def _profiler_enabled() -> bool:
    import dask

    return bool(dask.config.get("distributed.worker.profile.enabled"))


def test_the_workers_sampling_profiler_is_off(dask_client) -> None:
    # dask reads DASK_DISTRIBUTED__WORKER__PROFILE__ENABLED at import: it must be there at start
    assert not any(dask_client.run(_profiler_enabled).values())


def _result_of_a_task() -> int:
    return 41 + 1


def test_results_come_from_the_workers_not_through_the_scheduler(dask_client) -> None:
    # the scheduler lives in the client's process: relaying each tile's result through it
    # cost a second receive and send per result (issue 13)
    assert dask_client.direct_to_workers is True
    assert dask_client.submit(_result_of_a_task, pure=False).result() == 42


def _worker_housekeeping(dask_worker) -> dict[str, float]:
    """The intervals a running worker actually uses (seconds)."""
    return {
        "tick": dask_worker._tick_interval,
        "memory": dask_worker.memory_manager.memory_monitor_interval,
    }


def _scheduler_tick(dask_scheduler) -> float:
    return float(dask_scheduler._tick_interval)


def test_dasks_housekeeping_runs_at_the_slower_intervals(dask_client) -> None:
    # HOUSEKEEPING: every wake-up of an event loop takes the GIL from the tile's thread
    from demaudit.service.run.cluster import HOUSEKEEPING

    assert HOUSEKEEPING["distributed.admin.tick.interval"] == "500ms"
    for seen in dask_client.run(_worker_housekeeping).values():
        assert seen == {"tick": 0.5, "memory": 0.5}
    assert dask_client.run_on_scheduler(_scheduler_tick) == 0.5
