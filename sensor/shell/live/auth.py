"""Who is logged in to the live page, and the token that makes their actions their own.

Logging in checks a user name and password against the users file
(:class:`~sensor.shell.opcua.users.Users`: scrypt hashes, roles). A session is a random
256-bit token in a cookie (``HttpOnly``, ``SameSite=Strict``, ``Secure`` over HTTPS), known
only to this process and forgotten after ``lifetime_s``, at logout, or when the process stops.
Each session has its own random CSRF token, which the page sends back in a header with every
action; a request from another site carries neither (the cookie is not sent cross-site, the
header cannot be set without this page's script), so it cannot act in the user's name (OWASP
Cross-Site Request Forgery Prevention Cheat Sheet: synchronizer token pattern with SameSite
cookies; common practice). Passwords are never kept, logged, or accepted in a URL.
"""

from __future__ import annotations

import hmac
import secrets
import time
from collections.abc import Callable
from dataclasses import dataclass

from sensor.shell.opcua.users import Role

COOKIE = "sigmatrack-live"
"""The session cookie's name."""
MAX_SESSIONS = 256
"""Sessions kept at once (the oldest goes when a new one would be one too many)."""


@dataclass(frozen=True)
class Session:
    """A logged-in user: ``user``, ``role``, their ``csrf`` token, when it ends [s, clock]."""

    user: str
    role: Role
    csrf: str
    expires_s: float


class Sessions:
    """The live sessions of one page server.

    Parameters
    ----------
    lifetime_s : how long a login lasts [s]
    clock : monotonic time [s] (``time.monotonic``; a test passes its own)
    """

    def __init__(self, lifetime_s: float, clock: Callable[[], float] = time.monotonic) -> None:
        self.lifetime_s = lifetime_s
        self._clock = clock
        self._sessions: dict[str, Session] = {}

    def __len__(self) -> int:
        return len(self._sessions)

    def open(self, user: str, role: Role) -> tuple[str, Session]:
        """A new session for ``user``: its cookie token and the session."""
        now = self._clock()
        self._sessions = {t: s for t, s in self._sessions.items() if s.expires_s > now}
        while len(self._sessions) >= MAX_SESSIONS:
            del self._sessions[next(iter(self._sessions))]
        token = secrets.token_urlsafe(32)
        session = Session(user, role, secrets.token_urlsafe(32), now + self.lifetime_s)
        self._sessions[token] = session
        return token, session

    def find(self, token: str | None) -> Session | None:
        """The session of a cookie token, if it is live."""
        if not token:
            return None
        session = self._sessions.get(token)
        if session is None:
            return None
        if session.expires_s <= self._clock():
            del self._sessions[token]
            return None
        return session

    def close(self, token: str | None) -> None:
        if token:
            self._sessions.pop(token, None)


def csrf_ok(session: Session, sent: str | None) -> bool:
    """Whether the token sent with an action is the session's (compared in constant time)."""
    return sent is not None and hmac.compare_digest(session.csrf.encode(), sent.encode())
