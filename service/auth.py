"""Access tokens and roles: constant-time checks against SHA-256 hashes from the config.

Pure functions over the config's token list; no HTTP, no storage."""

from __future__ import annotations

import hashlib
import hmac
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

ROLES = ("viewer", "operator", "admin")  # each role may do what the ones before it may
# "metrics" (a scraper's token) stands outside that order: it may read /metrics only


class TokenEntry(Protocol):
    """One ``[[tokens]]`` entry (``service.config.TokenConfig``), as this module reads it:
    typed structurally so that importing auth does not import the config's models."""

    @property
    def name(self) -> str: ...
    @property
    def role(self) -> str: ...
    @property
    def sha256(self) -> str: ...


@dataclass(frozen=True)
class Principal:
    name: str
    role: str

    def may(self, role: str) -> bool:
        if self.role not in ROLES:
            return False
        return ROLES.index(self.role) >= ROLES.index(role)


def token_hash(token: str) -> str:
    """Hex SHA-256 of a token, as stored in ``[[tokens]] sha256``."""
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def authenticate(token: str | None, tokens: Sequence[TokenEntry]) -> Principal | None:
    """The holder of ``token``, or None. Every configured hash is compared (in constant
    time, hmac.compare_digest) so the time taken does not tell which entry matched."""
    if not token:
        return None
    digest = token_hash(token)
    found: Principal | None = None
    for t in tokens:
        if hmac.compare_digest(digest, t.sha256):
            found = Principal(t.name, t.role)
    return found
