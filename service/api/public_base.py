"""Links and Location headers from the configured public base URL, never from the request.

Every link the API writes (``request.url_for`` in the routes, the base URL a schedule records
for its webhook payloads) is built from the ASGI scope's Host header, scheme and root path. A
caller controls the Host header, so left alone it would choose the host of the links others
follow. ``PublicBase`` rewrites the scope before the app sees it::

    DEMAUDIT_PUBLIC_BASE_URL=https://audit.example.org/api
        Host header := audit.example.org, scheme := https, link prefix := /api
        -> links https://audit.example.org/api/jobs/<id>
    unset
        Host header dropped -> links on the address the server answered on (the listening
        socket's address and port, e.g. http://10.0.0.5:8000/jobs/<id>): never what the
        caller wrote. Behind a reverse proxy set the base URL, or links name the inner address.

Routing is unchanged: only ``app_root_path`` (which Starlette uses to build URLs alone) moves.
(Relative links would need every route's ``url_for`` changed: Starlette makes them absolute.)
"""

from __future__ import annotations

from typing import Any
from urllib.parse import urlsplit

from starlette.types import ASGIApp, Receive, Scope, Send

__all__ = ["PublicBase", "check_base_url", "public_scope"]


def check_base_url(value: str) -> str:
    """value without a trailing slash; ValueError unless an absolute http(s) URL with a host
    and no query, fragment or user part."""
    parts = urlsplit(value.strip())
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise ValueError(f"the public base URL must be http(s)://host[:port][/path], not {value!r}")
    if parts.query or parts.fragment or parts.username or parts.password:
        raise ValueError("the public base URL may not carry a query, fragment or user part")
    return value.strip().rstrip("/")


def public_scope(scope: Scope, base_url: str | None) -> Scope:
    """A copy of an http/websocket scope whose URLs are built on base_url (module docstring)."""
    headers = [
        (key, value)
        for key, value in scope.get("headers", [])
        if key not in (b"host", b"x-forwarded-host")
    ]
    out: dict[str, Any] = dict(scope)
    if base_url is None:
        out["app_root_path"] = scope.get("root_path", "")
    else:
        parts = urlsplit(base_url)
        headers.append((b"host", parts.netloc.encode("latin-1")))
        scheme = parts.scheme
        if scope["type"] == "websocket":
            scheme = "wss" if scheme == "https" else "ws"
        out["scheme"] = scheme
        out["app_root_path"] = parts.path.rstrip("/")
    out["headers"] = headers
    return out


class PublicBase:
    """ASGI middleware: see the module docstring."""

    def __init__(self, app: ASGIApp, *, base_url: str | None) -> None:
        self.app = app
        self.base_url = base_url

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] in ("http", "websocket"):
            scope = public_scope(scope, self.base_url)
        await self.app(scope, receive, send)
