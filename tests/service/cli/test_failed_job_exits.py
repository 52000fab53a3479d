"""Exit status of a failed server job: from the status document's ``cause`` (type, else HTTP
status), and from the message text only when a server sends no cause."""

from __future__ import annotations

import errno
from typing import Any

import httpx
import pytest

from demaudit.service.api.problems import FAILURE_CAUSES, failure_cause
from demaudit.service.api.routes.documents import FailureCause
from demaudit.service.cli import remote
from demaudit.service.cli.exits import (
    CAUSE_STATUSES,
    EXIT_BAD_INPUT,
    EXIT_INTERNAL,
    failed_job_status,
    server_job_status,
)
from demaudit.service.cli.main import main
from demaudit.service.run import faults
from demaudit.service.run.cluster import ClusterUnavailableError
from demaudit.workers.errors import SpecError, TileReadError

# Expected statuses are the README's exit codes: 2 = the caller's spec or files (a 4xx cause),
# 3 = the run failed in the server, its cluster or its resources (a 5xx cause).
EXPECTED = {
    "invalid-input": 2,
    "tile-unreadable": 2,
    "resources-exhausted": 3,
    "cluster-unavailable": 3,
    "interrupted": 3,
    "internal": 3,
}


def wire_cause(name: str) -> dict[str, Any]:
    """The ``cause`` member as the server serialises it in /jobs/{id}."""
    return FailureCause(**failure_cause(name)).model_dump()


def test_every_cause_the_server_knows_has_an_expected_exit_status():
    assert set(EXPECTED) == set(FAILURE_CAUSES) == set(CAUSE_STATUSES)


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_a_failed_job_exits_by_its_cause_type(name):
    # a message that the text match would read the other way round: the cause decides
    misleading = "internal error" if EXPECTED[name] == 2 else "test.tiles: no file matches"
    assert server_job_status("failed", misleading, cause=wire_cause(name)) == EXPECTED[name]


@pytest.mark.parametrize(
    ("message", "name"),
    [
        ("out of memory while running the job", faults.RESOURCES),
        ("the Dask cluster failed the job: CommClosedError: gone", faults.CLUSTER),
        ("no tile finished for 60 s; workers: 0", faults.CLUSTER),
    ],
)
def test_a_cluster_fault_or_out_of_memory_is_a_failure_of_the_run_not_bad_input(message, name):
    assert server_job_status("failed", message, cause=wire_cause(name)) == EXIT_INTERNAL


@pytest.mark.parametrize(
    ("status", "expected"),
    [(400, 2), (409, 2), (422, 2), (429, 2), (500, 3), (503, 3), (507, 3)],
)
def test_an_unknown_cause_type_exits_by_its_http_status(status, expected):
    for kind in ("urn:demaudit:problem:a-cause-added-later", "https://example.org/other"):
        cause = {"type": kind, "title": "t", "status": status}
        assert failed_job_status("internal error" if expected == 2 else "x", cause) == expected


@pytest.mark.parametrize(
    "cause",
    [
        None,
        {},
        {"type": "urn:demaudit:problem:a-cause-added-later"},
        {"type": 7, "status": "500"},
        {"type": "about:blank", "status": True},
        {"type": "about:blank", "status": 302},
        ["internal", 500],
    ],
)
def test_without_a_usable_cause_the_message_decides(cause):
    assert failed_job_status(faults.INTERNAL_FAILURE, cause) == EXIT_INTERNAL
    assert failed_job_status("test.tiles: no file matches", cause) == EXIT_BAD_INPUT
    assert failed_job_status("", cause) == EXIT_BAD_INPUT


class KilledWorker(Exception):  # noqa: N818 - the name failure_of looks for
    """Named as distributed's: failure_of judges it by its name."""


class CommClosedError(Exception):
    """Named as distributed's."""


@pytest.mark.parametrize(
    "exc",
    [
        MemoryError(),
        OSError(errno.ENOSPC, "No space left on device", "/results/x"),
        KilledWorker("task t"),
        CommClosedError("in <closed TCP>"),
        ClusterUnavailableError("no answer"),
        RuntimeError("a bug"),
        SpecError("test.tiles: no file matches"),
        TileReadError("no test tile could be read: a.tif: not a raster"),
    ],
)
def test_an_older_server_without_causes_is_read_from_its_own_messages(exc):
    # the messages an older server sent are those faults.failure_of writes for each cause
    cause, message = faults.failure_of(exc)
    assert server_job_status("failed", message) == EXPECTED[cause]


@pytest.mark.parametrize(
    "message",
    [
        faults.RESTART_MESSAGE,
        faults.RESTART_QUEUED_MESSAGE,
        faults.SHUTDOWN_MESSAGE,
        faults.LOST_MESSAGE,
        "the Dask scheduler does not answer",
        "no tile finished for 60 s; workers: 0",
    ],
)
def test_an_older_servers_interruptions_and_cluster_faults_exit_3(message):
    assert server_job_status("failed", message) == EXIT_INTERNAL


def _serve(document: dict[str, Any]) -> Any:
    def http_client(args: Any, settings: Any) -> httpx.Client:
        def answer(request: httpx.Request) -> httpx.Response:
            assert request.url.path == f"/jobs/{document['jobID']}"
            return httpx.Response(200, json=document)

        transport = httpx.MockTransport(answer)
        return httpx.Client(base_url="http://server.test", transport=transport)

    return http_client


@pytest.mark.parametrize(
    ("name", "message", "expected"),
    [
        (faults.RESOURCES, "out of memory while running the job", 3),
        (faults.CLUSTER, faults.LOST_MESSAGE, 3),
        (faults.INPUT, "test.tiles: no file matches", 2),
        (None, "test.tiles: no file matches", 2),  # an older server: no cause member
        (None, faults.INTERNAL_FAILURE, 3),
    ],
)
@pytest.mark.parametrize("watched", [False, True])
def test_demaudit_status_exits_by_the_cause_it_reads(
    monkeypatch, tmp_path, capsys, name, message, expected, watched
):
    document = {
        "jobID": "j1",
        "status": "failed",
        "message": message,
        "progress": 40,
        "tiles": {"done": 2, "total": 5},
    }
    if name is not None:
        document["cause"] = wire_cause(name)
    monkeypatch.setattr(remote, "http_client", _serve(document))
    argv = ["status", "j1", "--server", "http://server.test", "--token", "t"]
    assert main(argv + (["--watch", "--interval", "0"] if watched else [])) == expected
    assert message in capsys.readouterr().out
