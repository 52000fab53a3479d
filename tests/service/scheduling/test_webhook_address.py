"""Where a webhook may go: public addresses only (unless allowed), http(s) only, names resolved
through a stub (no DNS traffic), URLs shown without their secrets."""

from __future__ import annotations

import ipaddress

import pytest

from demaudit.service.scheduling.webhook_address import (
    WebhookRefusedError,
    WebhookUnresolvedError,
    check_webhook_url,
    redact_url,
)
from tests.support.webhooks import stub

# Address kinds from RFC 6890 / RFC 4193 / RFC 5735 (special-purpose registries), as the
# ipaddress module classifies them (common practice).
REFUSED = {
    "127.0.0.1": "loopback",
    "127.255.0.9": "loopback",
    "::1": "loopback",
    "169.254.169.254": "link-local",  # the cloud metadata service
    "fe80::1": "link-local",
    "10.0.0.1": "private",
    "10.255.255.255": "private",
    "172.16.0.1": "private",
    "172.31.255.254": "private",
    "192.168.1.1": "private",
    "fd12:3456:789a::1": "private",  # IPv6 unique local (ULA)
    "fc00::1": "private",
    "224.0.0.1": "multicast",
    "239.255.255.250": "multicast",
    "ff02::1": "multicast",
    "0.0.0.0": "unspecified",
    "::": "unspecified",
    "240.0.0.1": "reserved",
    "100.64.0.1": "not public",  # shared address space (carrier-grade NAT)
    "::ffff:10.0.0.1": "private",  # IPv4-mapped
    "::ffff:169.254.169.254": "link-local",
}


@pytest.mark.parametrize(("address", "kind"), REFUSED.items())
def test_non_public_addresses_are_refused(address, kind):
    with pytest.raises(WebhookRefusedError, match=kind):
        check_webhook_url("https://hooks.example.org/x", resolve=stub(address))


@pytest.mark.parametrize("address", ["93.184.216.34", "8.8.8.8", "2606:4700:4700::1111"])
def test_public_addresses_pass(address):
    found = check_webhook_url("https://hooks.example.org/x", resolve=stub(address))
    assert [str(a) for a in found] == [address]


def test_one_non_public_address_among_public_ones_is_refused():
    with pytest.raises(WebhookRefusedError, match="private"):
        check_webhook_url("http://h.example.org/", resolve=stub("93.184.216.34", "10.0.0.7"))


def test_the_allow_list_lets_named_networks_through():
    allow = (ipaddress.ip_network("10.20.0.0/16"),)
    check_webhook_url("http://h.example.org/", allow=allow, resolve=stub("10.20.3.4"))
    with pytest.raises(WebhookRefusedError, match="private"):
        check_webhook_url("http://h.example.org/", allow=allow, resolve=stub("10.21.3.4"))


@pytest.mark.parametrize("url", ["ftp://h.example.org/x", "file:///etc/passwd", "gopher://h/"])
def test_only_http_and_https_are_called(url):
    with pytest.raises(WebhookRefusedError, match="http or https"):
        check_webhook_url(url, resolve=stub("93.184.216.34"))


def test_a_literal_address_is_checked_without_resolving():
    def never(host: str, port: int) -> list[str]:
        raise AssertionError("resolved a literal address")

    with pytest.raises(WebhookRefusedError, match="loopback"):
        check_webhook_url("http://127.0.0.1:8080/hook", resolve=never)


def test_a_host_that_does_not_resolve_is_its_own_error():
    with pytest.raises(WebhookUnresolvedError):
        check_webhook_url("http://h.example.org/", resolve=stub())


def test_webhook_urls_are_shown_without_credentials_path_or_query():
    assert redact_url("https://u:p@h.example.org:8443/a/b?k=v") == "https://h.example.org:8443/***"
    assert redact_url("https://h.example.org/") == "https://h.example.org/"
    assert redact_url("http://[2001:db8::1]/x") == "http://[2001:db8::1]/***"
    assert redact_url(None) is None
