"""GET /shared/TOKEN: the audit report of one record, for someone without a key.

Unknown token: 404. A link that expired, was ended, or whose key was revoked: 410. Either way a
plain page, never the report.
"""

from __future__ import annotations

import re

from fastapi import APIRouter, Request
from starlette.responses import Response

from service.api.access import now_of, runs_open
from service.api.analyses import REPORT_SECURITY_POLICY
from service.api.pages.errors import PageRefusal
from service.api.pages.views import share_state
from service.archive.shares import find_share
from service.archive.signatures import list_signatures
from service.archive.store import Archive
from service.report.rendering import render_report

_TOKEN = re.compile("[A-Za-z0-9_-]{20,100}")


def build_shared_router() -> APIRouter:
    router = APIRouter(include_in_schema=False)

    @router.get("/shared/{token}")
    def shared_report(request: Request, token: str) -> Response:
        archive: Archive = request.app.state.archive
        link = find_share(archive, token) if _TOKEN.fullmatch(token) else None
        if link is None:
            raise PageRefusal(404, "Link not valid",
                              "This share link is not known to this service. Check that it was "
                              "copied whole.")
        state = share_state(link, now_of(request), runs_open(request))
        record = archive.get(link.record_id) if state == "active" else None
        if record is None:
            raise PageRefusal(410, "Link no longer works",
                              f"This share link no longer works ({state}). Ask the person who "
                              "sent it for a new one.")
        # The same bytes as GET /v1/analyses/{id}/report: the record and its signatures.
        html = render_report(record, list_signatures(archive, record["id"]))
        return Response(
            html, media_type="text/html; charset=utf-8",
            headers={"Content-Security-Policy": REPORT_SECURITY_POLICY,
                     "Cache-Control": "no-store", "X-Robots-Tag": "noindex"},
        )

    return router
