"""Who is calling: the Bearer key of a request, looked up in the archive on every request."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from fastapi import Request

from service.api.problems import ProblemError
from service.api.settings import ServiceSettings
from service.archive.keys import active_key_count, find_key
from service.archive.roles import role_allows
from service.archive.store import Archive

# RFC 6750 §3: the challenge of a Bearer-protected resource; error= only when a token was sent.
CHALLENGE = 'Bearer realm="bioparity"'
INVALID_CHALLENGE = 'Bearer realm="bioparity", error="invalid_token"'


@dataclass(frozen=True)
class Caller:
    """The submitter name archived with a record: the key's label, or the open-mode name."""

    submitter: str
    role: str | None  # None while the service runs open (no key in the archive, loopback)


def require(role: str) -> Callable[[Request], Caller]:
    """A dependency that admits callers whose key has `role` or a higher one."""

    # A plain def: FastAPI runs it in the thread pool, so the lookup never blocks the loop.
    def caller_of(request: Request) -> Caller:
        archive: Archive = request.app.state.archive
        settings: ServiceSettings = request.app.state.settings
        header = request.headers.get("authorization")
        if header is None:
            active = active_key_count(archive)
            if not settings.require_keys and active == 0:
                return Caller(settings.submitter, None)
            detail = (
                "an API key is required: send Authorization: Bearer KEY"
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
