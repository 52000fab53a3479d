"""Bearer tokens of the service tests' principals (made once with ``secrets.token_urlsafe(32)``,
as ``demaudit token new`` makes them) and the settings entries naming them by their SHA-256."""

from __future__ import annotations

import hashlib

TOKEN = "PAnmqBt1nmzFg00GTDY2aA5IuE0KxgJyogv_SjcE7-o"
"""alice, a user: the token the ``api`` fixtures send."""
TOKEN_B = "p18nSZRSUotTe95c1leAHwqhNrQotY5sHKuThtNe6SE"
"""bob, another user."""
ADMIN_TOKEN = "YDEY0ZwWaT3NEMnnJ_pF3D5jCPNUX4FhyEDSEDjP3Ac"
"""root, an admin."""
UNKNOWN_TOKEN = "UV8p3SjaZdSRfmq44Ba49ozhlXwutEit-A5-FrwYY3Y"
"""Strong, but configured nowhere."""

AUTH = {"Authorization": f"Bearer {TOKEN}"}
AUTH_B = {"Authorization": f"Bearer {TOKEN_B}"}
AUTH_ADMIN = {"Authorization": f"Bearer {ADMIN_TOKEN}"}


def entry(name: str, role: str, token: str) -> str:
    """A DEMAUDIT_PRINCIPALS entry (hashlib here, so the test does not trust
    demaudit.service.api.auth)."""
    return f"{name}:{role}:{hashlib.sha256(token.encode()).hexdigest()}"


PRINCIPALS = (
    entry("alice", "user", TOKEN),
    entry("bob", "user", TOKEN_B),
    entry("root", "admin", ADMIN_TOKEN),
)
