"""The record page GET /analyses/{id} and its forms: reproduce the result, make or end share links.

Each form posts here and the answer is the record page again, with the outcome at the top
(a reproduction result, or a new link shown this once); ending a link redirects back (303).
"""

from __future__ import annotations

from datetime import timedelta
from functools import partial
from typing import Any

from fastapi import APIRouter, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.api.access import now_of, runs_open
from service.api.integrity import reproduce_stored
from service.api.pages.errors import PageRefusal
from service.api.pages.forms import read_form
from service.api.pages.rendering import render_page, see_other
from service.api.pages.viewers import Viewer, check_form, require_viewer
from service.api.pages.views import PageProblem, share_state, verdicts_of
from service.api.problems import ProblemError
from service.api.shares import DEFAULT_HOURS, MAX_HOURS, shared_path
from service.archive.shares import create_share, end_share, list_shares
from service.archive.signature_verification import archive_verification
from service.archive.signatures import list_signatures, status_of
from service.archive.store import Archive
from service.report.context import report_context


def build_record_router() -> APIRouter:
    router = APIRouter(include_in_schema=False)

    @router.get("/analyses/{analysis_id}")
    def record_page(request: Request, analysis_id: str) -> Response:
        viewer = require_viewer(request, "read")
        return _record_response(request, viewer, _record(request, analysis_id))

    @router.post("/analyses/{analysis_id}/reproduction")
    async def reproduce_page(request: Request, analysis_id: str) -> Response:
        viewer, record, _form = await _checked_post(request, analysis_id)
        try:
            answer = await run_in_threadpool(reproduce_stored, record, request.app.state.settings)
        except ProblemError as exc:
            return await _respond(request, viewer, record, status=422, problems=[
                PageProblem("Reproduction", exc.detail, None)])
        return await _respond(request, viewer, record, reproduction=answer)

    @router.post("/analyses/{analysis_id}/share-links")
    async def share_page(request: Request, analysis_id: str) -> Response:
        viewer, record, form = await _checked_post(request, analysis_id)
        typed = form.get("expires_in_hours")
        text = typed.strip() if isinstance(typed, str) else ""
        hours = int(text) if text.isdigit() and len(text) < 6 else 0
        if not 1 <= hours <= MAX_HOURS:
            return await _respond(request, viewer, record, status=422, typed_hours=text,
                                  problems=[PageProblem(
                                      "Hours", f"must be a whole number from 1 to {MAX_HOURS}",
                                      "expires_in_hours")])
        token, link = await run_in_threadpool(
            lambda: create_share(request.app.state.archive, record_id=record["id"],
                                 label=viewer.label, now=now_of(request),
                                 lifetime=timedelta(hours=hours)))
        new_link = {"url": str(request.base_url).rstrip("/") + shared_path(token),
                    "expires_at": link.expires_at}
        return await _respond(request, viewer, record, new_link=new_link)

    @router.post("/analyses/{analysis_id}/share-links/{link_id}/end")
    async def end_share_page(request: Request, analysis_id: str, link_id: str) -> Response:
        _viewer, record, _form = await _checked_post(request, analysis_id)
        await run_in_threadpool(lambda: end_share(request.app.state.archive, record_id=record["id"],
                                                  link_id=link_id[:64], now=now_of(request)))
        return see_other(f"/analyses/{record['id']}#share-links")

    return router


async def _checked_post(request: Request, analysis_id: str) -> tuple[Viewer, dict[str, Any], Any]:
    """The viewer (submit permission), the record and the form, once the form passed its checks."""
    viewer = await run_in_threadpool(require_viewer, request, "submit")
    form = await read_form(request)
    check_form(request, viewer, form.get("csrf_token"))
    record = await run_in_threadpool(_record, request, analysis_id)
    return viewer, record, form


async def _respond(request: Request, viewer: Viewer, record: dict[str, Any], **outcome: Any) -> Response:
    # Reads the archive (links, verification): off the event loop.
    return await run_in_threadpool(partial(_record_response, request, viewer, record, **outcome))


def _record(request: Request, analysis_id: str) -> dict[str, Any]:
    archive: Archive = request.app.state.archive
    record = archive.get(analysis_id[:64])
    if record is None:
        raise PageRefusal(404, "No such record", "The archive holds no record with this id.")
    return record


def _record_response(
    request: Request, viewer: Viewer, record: dict[str, Any], *, status: int = 200,
    **outcome: Any,
) -> Response:
    archive: Archive = request.app.state.archive
    now = now_of(request)
    service_open = runs_open(request)
    links = [
        {"id": link.id, "created_at": link.created_at, "expires_at": link.expires_at,
         "made_by": link.label or "open mode", "state": share_state(link, now, service_open)}
        for link in list_shares(archive, record["id"])
    ]
    # The records' and the signatures' chains (service.archive.signature_verification).
    verification = archive_verification(archive) if viewer.may("admin") else None
    signatures = list_signatures(archive, record["id"])
    base = f"/v1/analyses/{record['id']}"
    context: dict[str, Any] = {
        "record": record, "view": report_context(record), "verdicts": verdicts_of(record["result"]),
        "links": links, "verification": verification, "report_url": base + "/report",
        "bundle_url": base + "/bundle", "json_url": base, "default_hours": DEFAULT_HOURS,
        "max_hours": MAX_HOURS, "reproduction": None, "new_link": None, "problems": [],
        "typed_hours": str(DEFAULT_HOURS),
        "signatures": signatures, "signature_status": status_of(signatures),
        "typed_signature": {"meaning": "", "comment": ""},
    }
    context.update(outcome)
    return render_page(request, "record.html.j2", viewer, status=status, **context)
