"""Exit statuses of a local run and of a followed server job; the cluster options' checks."""

from __future__ import annotations

import argparse
import socket

import pytest

from demaudit.service.cli.cluster_options import (
    cluster_options,
    positive_int,
    reachable,
    scheduler_address,
)
from demaudit.service.cli.exits import run_status, server_job_status
from demaudit.service.run.faults import INTERNAL_FAILURE
from demaudit.service.settings import Settings
from demaudit.workers.errors import SpecError


@pytest.mark.parametrize(
    ("statuses", "expected"),
    [
        (["ok", "ok"], 0),
        (["ok", "not_audited", "superseded"], 0),
        (["ok", "failed"], 1),
        (["ok", "no_reference"], 1),
        (["ok", "a status not known to be complete"], 1),
    ],
)
def test_a_run_is_clean_only_when_every_tile_is_complete(statuses, expected):
    document = {"tiles": [{"tile": str(i), "status": s} for i, s in enumerate(statuses)]}
    assert run_status(document) == expected


@pytest.mark.parametrize(
    ("status", "message", "expected"),
    [
        ("successful", "finished: 4 test tiles, 0 failed", 0),
        ("successful", "finished: 4 test tiles, 1 failed", 1),
        ("failed", "test.tiles: no file matches", 2),
        ("failed", "checkpoints.file: points.csv: no 'height' column", 2),
        ("failed", INTERNAL_FAILURE, 3),
        ("successful", "finished: 4 test tiles, 0 failed, 2 not audited (see the cautions)", 1),
        ("dismissed", "dismissed by request", 1),
        ("accepted", "waiting", 0),
        ("running", "2 of 4 tiles done", 0),
    ],
)
def test_a_server_job_maps_onto_the_same_exit_statuses(status, message, expected):
    assert server_job_status(status, message) == expected


def test_option_types_refuse_what_they_cannot_use():
    assert positive_int("3") == 3
    assert scheduler_address(" tcp://h:8786 ") == "tcp://h:8786"
    assert scheduler_address("[::1]:8786") == "[::1]:8786"
    for bad in ("0", "-1", "x"):
        with pytest.raises(argparse.ArgumentTypeError):
            positive_int(bad)
    for bad in ("h", "tcp://h:0", "tcp://h:70000", "tcp://h:port"):
        with pytest.raises(argparse.ArgumentTypeError):
            scheduler_address(bad)


def test_a_scheduler_that_does_not_answer_is_named_by_its_option():
    with socket.socket() as free:
        free.bind(("127.0.0.1", 0))
        port = free.getsockname()[1]  # closed again when the block ends: nothing listens
    with pytest.raises(SpecError, match="--scheduler: cannot reach a Dask scheduler"):
        reachable(f"tcp://127.0.0.1:{port}", option="--scheduler")


def test_workers_and_an_external_scheduler_exclude_each_other(tmp_path):
    settings = Settings(job_store=tmp_path / "j.sqlite", results_dir=tmp_path / "r")
    both = argparse.Namespace(scheduler="tcp://h:8786", workers=2)
    with pytest.raises(SpecError, match="--workers"):
        cluster_options(both, settings)
    local = argparse.Namespace(scheduler=None, workers=3)
    assert cluster_options(local, settings.model_copy(update={"scheduler": None})) == (None, 3)
