"""Health probes and Prometheus metrics.

``/health/live``: the process answers (200), nothing else is asked; a liveness probe.
``/health/ready``: 200 when the Dask scheduler answers, at least one worker is connected and the
job store takes a write; 503 with the failing checks otherwise; a readiness probe.
``/health``: the older summary (always 200, ``warn`` without workers), kept for compatibility.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.exposition import CONTENT_TYPE_LATEST
from prometheus_client.registry import Collector

from demaudit.service.api.deps import Authorized, ClientDep, DispatcherDep, StoreDep
from demaudit.service.api.problems import responses
from demaudit.service.store.jobs import ACCEPTED, RUNNING, JobStore

router = APIRouter(tags=["Health"])


def cluster_workers(client: Any) -> int | None:
    """Workers connected to the Dask scheduler; None when the scheduler cannot be reached."""
    try:
        if getattr(client, "status", "running") != "running":
            return None
        return len(client.nthreads())
    except Exception:  # noqa: BLE001 - a health probe reports, never fails
        return None


@router.get("/health", name="health")
def health(client: ClientDep, store: StoreDep, dispatcher: DispatcherDep) -> dict[str, Any]:
    """Liveness (this answer) and readiness: the Dask workers the jobs can use."""
    workers = cluster_workers(client)
    counts = store.count_by_status()
    ready = bool(workers)
    return {
        "status": "pass" if ready else "warn",
        "cluster": {"ready": ready, "workers": workers or 0},
        "jobs": {
            "running": counts[RUNNING],
            "queued": counts[ACCEPTED],
            "active_here": dispatcher.active(),
        },
    }


@router.get("/health/live", name="health_live")
def health_live() -> dict[str, str]:
    """Liveness: the process answers requests (a restart would not help otherwise)."""
    return {"status": "pass"}


@router.get(
    "/health/ready",
    name="health_ready",
    responses={503: {"description": "Not ready: the checks say which part failed."}},
)
def health_ready(client: ClientDep, store: StoreDep, dispatcher: DispatcherDep) -> JSONResponse:
    """Readiness: the Dask scheduler answers, workers are connected, the job store is
    writable (a probe write now, and the jobs' last write). 200 when all hold, else 503; each
    check says pass or fail (and why). While the scheduler does not answer, new jobs are refused
    (503 ``cluster-unavailable``) and the client is made anew every few seconds."""
    workers = cluster_workers(client)
    checks: dict[str, dict[str, Any]] = {
        "scheduler": {"status": "pass" if workers is not None else "fail"},
        "workers": {"status": "pass" if workers else "fail", "connected": workers or 0},
        "store": {"status": "pass"},
    }
    if workers is None:
        checks["scheduler"]["reason"] = "the Dask scheduler does not answer"
    elif not workers:
        checks["workers"]["reason"] = "no Dask worker is connected"
    try:
        store.check_writable()
    except Exception as exc:  # noqa: BLE001 - a probe reports, never fails
        checks["store"] = {
            "status": "fail",
            "reason": f"the job store cannot be written ({type(exc).__name__})",
        }
    else:
        problem = dispatcher.store_problem()
        if problem is not None:
            checks["store"] = {
                "status": "fail",
                "reason": f"the last write of a job record failed ({problem.split(':')[0]})",
            }
    ready = all(c["status"] == "pass" for c in checks.values())
    return JSONResponse(
        {"status": "pass" if ready else "fail", "checks": checks},
        status_code=200 if ready else 503,
        headers={"Cache-Control": "no-store"},
    )


class JobCollector(Collector):
    """Job metrics read from the store (and the cluster) at each scrape."""

    def __init__(self, store: JobStore, client: Any) -> None:
        self._store = store
        self._client = client

    def collect(self) -> Iterator[Metric]:
        counts = self._store.count_by_status()
        jobs = GaugeMetricFamily("demaudit_jobs", "Jobs in the store by status", labels=["status"])
        for status, n in counts.items():
            jobs.add_metric([status], n)
        yield jobs
        yield CounterMetricFamily(
            "demaudit_tiles_done",
            "Test tiles finished over all jobs",
            value=self._store.tiles_done_total(),
        )
        yield GaugeMetricFamily(
            "demaudit_queue_length",
            "Jobs accepted and waiting for a free slot",
            value=counts[ACCEPTED],
        )
        yield GaugeMetricFamily(
            "demaudit_cluster_workers",
            "Dask workers connected",
            value=cluster_workers(self._client) or 0,
        )


def metrics_registry(store: JobStore, client: Any) -> CollectorRegistry:
    """A registry of this app's metrics (one per app, not the process-global one)."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(JobCollector(store, client))
    return registry


@router.get(
    "/metrics",
    name="metrics",
    dependencies=[Authorized],
    responses=responses(401),
    response_class=Response,
)
def metrics(request: Request) -> Response:
    """Prometheus metrics: jobs by status, tiles done, queue length, cluster workers."""
    registry: CollectorRegistry = request.app.state.metrics
    return Response(generate_latest(registry), media_type=CONTENT_TYPE_LATEST)
