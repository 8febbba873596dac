"""Who is looking at a page, what they may do, and the checks every form post passes.

A signed-in viewer carries the session's CSRF token (kept server-side with the session). Before
sign-in, and while the service runs open, forms carry the value of a separate random cookie
instead (the double-submit pattern). A form post is refused unless its csrf_token field equals
that token, and, when the browser sends Origin, unless Origin names this very host.
"""

from __future__ import annotations

import hmac
import secrets
from dataclasses import dataclass
from urllib.parse import quote, urlsplit

from starlette.requests import Request
from starlette.responses import Response

from service.api.access import browser_session, runs_open, session_cookie_name
from service.api.pages.errors import PageRedirect, PageRefusal
from service.api.settings import ServiceSettings
from service.archive.roles import role_allows

FORM_COOKIE = "bioparity_form"
MAX_TOKEN_LENGTH = 100


@dataclass(frozen=True)
class Viewer:
    label: str | None        # the key that signed in; None before sign-in and in open mode
    role: str | None
    open: bool               # the service runs without keys: every page works without sign-in
    session_id: str | None   # the session cookie's value, when signed in
    csrf_token: str          # the token every form of the page carries
    new_form_cookie: bool    # csrf_token is a new form cookie that the response must set

    @property
    def signed_in(self) -> bool:
        return self.session_id is not None

    def may(self, permission: str) -> bool:
        """read, submit or admin (service.archive.roles); everything while the service is open."""
        if self.open:
            return True
        return self.role is not None and role_allows(self.role, permission)


def viewer_of(request: Request) -> Viewer:
    """The viewer of this request (blocking: reads the archive)."""
    found = browser_session(request)
    if found is not None:
        session_id, session = found
        return Viewer(session.label, session.role, False, session_id, session.csrf_token, False)
    token = request.cookies.get(form_cookie_name(request.app.state.settings), "")
    fresh = not _looks_like_token(token)
    if fresh:
        token = secrets.token_urlsafe(32)
    return Viewer(None, None, runs_open(request), None, token, fresh)


def require_viewer(request: Request, permission: str = "read") -> Viewer:
    """The viewer, if signed in (or the service is open) and allowed `permission`; otherwise a
    redirect to the sign-in page (GET) or a refusal (anything else)."""
    viewer = viewer_of(request)
    if not viewer.open and not viewer.signed_in:
        if request.method == "GET":
            raise PageRedirect("/login?next=" + quote(_path_and_query(request), safe="/"))
        raise PageRefusal(401, "Sign in first",
                          "Your session has ended or you have not signed in. Sign in and try again.")
    if not viewer.may(permission):
        raise PageRefusal(
            403, "Not allowed with this key",
            f"The key {viewer.label!r} has the role {viewer.role!r}, which may not do this. "
            f"It needs a key with the {permission!r} permission.",
        )
    return viewer


def check_form(request: Request, viewer: Viewer, token: object) -> None:
    """Refuse (403) a form post whose csrf_token is wrong, or that another site sent."""
    origin = request.headers.get("origin")
    if origin is not None and not _same_host(origin, request.headers.get("host", "")):
        raise PageRefusal(403, "Form refused",
                          "This form was sent from another site. Open the page on this service "
                          "and send the form from there.")
    if (viewer.new_form_cookie or not isinstance(token, str)
            or not hmac.compare_digest(token.encode(), viewer.csrf_token.encode())):
        raise PageRefusal(403, "Form refused",
                          "The form's security token is missing or out of date (after a sign-in "
                          "or sign-out, for example). Reload the page and send the form again.")


def safe_next(target: str | None) -> str:
    """A path on this service to go to after sign-in; anything else (another site) becomes /."""
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/"
    parts = urlsplit(target)
    if parts.scheme or parts.netloc:
        return "/"
    return target


def form_cookie_name(settings: ServiceSettings) -> str:
    return ("__Host-" if settings.behind_https else "") + FORM_COOKIE


def set_form_cookie(response: Response, request: Request, token: str) -> None:
    settings: ServiceSettings = request.app.state.settings
    response.set_cookie(form_cookie_name(settings), token, path="/", httponly=True,
                        samesite="strict", secure=settings.behind_https)


def set_session_cookie(response: Response, request: Request, session_id: str) -> None:
    settings: ServiceSettings = request.app.state.settings
    response.set_cookie(session_cookie_name(settings), session_id, path="/", httponly=True,
                        samesite="lax", secure=settings.behind_https,
                        max_age=settings.session_absolute_seconds)


def clear_session_cookie(response: Response, request: Request) -> None:
    settings: ServiceSettings = request.app.state.settings
    response.delete_cookie(session_cookie_name(settings), path="/", httponly=True,
                           samesite="lax", secure=settings.behind_https)


def _looks_like_token(value: str) -> bool:
    return 20 <= len(value) <= MAX_TOKEN_LENGTH and all(
        ch.isascii() and (ch.isalnum() or ch in "-_") for ch in value
    )


def _same_host(origin: str, host: str) -> bool:
    if origin == "null":
        return False
    parts = urlsplit(origin)
    return bool(parts.netloc) and parts.scheme in ("http", "https") and (
        parts.netloc.lower() == host.strip().lower()
    )


def _path_and_query(request: Request) -> str:
    query = request.url.query
    return request.url.path + ("?" + query if query else "")
