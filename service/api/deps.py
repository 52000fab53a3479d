"""Dependencies of the routes, as ``Annotated`` aliases.

The settings, the job store and the dispatcher live on ``app.state`` (set by
``demaudit.service.api.app.create_app`` and its lifespan); tests choose them by passing their own
settings,
store and runner to ``create_app``.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from demaudit.service.api.auth import LOCAL, Principal, Principals
from demaudit.service.api.problems import UnauthorizedError
from demaudit.service.run.dispatcher import JobDispatcher
from demaudit.service.settings import Settings
from demaudit.service.store.jobs import JobStore

__all__ = [
    "Authorized",
    "ClientDep",
    "DispatcherDep",
    "PrincipalDep",
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
    description="A principal's token (DEMAUDIT_PRINCIPALS holds its SHA-256).",
)


def get_principals(request: Request) -> Principals:
    """The principals the app was created with."""
    principals: Principals = request.app.state.principals
    return principals


def require_token(
    settings: SettingsDep,
    principals: Annotated[Principals, Depends(get_principals)],
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)],
) -> Principal:
    """The principal whose bearer token the request carries (the local admin when the server
    runs with --insecure-local and no principals); 401 otherwise."""
    if not len(principals) and settings.insecure_local:
        return LOCAL
    if credentials is None:
        raise UnauthorizedError("send 'Authorization: Bearer <token>'")
    principal = principals.identify(credentials.credentials)
    if principal is None:
        raise UnauthorizedError("the bearer token is not valid")
    return principal


Authorized = Depends(require_token)
"""Route or router dependency: the request must carry a valid bearer token."""
PrincipalDep = Annotated[Principal, Depends(require_token)]
"""The calling principal (FastAPI resolves it once per request)."""
