"""The REST service: ``create_app(settings)`` builds the FastAPI app (OGC API - Processes).

::

    request ─► BodyLimit ─► router (landing | processes | jobs | schedules | health) ─► deps
                                 │ POST execution: demaudit.workers.spec.resolve (data roots)
                                 ▼
    scheduling.scheduler ──► run.dispatcher.JobDispatcher ── thread per job ──► run.runner.run_job
    (lease holder only)  │ on_end ──► scheduling.notify (webhooks)             │ one shared
                store.jobs (SQLite) ◄── status, progress ────────────────────┘ Dask client

(module names relative to ``demaudit.service``)

The lifespan opens the job store, connects the Dask client (``Settings.scheduler``, watched and
made anew after an outage, or an embedded LocalCluster), starts the dispatcher (its lease in the
store; it fails the jobs of API processes that are gone) and the scheduler loop; at shut-down
it stops the scheduler, fails and stops the jobs still running and gives pending webhook calls
a moment. Exceptions become problem documents in ``demaudit.service.api.problems``
only.
"""

from __future__ import annotations

import asyncio
import contextvars
import datetime as dt
import ipaddress
import json
import logging
from collections.abc import AsyncIterator, Callable
from contextlib import AbstractAsyncContextManager, AbstractContextManager, asynccontextmanager
from typing import Any

from fastapi import FastAPI
from fastapi.staticfiles import StaticFiles
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from demaudit.service.api import problems
from demaudit.service.api.auth import Principals, load_principals
from demaudit.service.api.deps import Authorized
from demaudit.service.api.negotiation import AcceptsJson, HeadAsGet
from demaudit.service.api.openapi import serve_openapi30
from demaudit.service.api.public_base import PublicBase
from demaudit.service.api.routes import health, jobs, landing, pages, processes, schedules
from demaudit.service.run.cluster import ClusterConnection, cluster_connection
from demaudit.service.run.dispatcher import JobDispatcher
from demaudit.service.run.job_thread import Runner, current_job_id
from demaudit.service.run.runner import run_job
from demaudit.service.scheduling.cron import Clock, scaled_clock
from demaudit.service.scheduling.notify import Notifier
from demaudit.service.scheduling.scheduler import Scheduler, resolve_inputs
from demaudit.service.scheduling.webhook_address import Resolver, system_resolver
from demaudit.service.settings import Settings
from demaudit.service.store.jobs import JobStore
from demaudit.service.store.sqlite_jobs import SqliteJobStore

__all__ = ["BodyLimit", "JsonFormatter", "check_serving", "create_app", "log_config"]

ClientFactory = Callable[[Settings], AbstractContextManager[Any]]
SHUTDOWN_WAIT_S = 30.0
WEBHOOK_SHUTDOWN_WAIT_S = 5.0

log = logging.getLogger("demaudit.api")


def _default_client(settings: Settings) -> AbstractContextManager[Any]:
    return cluster_connection(
        settings.scheduler,
        workers=settings.local_workers,
        memory_limit=settings.worker_memory_limit,
        timeout_s=settings.scheduler_timeout_s,
    )


