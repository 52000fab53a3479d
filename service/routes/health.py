"""Liveness with cluster readiness, and Prometheus metrics."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from fastapi import APIRouter, Request, Response
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.exposition import CONTENT_TYPE_LATEST
from prometheus_client.registry import Collector

from service.deps import Authorized, ClientDep, DispatcherDep, StoreDep
from service.jobstore import ACCEPTED, RUNNING, JobStore
from service.problems import responses

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
