"""The dispatcher's store writes: a refusing store is noted for the readiness probe, and a job's
end it refused is kept and written at a later tick."""

from __future__ import annotations

import sqlite3
from typing import Any

import pytest

from demaudit.service.run.faults import StoreWriteError
from demaudit.service.run.recorder import JobRecorder
from demaudit.service.store.jobs import FAILED, RUNNING, JobRecord, MemoryJobStore, utc_now


class Refusing(MemoryJobStore):
    def __init__(self) -> None:
        super().__init__()
        self.refuse = False

    def update(self, job_id: str, changes: Any, **kwargs: Any) -> JobRecord | None:
        if self.refuse:
            raise sqlite3.OperationalError("database or disk is full")
        return super().update(job_id, changes, **kwargs)


@pytest.fixture
def store() -> Refusing:
    store = Refusing()
    now = utc_now()
    store.add(JobRecord("j1", "dem-audit", RUNNING, "running", now, now, inputs={}))
    return store


def test_a_refused_write_raises_and_is_noted_until_one_succeeds(store):
    recorder = JobRecorder(store)
    store.refuse = True
    with pytest.raises(StoreWriteError, match="disk is full"):
        recorder.write("j1", {"message": "x"})
    assert "disk is full" in (recorder.problem() or "")
    store.refuse = False
    assert recorder.write("j1", {"message": "y"}) is not None
    assert recorder.problem() is None


def test_an_end_the_store_refused_is_written_at_a_later_retry(store):
    recorder = JobRecorder(store)
    store.refuse = True
    recorder.write_end("j1", {"status": FAILED, "message": "boom", "cause": "internal"})
    recorder.retry_unrecorded()  # still refused: kept
    store.refuse = False
    assert store.get("j1").status == RUNNING
    recorder.retry_unrecorded()
    assert store.get("j1").status == FAILED and store.get("j1").message == "boom"
    store.update("j1", {"message": "later"})
    recorder.retry_unrecorded()  # written once: not written again
    assert store.get("j1").message == "later"
