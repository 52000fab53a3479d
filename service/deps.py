"""Dependencies of the routes, as ``Annotated`` aliases.

The settings, the job store and the dispatcher live on ``app.state`` (set by
``service.app.create_app`` and its lifespan); tests choose them by passing their own settings,
store and runner to ``create_app``.
"""

from __future__ import annotations

import hmac
from typing import Annotated, Any

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from service.jobs import JobDispatcher
from service.jobstore import JobStore
from service.problems import UnauthorizedError
from service.settings import Settings

__all__ = [
    "Authorized",
    "ClientDep",
    "DispatcherDep",
    "SettingsDep",
    "StoreDep",
    "get_settings",
]


def get_settings(request: Request) -> Settings:
    """The settings the app was created with."""
    settings: Settings = request.app.state.settings
    return settings


def get_store(request: Request) -> JobStore:
    """The job store (opened by the lifespan)."""
    store: JobStore = request.app.state.store
    return store


def get_dispatcher(request: Request) -> JobDispatcher:
    """The job dispatcher (started by the lifespan)."""
    dispatcher: JobDispatcher = request.app.state.dispatcher
    return dispatcher


def get_client(request: Request) -> Any:
    """The shared Dask client."""
    return request.app.state.client


SettingsDep = Annotated[Settings, Depends(get_settings)]
StoreDep = Annotated[JobStore, Depends(get_store)]
DispatcherDep = Annotated[JobDispatcher, Depends(get_dispatcher)]
ClientDep = Annotated[Any, Depends(get_client)]

_bearer = HTTPBearer(
    auto_error=False,
    description="One of the tokens in DEMAUDIT_API_TOKENS.",
)


def require_token(
    settings: SettingsDep,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)],
) -> None:
    """Accept the request when it carries a configured bearer token (or no tokens are set and
    the server runs with --insecure-local)."""
    if not settings.api_tokens and settings.insecure_local:
        return
    if credentials is None:
        raise UnauthorizedError("send 'Authorization: Bearer <token>'")
    given = credentials.credentials.encode()
    if not any(hmac.compare_digest(given, t.encode()) for t in settings.api_tokens):
        raise UnauthorizedError("the bearer token is not valid")


Authorized = Depends(require_token)
"""Route or router dependency: the request must carry a valid bearer token."""
