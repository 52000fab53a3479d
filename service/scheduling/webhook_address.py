"""Where a webhook may go, and how a try reaches the address that was checked.

``check_webhook_url``: http or https only; every address the host
resolves to must be public. Loopback, link-local (cloud metadata services), private, shared,
multicast, unspecified and reserved addresses are refused unless a network of
``DEMAUDIT_WEBHOOK_ALLOW_NETWORKS`` holds them. The check runs when a schedule is created and
again before every try (DNS may have changed since), and the try connects to the address just
checked (the Host header and the TLS server name stay the URL's host), so a name that resolves
differently a moment later cannot slip past the check; redirects are never followed (a 3xx answer
is final).
"""

from __future__ import annotations

import ipaddress
import socket
from collections.abc import Callable, Iterable, Sequence
from typing import Any

import httpx

__all__ = [
    "IPAddress",
    "IPNetwork",
    "Resolver",
    "WebhookAddressError",
    "WebhookRefusedError",
    "WebhookUnresolvedError",
    "check_address",
    "check_webhook_url",
    "pinned",
    "redact_url",
    "system_resolver",
]

IPAddress = ipaddress.IPv4Address | ipaddress.IPv6Address
IPNetwork = ipaddress.IPv4Network | ipaddress.IPv6Network
Resolver = Callable[[str, int], Iterable[str]]
"""host, port -> the addresses (text) it resolves to; raises OSError when it does not."""


class WebhookAddressError(ValueError):
    """A webhook URL that may not be called (the message never repeats the URL)."""


class WebhookRefusedError(WebhookAddressError):
    """The URL's scheme or one of its host's addresses is not allowed (final)."""


class WebhookUnresolvedError(WebhookAddressError):
    """The URL's host does not resolve (now; it may later)."""


def system_resolver(host: str, port: int) -> list[str]:
    """The addresses host resolves to (``socket.getaddrinfo``)."""
    infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    return [str(info[4][0]) for info in infos]


def check_address(address: IPAddress, allow: Sequence[IPNetwork] = ()) -> None:
    """WebhookRefusedError unless address is public or inside a network of allow. An IPv4
    address mapped into IPv6 (::ffff:a.b.c.d) is judged as the IPv4 address."""
    if isinstance(address, ipaddress.IPv6Address) and address.ipv4_mapped is not None:
        address = address.ipv4_mapped
    if any(address in network for network in allow):
        return
    kinds = [
        ("loopback", address.is_loopback),
        ("link-local", address.is_link_local),
        ("multicast", address.is_multicast),
        ("unspecified", address.is_unspecified),
        ("reserved", address.is_reserved),
        ("private", address.is_private),
        ("not public", not address.is_global),
    ]
    for kind, hit in kinds:
        if hit:
            raise WebhookRefusedError(
                f"the webhook's host resolves to a {kind} address ({address}); only public "
                "addresses are called unless DEMAUDIT_WEBHOOK_ALLOW_NETWORKS names the network"
            )


def check_webhook_url(
    url: str, *, allow: Sequence[IPNetwork] = (), resolve: Resolver = system_resolver
) -> list[IPAddress]:
    """The addresses url's host resolves to, all allowed (``check_address``); else
    WebhookRefusedError (scheme, address) or WebhookUnresolvedError (no answer)."""
    try:
        parsed = httpx.URL(url)
    except (httpx.InvalidURL, TypeError, ValueError):
        raise WebhookRefusedError("the webhook is not a valid URL") from None
    if parsed.scheme not in ("http", "https"):
        raise WebhookRefusedError("the webhook must be an http or https URL")
    host = parsed.host
    if not host:
        raise WebhookRefusedError("the webhook URL has no host")
    port = parsed.port or (443 if parsed.scheme == "https" else 80)
    addresses = _addresses(host, port, resolve)
    for address in addresses:
        check_address(address, allow)
    return addresses


def _addresses(host: str, port: int, resolve: Resolver) -> list[IPAddress]:
    try:
        return [ipaddress.ip_address(host)]
    except ValueError:
        pass
    try:
        found = list(resolve(host, port))
    except (OSError, UnicodeError):
        found = []
    if not found:
        raise WebhookUnresolvedError("the webhook's host does not resolve")
    addresses: list[IPAddress] = []
    for text in found:
        try:
            addresses.append(ipaddress.ip_address(text.split("%", 1)[0]))
        except ValueError:
            raise WebhookRefusedError("the webhook's host resolves to a non-IP") from None
    return addresses


def pinned(url: str, address: IPAddress) -> tuple[httpx.URL, dict[str, str], dict[str, Any]]:
    """The request to url sent to address: the URL with the address for its host, the Host
    header and (https) the TLS server name of the original host, which the certificate is
    verified against. A URL whose host is an address is left as it is."""
    parsed = httpx.URL(url)
    try:
        ipaddress.ip_address(parsed.host)
    except ValueError:
        pass
    else:
        return parsed, {}, {}
    target = parsed.copy_with(host=str(address))
    extensions: dict[str, Any] = {}
    if parsed.scheme == "https":
        extensions["sni_hostname"] = parsed.raw_host.decode("ascii")
    return target, {"Host": parsed.netloc.decode("ascii")}, extensions


def redact_url(url: str | None) -> str | None:
    """What the API shows of a webhook URL: scheme, host and port; a path, query or user
    part (which may carry credentials) becomes '***'."""
    if url is None:
        return None
    try:
        parsed = httpx.URL(url)
    except (httpx.InvalidURL, TypeError, ValueError):
        return "***"
    port = f":{parsed.port}" if parsed.port is not None else ""
    host = f"[{parsed.host}]" if ":" in parsed.host else parsed.host
    hidden = parsed.userinfo or parsed.query or parsed.path not in ("", "/")
    return f"{parsed.scheme}://{host}{port}/{'***' if hidden else ''}"
