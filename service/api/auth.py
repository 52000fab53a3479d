"""Who is calling: principals, their hashed tokens and roles, and the token policy.

::

    DEMAUDIT_PRINCIPALS / DEMAUDIT_PRINCIPALS_FILE   lines  name:role:sha256hex   (role user|admin)
    DEMAUDIT_API_TOKENS (deprecated)                 plain tokens -> principal token-<8 hex>, user
        └─► Principals: sha256(token) -> Principal(name, admin), compared in constant time

The server keeps only SHA-256 digests of the tokens. A token must carry at least 128 bits of
randomness as far as its length and alphabet can show (``check_token``); ``new_token`` makes one
(``demaudit token new``). Every check raises :class:`TokenPolicyError` (a ValueError) with a
one-line message that never repeats the token.
"""

from __future__ import annotations

import hashlib
import hmac
import math
import re
import secrets
import string
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path

__all__ = [
    "ADMIN",
    "MIN_TOKEN_BITS",
    "ROLES",
    "USER",
    "LOCAL",
    "Principal",
    "Principals",
    "TokenPolicyError",
    "check_token",
    "hash_token",
    "load_principals",
    "new_token",
    "parse_principal_line",
]

ADMIN = "admin"
USER = "user"
ROLES = frozenset({ADMIN, USER})
MIN_TOKEN_BITS = 128
MIN_DISTINCT_CHARACTERS = 8
NEW_TOKEN_BYTES = 32
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
_HEX64 = re.compile(r"[0-9a-f]{64}")
_URL_SAFE_SYMBOLS = frozenset("-_")


class TokenPolicyError(ValueError):
    """A configured token or principal does not meet the policy (one line, no token in it)."""


@dataclass(frozen=True)
class Principal:
    """A caller: its name and whether it may see and act on everyone's jobs and schedules."""

    name: str
    admin: bool = False

    def may_access(self, owner: str | None) -> bool:
        """Whether this principal may see a resource owned by owner (None: made before owners
        were recorded, visible to admins only)."""
        return self.admin or (owner is not None and owner == self.name)

    @property
    def owner_filter(self) -> str | None:
        """The owner to filter lists by: None (everything) for an admin."""
        return None if self.admin else self.name


LOCAL = Principal("local", admin=True)
"""The caller of a server run with --insecure-local and no tokens (loopback only)."""


