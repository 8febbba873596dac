"""GET/POST /login and POST /logout: browser sessions made from an API key.

The key is typed once; the browser then holds only an opaque session id (HttpOnly cookie), and
the archive only its hash. Failed sign-ins are counted per client address: past the limit within
the window, every attempt is refused with 429 until the oldest failure leaves the window.
"""

from __future__ import annotations

import math
from datetime import timedelta
from typing import Annotated

from fastapi import APIRouter, Query, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.api.access import now_of
from service.api.pages.forms import read_form
from service.api.pages.rendering import render_page, see_other
from service.api.pages.viewers import (
    Viewer,
    check_form,
    clear_session_cookie,
    safe_next,
    set_session_cookie,
    viewer_of,
)
from service.api.settings import ServiceSettings
from service.archive.keys import find_key
from service.archive.sessions import (
    end_session,
    end_sessions_before,
    recent_failures,
    record_failure,
    start_session,
)
from service.archive.store import Archive

MAX_KEY_LENGTH = 200


def build_signin_router() -> APIRouter:
    router = APIRouter(include_in_schema=False)

    @router.get("/login")
    def login_page(request: Request, next: Annotated[str, Query(max_length=2000)] = "/") -> Response:
        viewer = viewer_of(request)
        return render_page(request, "login.html.j2", viewer, next=safe_next(next), problem=None)

    @router.post("/login")
    async def login(request: Request) -> Response:
        viewer = await run_in_threadpool(viewer_of, request)
        form = await read_form(request)
        check_form(request, viewer, form.get("csrf_token"))
        target = safe_next(_text(form.get("next")))
        return await run_in_threadpool(_sign_in, request, viewer, _text(form.get("key")), target)

    @router.post("/logout")
    async def logout(request: Request) -> Response:
        viewer = await run_in_threadpool(viewer_of, request)
        form = await read_form(request)
        if viewer.session_id is not None:
            check_form(request, viewer, form.get("csrf_token"))
            await run_in_threadpool(end_session, request.app.state.archive, viewer.session_id)
        response = see_other("/login")
        clear_session_cookie(response, request)
        return response

    return router


def _sign_in(request: Request, viewer: Viewer, key: str, target: str) -> Response:
    archive: Archive = request.app.state.archive
    settings: ServiceSettings = request.app.state.settings
    now = now_of(request)
    window = timedelta(seconds=settings.sign_in_window_seconds)
    client = request.client.host if request.client else "unknown"
    limit = recent_failures(archive, client, now=now, window=window)
    if limit.failures >= settings.sign_in_attempts:
        wait = max(1, math.ceil((limit.retry_at - now).total_seconds())) if limit.retry_at else 1
        return render_page(
            request, "login.html.j2", viewer, status=429, headers={"Retry-After": str(wait)},
            next=target,
            problem=f"Too many failed sign-ins from this address. Try again in "
            f"{_minutes(wait)}.",
        )
    found = find_key(archive, key.strip()) if 0 < len(key.strip()) <= MAX_KEY_LENGTH else None
    if found is None:
        record_failure(archive, client, now=now, window=window)
        return render_page(
            request, "login.html.j2", viewer, status=401, next=target,
            problem="This key is not known, or it was revoked. Check it and try again.",
        )
    if viewer.session_id is not None:
        end_session(archive, viewer.session_id)
    end_sessions_before(
        archive, idle_since=now - timedelta(seconds=settings.session_idle_seconds),
        started_since=now - timedelta(seconds=settings.session_absolute_seconds),
    )
    session_id, _session = start_session(archive, label=found.label, now=now)
    response = see_other(target)
    set_session_cookie(response, request, session_id)
    return response


def _text(value: object) -> str:
    return value if isinstance(value, str) else ""


def _minutes(seconds: int) -> str:
    if seconds < 60:
        return f"{seconds} second{'s' if seconds != 1 else ''}"
    minutes = math.ceil(seconds / 60)
    return f"{minutes} minute{'s' if minutes != 1 else ''}"
