"""Who an OPC UA session is: sign-in with a ``[[tokens]]`` entry (user name = the token's
name, password = the token), our roles mapped onto asyncua's, and the caller of a request.

Knows asyncua's user-manager and permission-ruleset hooks and ``service.auth``; nothing of
the address space, the hub or HTTP."""

from __future__ import annotations

import contextvars
import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from asyncua.crypto.permission_rules import SimpleRoleRuleset, User, UserRole

from ..auth import Principal, TokenEntry, authenticate

__all__ = ["CALLER", "QuaverRuleset", "QuaverUser", "TokenUsers"]

log = logging.getLogger("quaver.opcua")
ANONYMOUS = "anonymous"

# The caller of the request being served. asyncua serves one connection's requests in
# order on one task, asks the ruleset about each request on that task and awaits our method
# handler there: a context variable set by the ruleset is what the handler sees.
CALLER: contextvars.ContextVar[Principal | None] = contextvars.ContextVar(
    "quaver_opcua_caller", default=None
)


@dataclass
class QuaverUser(User):  # type: ignore[misc]
    """An asyncua user carrying our principal (role viewer, operator or admin)."""

    principal: Principal | None = None


class TokenUsers:
    """asyncua user manager over the current ``[[tokens]]`` (read at each sign-in, so a
    config reload applies to the next session). Without tokens only anonymous sessions are
    offered (as REST reads are open then) and nobody may acknowledge, as over REST."""

    def __init__(self, tokens: Callable[[], Sequence[TokenEntry]]) -> None:
        self.tokens = tokens

    def get_user(self, iserver: Any, username: str | None = None,
                 password: str | None = None, certificate: Any = None) -> QuaverUser | None:
        tokens = self.tokens()
        if not tokens:
            return QuaverUser(role=UserRole.User, name=ANONYMOUS,
                              principal=Principal(ANONYMOUS, "none"))
        if username is None or password is None:
            return None
        who = authenticate(password, tokens)
        if who is None or who.name != username or not who.may("viewer"):
            log.warning("OPC UA sign-in refused for user %r", username)
            return None
        # asyncua's User role only gates its own services (never Admin: that may add nodes)
        return QuaverUser(role=UserRole.User, name=who.name, principal=who)


class QuaverRuleset(SimpleRoleRuleset):  # type: ignore[misc]
    """asyncua's role ruleset (users may read, browse, subscribe and call), which also notes
    the caller of every request for the method handlers (:data:`CALLER`)."""

    def check_validity(self, user: Any, action_type_id: Any, body: Any) -> bool:
        CALLER.set(user.principal if isinstance(user, QuaverUser) else None)
        return bool(super().check_validity(user, action_type_id, body))
