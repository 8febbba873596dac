"""Who is calling: the Bearer key of a request, or the browser session it carries (GET
endpoints only), looked up in the archive on every request."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timedelta

from fastapi import Request

from service.api.problems import ProblemError
from service.api.settings import ServiceSettings
from service.archive.keys import active_key_count, find_key
from service.archive.roles import role_allows
from service.archive.sessions import BrowserSession, find_session
from service.archive.store import Archive

SESSION_COOKIE = "bioparity_session"
MAX_COOKIE_LENGTH = 100  # a session id is 43 characters; anything much longer is not one of ours

# RFC 6750 §3: the challenge of a Bearer-protected resource; error= only when a token was sent.
CHALLENGE = 'Bearer realm="bioparity"'
INVALID_CHALLENGE = 'Bearer realm="bioparity", error="invalid_token"'


@dataclass(frozen=True)
class Caller:
    """The submitter name archived with a record: the key's label, or the open-mode name."""

    submitter: str
    role: str | None  # None while the service runs open (no key in the archive, loopback)


def require(role: str, *, sessions: bool = False) -> Callable[[Request], Caller]:
    """A dependency that admits callers whose key has `role` or a higher one; with `sessions`,
    a browser session cookie (the role of the key that signed in) counts as well as Bearer."""

    # A plain def: FastAPI runs it in the thread pool, so the lookup never blocks the loop.
    def caller_of(request: Request) -> Caller:
        archive: Archive = request.app.state.archive
        settings: ServiceSettings = request.app.state.settings
        header = request.headers.get("authorization")
        if header is None and sessions and (found_session := browser_session(request)):
            session = found_session[1]
            if not role_allows(session.role, role):
                raise ProblemError(
                    403,
                    f"the key {session.label!r} signed in with role {session.role!r}; this call "
                    f"needs {role!r}",
                    [(["cookie", session_cookie_name(settings)],
                      f"role {session.role!r} may not do this")],
                )
            return Caller(session.label, session.role)
        if header is None:
            active = active_key_count(archive)
            if not settings.require_keys and active == 0:
                return Caller(settings.submitter, None)
            detail = (
                "an API key is required: send Authorization: Bearer KEY"
                + (" (in a browser: sign in at /login)" if sessions else "")
                if active
                else "this service requires API keys and none is configured: create one with "
                "`python -m service keys create`"
            )
            raise _unauthorized(detail, "missing", CHALLENGE)
        scheme, _, key = header.strip().partition(" ")
        key = key.strip()
        if scheme.lower() != "bearer" or not key:
            raise _unauthorized(
                "the Authorization header must read: Bearer KEY", "not a Bearer key",
                INVALID_CHALLENGE,
            )
        found = find_key(archive, key)
        if found is None:
            raise _unauthorized(
                "the API key is unknown or revoked", "unknown or revoked key", INVALID_CHALLENGE
            )
        if not role_allows(found.role, role):
            raise ProblemError(
                403,
                f"the key {found.label!r} has role {found.role!r}; this call needs {role!r}",
                [(["header", "authorization"], f"role {found.role!r} may not do this")],
            )
        return Caller(found.label, found.role)

    return caller_of


def _unauthorized(detail: str, msg: str, challenge: str) -> ProblemError:
    return ProblemError(
        401, detail, [(["header", "authorization"], msg)], headers={"WWW-Authenticate": challenge}
    )


def session_cookie_name(settings: ServiceSettings) -> str:
    # The __Host- prefix makes browsers accept the cookie only when Secure, Path=/ and without a
    # Domain, so no other host can set it (RFC 6265bis §4.1.3.2).
    return ("__Host-" if settings.behind_https else "") + SESSION_COOKIE


def now_of(request: Request) -> datetime:
    """The service's clock (create_app sets it; tests move it to check expiry)."""
    clock: Callable[[], datetime] = request.app.state.clock
    return clock()


def browser_session(request: Request) -> tuple[str, BrowserSession] | None:
    """(session id, session) of the request's session cookie, if it names a live session."""
    settings: ServiceSettings = request.app.state.settings
    session_id = request.cookies.get(session_cookie_name(settings))
    if not session_id or len(session_id) > MAX_COOKIE_LENGTH:
        return None
    found = find_session(
        request.app.state.archive, session_id, now=now_of(request),
        idle=timedelta(seconds=settings.session_idle_seconds),
        absolute=timedelta(seconds=settings.session_absolute_seconds),
    )
    return None if found is None else (session_id, found)


def runs_open(request: Request) -> bool:
    """True while the service runs without keys (none in the archive, and not required)."""
    settings: ServiceSettings = request.app.state.settings
    return not settings.require_keys and active_key_count(request.app.state.archive) == 0
