"""Content negotiation and HEAD: one place deciding which media type a response takes.

Every resource answers JSON by default; the ones that have an HTML page (the job list and a job's
status) also answer ``text/html`` when the ``Accept`` header prefers it; any other ``Accept``
that none of the offered types satisfies gets 406 (a problem document)::

    negotiate(request, (JSON,))        -> "application/json" or NotAcceptableError
    negotiate(request, (JSON, HTML))   -> whichever the client prefers (JSON on a tie)
    AcceptsJson                        route/router dependency: JSON or 406

``HeadAsGet`` (ASGI middleware) answers ``HEAD`` on every ``GET`` resource: the request is run
as ``GET`` and the body dropped (headers, ``Content-Length`` included, kept).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from fastapi import Depends, Request
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from demaudit.service.api.problems import OGC_EXCEPTIONS, ProblemError

__all__ = [
    "HTML",
    "JSON",
    "OPENAPI_30",
    "AcceptsJson",
    "HeadAsGet",
    "NotAcceptableError",
    "accepts_json",
    "choose",
    "negotiate",
]

JSON = "application/json"
HTML = "text/html"
OPENAPI_30 = "application/vnd.oai.openapi+json;version=3.0"


class NotAcceptableError(ProblemError):
    """No media type this resource offers satisfies the request's ``Accept`` header."""

    status, type, title = 406, OGC_EXCEPTIONS + "not-acceptable", "Not acceptable"


def _media_range(text: str) -> tuple[str, dict[str, str], float] | None:
    """``type/subtype``, its parameters (lower-case, ``q`` taken out) and its quality."""
    parts = [p.strip() for p in text.split(";")]
    media = parts[0].lower()
    if media.count("/") != 1:
        return None
    params: dict[str, str] = {}
    quality = 1.0
    for part in parts[1:]:
        name, _, value = part.partition("=")
        name, value = name.strip().lower(), value.strip().strip('"')
        if name == "q":
            try:
                quality = min(max(float(value), 0.0), 1.0)
            except ValueError:
                return None
        elif name:
            params[name] = value.lower()
    return media, params, quality


def _match(offered: str, media: str, params: dict[str, str]) -> int:
    """How specifically a media range names the offered type (-1: not at all)."""
    parsed = _media_range(offered)
    if parsed is None:
        return -1
    kind, offered_params, _ = parsed
    if media == "*/*":
        return 0
    main, _, sub = media.partition("/")
    if sub == "*":
        return 1 if kind.split("/")[0] == main else -1
    if kind != media:
        return -1
    if any(offered_params.get(k) != v for k, v in params.items()):
        return -1
    return 2 + len(params)


def choose(accept: str | None, offered: Sequence[str]) -> str | None:
    """The offered media type the ``Accept`` header value prefers (RFC 9110 section 12.5.1:
    the most specific matching range gives each type its quality); ties go to the earlier
    offered type, a missing or empty header takes the first; None when nothing is acceptable."""
    if accept is None or not accept.strip():
        return offered[0] if offered else None
    ranges = [r for r in (_media_range(p) for p in accept.split(",") if p.strip()) if r]
    best: tuple[float, int] | None = None
    chosen = None
    for index, kind in enumerate(offered):
        specificity, quality = -1, 0.0
        for media, params, q in ranges:
            found = _match(kind, media, params)
            if found > specificity:
                specificity, quality = found, q
        if specificity < 0 or quality <= 0:
            continue
        rank = (quality, -index)
        if best is None or rank > best:
            best, chosen = rank, kind
    return chosen


def negotiate(request: Request, offered: Sequence[str] = (JSON,)) -> str:
    """The media type to answer request with, among offered (the default first); raises
    NotAcceptableError (406) naming what is offered when the ``Accept`` header allows none."""
    chosen = choose(request.headers.get("accept"), offered)
    if chosen is None:
        raise NotAcceptableError(
            f"this resource is available as {', '.join(offered)}; the Accept header "
            "allows none of them"
        )
    return chosen


def accepts_json(request: Request) -> str:
    """Dependency: the request accepts JSON (else 406)."""
    return negotiate(request, (JSON,))


AcceptsJson: Any = Depends(accepts_json)
"""Route or router dependency: answer JSON, or 406 when the client accepts no JSON."""


class HeadAsGet:
    """ASGI middleware: run ``HEAD`` requests as ``GET`` and send the headers only
    (RFC 9110 section 9.3.2), so every GET resource answers HEAD."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope.get("method") != "HEAD":
            await self.app(scope, receive, send)
            return

        async def headers_only(message: Message) -> None:
            if message["type"] == "http.response.body":
                if not message.get("more_body", False):
                    await send({"type": "http.response.body", "body": b"", "more_body": False})
                return
            await send(message)

        await self.app(dict(scope, method="GET"), receive, headers_only)