def check_serving(settings: Settings, *, host: str | None = None) -> Principals:
    """Refuse unsafe settings: no principals without insecure_local, insecure_local off
    loopback, no data roots without insecure_local, a token or principal line that breaks the
    policy (``demaudit.service.api.auth``). Raises ValueError with a one-line message saying what
    to change;
    returns the principals."""
    principals = load_principals(
        entries=settings.principals,
        file=settings.principals_file,
        plain_tokens=settings.api_tokens,
    )
    if not principals and not settings.insecure_local:
        raise ValueError(
            "no principals: set DEMAUDIT_PRINCIPALS (name:role:sha256hex entries, see "
            "`demaudit token new`) or DEMAUDIT_PRINCIPALS_FILE, or pass --insecure-local to "
            "serve without authentication on a loopback address"
        )
    if settings.insecure_local and host is not None and not _is_loopback(host):
        raise ValueError(f"--insecure-local serves only on a loopback address, not {host!r}")
    if settings.data_roots is None and not settings.insecure_local:
        raise ValueError("no data roots: set DEMAUDIT_DATA_ROOTS to the folders job specs may read")
    return principals


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def create_app(
    settings: Settings,
    *,
    store: JobStore | None = None,
    runner: Runner = run_job,
    client_factory: ClientFactory = _default_client,
    clock: Clock | None = None,
    webhook_resolver: Resolver = system_resolver,
) -> FastAPI:
    """The app. store, runner, client_factory, clock and webhook_resolver replace the SQLite
    store, the real runner, the Dask client, the scheduler's clock and the name resolution of
    webhook calls (tests)."""
    principals = check_serving(settings)
    schedule_clock = clock or scaled_clock(
        speed=settings.schedule_clock_speed, anchor=settings.schedule_clock_anchor
    )
    lifespan = _lifespan(
        settings,
        store=store,
        runner=runner,
        client_factory=client_factory,
        clock=schedule_clock,
        webhook_resolver=webhook_resolver,
    )
    app = FastAPI(
        title="demaudit",
        version="0.1.0",
        summary="Vertical accuracy audits of tiled DEMs (OGC API - Processes - Part 1: Core)",
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.principals = principals
    app.state.webhook_resolver = webhook_resolver
    app.state.clock = schedule_clock
    _install_routes(app, settings)
    return app


def _lifespan(
    settings: Settings,
    *,
    store: JobStore | None,
    runner: Runner,
    client_factory: ClientFactory,
    clock: Clock,
    webhook_resolver: Resolver,
) -> Callable[[FastAPI], AbstractAsyncContextManager[None]]:
    """What the app starts and stops: job store, Dask client, webhook notifier, dispatcher and
    scheduler (a store given by the caller is left open)."""

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        job_store = store if store is not None else SqliteJobStore(settings.job_store)
        cluster = client_factory(settings)
        # enter and leave the client in one context: distributed.Client keeps a ContextVar token
        context = contextvars.copy_context()
        loop = asyncio.get_running_loop()
        entered = await loop.run_in_executor(None, context.run, cluster.__enter__)
        # a ClusterConnection is made anew after a scheduler outage; a bare client is kept
        client = entered if isinstance(entered, ClusterConnection) else ClusterConnection(entered)
        notifier = _notifier(job_store, settings, webhook_resolver)
        dispatcher = _dispatcher(job_store, client, settings, runner=runner, notifier=notifier)
        dispatcher.start()  # takes the lease, fails the jobs of processes that are gone
        scheduler = Scheduler(
            job_store,
            dispatcher,
            resolve=lambda inputs: resolve_inputs(inputs, data_roots=settings.data_roots),
            clock=clock,
            lease_s=settings.schedule_lease_s,
        )
        app.state.store = job_store
        app.state.client = client
        app.state.dispatcher = dispatcher
        app.state.scheduler = scheduler
        app.state.metrics = health.metrics_registry(job_store, client)
        scheduler.start(interval_s=settings.schedule_tick_s)
        log.info("serving; results in %s", settings.results_dir.resolve())
        try:
            yield
        finally:
            await asyncio.to_thread(scheduler.stop)
            await asyncio.to_thread(dispatcher.close, timeout=SHUTDOWN_WAIT_S)
            await asyncio.to_thread(notifier.close, timeout=WEBHOOK_SHUTDOWN_WAIT_S)
            await loop.run_in_executor(None, context.run, cluster.__exit__, None, None, None)
            if store is None:
                job_store.close()

    return lifespan


def _notifier(store: JobStore, settings: Settings, resolve: Resolver) -> Notifier:
    return Notifier(
        store,
        attempts=settings.webhook_attempts,
        backoff_s=settings.webhook_backoff_s,
        timeout_s=settings.webhook_timeout_s,
        public_url=settings.public_url,
        allow=schedules.allowed_networks(settings.webhook_allow_networks),
        resolve=resolve,
    )


def _dispatcher(
    store: JobStore,
    client: ClusterConnection,
    settings: Settings,
    *,
    runner: Runner,
    notifier: Notifier,
) -> JobDispatcher:
    return JobDispatcher(
        store,
        client=client,
        results_dir=settings.results_dir,
        grid_dirs=settings.grid_dirs,
        max_running_jobs=settings.max_running_jobs,
        retries=settings.task_retries,
        runner=runner,
        on_end=notifier.after_job,
        stall_timeout_s=settings.job_stall_timeout_s,
        tile_timeout_s=settings.tile_timeout_s,
        lease_s=settings.runner_lease_s,
        watch_interval_s=min(2.0, settings.runner_lease_s / 4),
    )


def _install_routes(app: FastAPI, settings: Settings) -> None:
    """Problem handlers, routers (in the order they match), static files and middleware."""
    problems.install(app)
    app.include_router(landing.router, dependencies=[Authorized])
    app.include_router(processes.router, dependencies=[Authorized])
    app.include_router(pages.pages)  # browser navigations only; before the JSON routes
    app.include_router(jobs.router, dependencies=[Authorized])
    app.include_router(pages.reports, dependencies=[Authorized])
    app.include_router(schedules.router, dependencies=[Authorized, AcceptsJson])
    app.include_router(health.router)
    app.mount("/static", StaticFiles(directory=pages.STATIC_DIR), name="static")
    app.add_middleware(BodyLimit, max_bytes=settings.max_body_bytes)
    app.add_middleware(HeadAsGet)
    app.add_middleware(PublicBase, base_url=settings.public_base_url)  # links never from Host
    serve_openapi30(app)


class BodyLimit:
    """ASGI middleware: refuse request bodies over max_bytes with 413 (a problem document).

    A declared Content-Length is checked before reading; a body without one is read up to the
    limit and replayed to the app.
    """

    def __init__(self, app: ASGIApp, *, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = dict(scope.get("headers") or [])
        declared = headers.get(b"content-length")
        if declared is not None:
            size = int(declared) if declared.isdigit() else -1
            if size < 0:
                await self._refuse(scope, receive, send, 400, "Content-Length is not a number")
                return
            if size > self.max_bytes:
                await self._too_large(scope, receive, send)
                return
            await self.app(scope, receive, send)  # the server stops at Content-Length
            return
        if b"transfer-encoding" not in headers:
            await self.app(scope, receive, send)
            return
        chunks: list[bytes] = []
        size = 0
        while True:
            message = await receive()
            if message["type"] != "http.request":
                return  # the client went away
            chunk = message.get("body", b"")
            size += len(chunk)
            if size > self.max_bytes:
                await self._too_large(scope, receive, send)
                return
            chunks.append(chunk)
            if not message.get("more_body", False):
                break
        replayed = False

        async def replay() -> Message:
            nonlocal replayed
            if replayed:
                return await receive()
            replayed = True
            return {"type": "http.request", "body": b"".join(chunks), "more_body": False}

        await self.app(scope, replay, send)

    async def _too_large(self, scope: Scope, receive: Receive, send: Send) -> None:
        await self._refuse(
            scope, receive, send, 413, f"request bodies are limited to {self.max_bytes} bytes"
        )

    async def _refuse(
        self, scope: Scope, receive: Receive, send: Send, status: int, detail: str
    ) -> None:
        problem = problems.BodyTooLargeError if status == 413 else problems.BadRequestError
        response = problems.problem_response(
            status,
            type=problem.type,
            title=problem.title,
            detail=detail,
            instance=scope.get("path"),
            headers={"Connection": "close"},
        )
        await response(scope, receive, send)


class JsonFormatter(logging.Formatter):
    """One JSON object per line: time (UTC), level, logger, message, job_id (when known), exc."""

    def format(self, record: logging.LogRecord) -> str:
        entry: dict[str, Any] = {
            "time": dt.datetime.fromtimestamp(record.created, dt.UTC)
            .isoformat(timespec="milliseconds")
            .replace("+00:00", "Z"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        job_id = getattr(record, "job_id", None) or current_job_id.get()
        if job_id:
            entry["job_id"] = job_id
        if record.exc_info:
            entry["exc"] = self.formatException(record.exc_info)
        return json.dumps(entry, default=str)


def log_config(level: str = "INFO") -> dict[str, Any]:
    """A logging configuration (for uvicorn's log_config) writing JSON lines to stderr."""
    handler = {"class": "logging.StreamHandler", "formatter": "json", "stream": "ext://sys.stderr"}
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {"json": {"()": JsonFormatter}},
        "handlers": {"default": handler},
        "loggers": {
            "uvicorn": {"handlers": ["default"], "level": level, "propagate": False},
            "uvicorn.error": {"level": level},
            "uvicorn.access": {"handlers": ["default"], "level": level, "propagate": False},
            "demaudit": {"handlers": ["default"], "level": level, "propagate": False},
        },
    }
