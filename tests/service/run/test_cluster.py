"""Dask's configuration for deployed processes (service/run/cluster.py): the environment
variables stand for the same settings the embedded cluster sets through dask.config."""

from __future__ import annotations

import json
import os
import subprocess
import sys

from demaudit.service.run.cluster import HOUSEKEEPING, SCHEDULER_ENV, WORKER_ENV, dask_env


def test_dask_env_names_follow_dasks_rule_for_nesting_and_dashes() -> None:
    assert dask_env({"distributed.admin.system-monitor.interval": "2s"}) == {
        "DASK_DISTRIBUTED__ADMIN__SYSTEM_MONITOR__INTERVAL": "2s"
    }


def test_a_fresh_process_reads_the_housekeeping_settings_from_the_worker_env() -> None:
    # dask itself turns the variables back into configuration at import: the settings a
    # `dask worker` started with WORKER_ENV runs with
    keys = list(HOUSEKEEPING)
    script = (
        f"import dask, distributed, json; print(json.dumps([dask.config.get(k) for k in {keys!r}]))"
    )
    env = {k: v for k, v in os.environ.items() if not k.startswith("DASK_")} | WORKER_ENV
    out = subprocess.run(
        [sys.executable, "-c", script], env=env, capture_output=True, text=True, check=True
    )
    assert json.loads(out.stdout) == [HOUSEKEEPING[k] for k in keys]


def test_the_scheduler_gets_the_housekeeping_but_no_worker_settings() -> None:
    assert set(SCHEDULER_ENV) < set(WORKER_ENV)
    assert "DASK_DISTRIBUTED__ADMIN__TICK__INTERVAL" in SCHEDULER_ENV
    assert not any("__WORKER__" in k for k in SCHEDULER_ENV)
