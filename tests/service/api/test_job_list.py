"""The job list's parameters (OGC 18-062r2, /req/job-list): default statuses, type, duration,
creation time, paging and the largest page."""

from __future__ import annotations

import datetime as dt
from typing import Any

import pytest

from demaudit.service.store.jobs import JobRecord
from tests.support.ogc import validate

# --- the job list's parameters -----------------------------------------------------------------

T0 = dt.datetime(2026, 3, 1, 12, 0, tzinfo=dt.UTC)


def _record(job_id: str, *, created_h: float, ran_s: float | None) -> JobRecord:
    created = T0 + dt.timedelta(hours=created_h)
    started = None if ran_s is None else created + dt.timedelta(seconds=5)
    finished = None if started is None or ran_s is None else started + dt.timedelta(seconds=ran_s)
    return JobRecord(
        job_id=job_id,
        process_id="dem-audit",
        status="accepted" if ran_s is None else "successful",
        message="",
        created=created,
        updated=finished or created,
        started=started,
        finished=finished,
        owner="alice",
    )


@pytest.fixture
def listed(api, store):
    """Three jobs of alice: waiting (never started), 10 s and 100 s long, an hour apart."""
    for record in (
        _record("waiting", created_h=0, ran_s=None),
        _record("short", created_h=1, ran_s=10),
        _record("long", created_h=2, ran_s=100),
    ):
        store.add(record)
    return api


def _ids(api, **params: Any) -> set[str]:
    response = api.get("/jobs", params=params)
    assert response.status_code == 200, response.text
    validate(response.json(), "jobList.yaml")
    return {job["jobID"] for job in response.json()["jobs"]}


def test_the_job_list_leaves_out_waiting_jobs_unless_asked(listed):
    """OGC 18-062r2, /req/job-list/status-response: without a status parameter only running
    and finished jobs (successful, failed, dismissed) are listed; status=accepted lists the
    waiting ones."""
    assert _ids(listed) == {"short", "long"}
    assert _ids(listed, status="accepted") == {"waiting"}
    assert _ids(listed, status=["accepted", "successful"]) == {"waiting", "short", "long"}


def test_the_job_list_filters_by_type(listed):
    assert _ids(listed, type="process") == {"short", "long"}
    assert _ids(listed, type="other") == set()


def test_the_job_list_filters_by_duration(listed):
    """OGC 18-062r2, job-list duration: finished - started, seconds; a job that never started
    has no duration and is left out."""
    assert _ids(listed, minDuration=50) == {"long"}
    assert _ids(listed, maxDuration=50) == {"short"}
    assert _ids(listed, minDuration=10, maxDuration=100) == {"short", "long"}
    assert listed.get("/jobs", params={"minDuration": -1}).status_code == 400


def test_the_job_list_filters_by_creation_time(listed):
    """OGC 18-062r2, /req/job-list/datetime-response: the created time within the interval."""
    everything = {"status": ["accepted", "successful"]}
    assert _ids(listed, datetime="2026-03-01T13:00:00Z") == {"short"}
    assert _ids(listed, datetime="2026-03-01T12:30:00Z/..", **everything) == {"short", "long"}
    assert _ids(listed, datetime="../2026-03-01T13:00:00Z", **everything) == {"waiting", "short"}
    assert _ids(listed, datetime="2026-03-01T12:00:00Z/2026-03-01T13:00:00Z") == {"short"}
    for bad in ("yesterday", "2026-03-02T00:00:00Z/2026-03-01T00:00:00Z", "..", "a/b/c"):
        response = listed.get("/jobs", params={"datetime": bad})
        assert response.status_code == 400, bad
        assert "datetime" in response.json()["detail"]


def test_the_job_list_pages_filtered_results(listed):
    page = listed.get("/jobs", params={"minDuration": 0, "limit": 1}).json()
    assert page["numberMatched"] == 2 and page["numberReturned"] == 1
    assert [link["rel"] for link in page["links"]] == ["self", "next"]
    assert all(isinstance(link["title"], str) for link in page["links"])


@pytest.mark.parametrize("limit", [1, 1000, 10_000, 50_000])
def test_limit_up_to_ten_thousand_is_taken(listed, limit):
    """OGC 18-062r2, job-list: limit 1..10,000, default 10; a larger value counts as the
    maximum."""
    response = listed.get("/jobs", params={"limit": limit})
    assert response.status_code == 200
    assert response.json()["numberReturned"] == min(limit, 2)
    assert listed.get("/jobs", params={"limit": 0}).status_code == 400