def hash_token(token: str) -> str:
    """The SHA-256 digest of the token's UTF-8 bytes, as 64 lowercase hex digits."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def new_token() -> str:
    """A new token: 32 random bytes, URL-safe base64 (43 characters, 256 bits)."""
    return secrets.token_urlsafe(NEW_TOKEN_BYTES)


def estimated_bits(token: str) -> float:
    """Length x log2(alphabet), the alphabet being the character classes the token uses
    (hex digits 16, digits 10, lower 26, upper 26, '-' and '_' 2, other punctuation 30).
    An upper bound on the randomness a token of that shape can hold."""
    chars = set(token)
    if chars <= set("0123456789abcdef") or chars <= set("0123456789ABCDEF"):
        alphabet = 16 if chars - set(string.digits) else 10
    else:
        alphabet = 0
        alphabet += 10 if chars & set(string.digits) else 0
        alphabet += 26 if chars & set(string.ascii_lowercase) else 0
        alphabet += 26 if chars & set(string.ascii_uppercase) else 0
        alphabet += 2 if chars & _URL_SAFE_SYMBOLS else 0
        alphabet += 30 if chars & (set(string.punctuation) - _URL_SAFE_SYMBOLS) else 0
    return len(token) * math.log2(alphabet) if alphabet > 1 else 0.0


def check_token(token: str, *, where: str = "a token") -> str:
    """The token when it meets the policy; TokenPolicyError naming where otherwise.

    Printable ASCII without whitespace; at least 128 bits by ``estimated_bits`` (e.g. 22
    URL-safe base64 characters, 32 hex digits); at least 8 distinct characters.
    """
    hint = "generate one with `demaudit token new`"
    if not token or any(c.isspace() for c in token):
        raise TokenPolicyError(f"{where} is empty or contains whitespace; {hint}")
    if not all(c in string.printable for c in token):
        raise TokenPolicyError(f"{where} has characters other than printable ASCII; {hint}")
    bits = estimated_bits(token)
    if bits < MIN_TOKEN_BITS or len(set(token)) < MIN_DISTINCT_CHARACTERS:
        raise TokenPolicyError(
            f"{where} is too weak ({len(token)} characters, at most {bits:.0f} bits; "
            f"{MIN_TOKEN_BITS} bits needed, e.g. 22 URL-safe base64 characters or 32 hex "
            f"digits); {hint}"
        )
    return token


def parse_principal_line(line: str, *, where: str) -> tuple[str, str, str]:
    """(name, role, sha256 hex) of a ``name:role:sha256hex`` line; TokenPolicyError naming
    where when malformed."""
    parts = line.strip().split(":")
    if len(parts) != 3:
        raise TokenPolicyError(f"{where}: expected name:role:sha256hex")
    name, role, digest = (p.strip() for p in parts)
    if not _NAME.fullmatch(name):
        raise TokenPolicyError(f"{where}: the name must be 1-64 letters, digits, '.', '_' or '-'")
    if role not in ROLES:
        raise TokenPolicyError(f"{where}: the role must be one of {sorted(ROLES)}")
    if not _HEX64.fullmatch(digest.lower()):
        raise TokenPolicyError(
            f"{where}: the hash must be the token's SHA-256 as 64 hex digits "
            "(`demaudit token new` prints the line)"
        )
    return name, role, digest.lower()


def load_principals(
    *,
    entries: Sequence[str] = (),
    file: Path | None = None,
    plain_tokens: Sequence[str] = (),
) -> Principals:
    """The principals of the settings: entries (``name:role:sha256hex``), the lines of file
    (blank lines and ``#`` comments skipped) and the deprecated plain tokens (each checked
    against the policy, principal ``token-<first 8 hex of its hash>``, role user)."""
    found: list[tuple[str, str, str]] = []
    for i, entry in enumerate(entries, 1):
        found.append(parse_principal_line(entry, where=f"DEMAUDIT_PRINCIPALS entry {i}"))
    if file is not None:
        try:
            text = Path(file).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise TokenPolicyError(
                f"DEMAUDIT_PRINCIPALS_FILE cannot be read ({type(exc).__name__})"
            ) from None
        for number, line in enumerate(text.splitlines(), 1):
            if line.strip() and not line.lstrip().startswith("#"):
                where = f"DEMAUDIT_PRINCIPALS_FILE line {number}"
                found.append(parse_principal_line(line, where=where))
    for i, token in enumerate(plain_tokens, 1):
        check_token(token, where=f"DEMAUDIT_API_TOKENS token {i}")
        digest = hash_token(token)
        found.append((f"token-{digest[:8]}", USER, digest))
    return Principals.of(found)


class Principals:
    """SHA-256 digest -> principal; lookups compare every digest in constant time."""

    def __init__(self, table: Iterable[tuple[str, Principal]]) -> None:
        self._table = [(bytes.fromhex(digest), principal) for digest, principal in table]

    @classmethod
    def of(cls, entries: Iterable[tuple[str, str, str]]) -> Principals:
        """From (name, role, digest) triples; TokenPolicyError on a repeated name or digest."""
        names: set[str] = set()
        digests: set[str] = set()
        table = []
        for name, role, digest in entries:
            if name in names:
                raise TokenPolicyError(f"principal {name!r} is configured twice")
            if digest in digests:
                raise TokenPolicyError(f"principal {name!r} has the token of another principal")
            names.add(name)
            digests.add(digest)
            table.append((digest, Principal(name, admin=role == ADMIN)))
        return cls(table)

    def __len__(self) -> int:
        return len(self._table)

    def names(self) -> list[str]:
        """The principals' names, in configuration order."""
        return [p.name for _, p in self._table]

    def identify(self, token: str) -> Principal | None:
        """The principal whose token this is, or None."""
        given = hashlib.sha256(token.encode("utf-8", "surrogatepass")).digest()
        found: Principal | None = None
        for digest, principal in self._table:  # no early exit: the time says nothing
            if hmac.compare_digest(given, digest):
                found = principal
        return found
