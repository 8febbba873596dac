"""The browser side: sign-in, the archive index, record pages, upload, share links and the API
reference, as server-rendered HTML forms that need no script."""

from __future__ import annotations

from typing import cast

from fastapi import FastAPI
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request
from starlette.responses import Response

from service.api.pages.docs import install_docs
from service.api.pages.errors import PageRedirect, PageRefusal
from service.api.pages.index import build_index_router
from service.api.pages.planning import build_planning_router
from service.api.pages.record import build_record_router
from service.api.pages.rendering import render_page, see_other
from service.api.pages.shared import build_shared_router
from service.api.pages.signin import build_signin_router
from service.api.pages.signing import build_signing_router
from service.api.pages.upload import build_upload_router
from service.api.pages.viewers import viewer_of


def install_pages(app: FastAPI) -> None:
    for router in (build_signin_router(), build_index_router(), build_record_router(),
                   build_upload_router(), build_shared_router(), build_signing_router(),
                   build_planning_router()):
        app.include_router(router)
    install_docs(app)

    async def on_redirect(_request: Request, exc: Exception) -> Response:
        return see_other(cast(PageRedirect, exc).location)

    async def on_refusal(request: Request, exc: Exception) -> Response:
        refusal = cast(PageRefusal, exc)
        viewer = await run_in_threadpool(viewer_of, request)
        return render_page(request, "refused.html.j2", viewer, status=refusal.status,
                           headers=refusal.headers, heading=refusal.heading,
                           message=refusal.message)

    app.add_exception_handler(PageRedirect, on_redirect)
    app.add_exception_handler(PageRefusal, on_refusal)
