"""GET /: the archive index, newest first, with filters and pages (a GET form, no script)."""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import date, timedelta
from urllib.parse import urlencode

from fastapi import APIRouter, Request
from starlette.responses import Response

from service.api.pages.rendering import render_page
from service.api.pages.viewers import require_viewer
from service.api.pages.views import PageProblem, Verdicts, short_hash, verdicts_of
from service.api.settings import ServiceSettings
from service.archive.search import VERDICTS, RecordFilter, find_records, submitters
from service.archive.signatures import latest_status

FILTER_FIELDS = ("text", "verdict", "submitter", "from", "to", "inputs_sha256")
MAX_FILTER_LENGTH = 200
_SHA256 = re.compile("[0-9a-f]{64}")
_DAY = re.compile("[0-9]{4}-[0-9]{2}-[0-9]{2}")


@dataclass(frozen=True)
class IndexRow:
    id: str
    created_at: str
    title: str
    analyte: str
    submitter: str
    short_hash: str
    verdicts: list[Verdicts]
    status: str = "unsigned"  # the meaning of the latest signature (service.archive.signatures)


def build_index_router() -> APIRouter:
    router = APIRouter(include_in_schema=False)

    @router.get("/")
    def archive_index(request: Request) -> Response:
        viewer = require_viewer(request, "read")
        settings: ServiceSettings = request.app.state.settings
        typed = {name: request.query_params.get(name, "")[:MAX_FILTER_LENGTH].strip()
                 for name in FILTER_FIELDS}
        where, page, problems = _filters(typed, request.query_params.get("page", "1"))
        names = submitters(request.app.state.archive)
        if problems:
            return render_page(request, "index.html.j2", viewer, status=422, typed=typed,
                               problems=problems, rows=[], total=0, page=1, pages=1,
                               verdicts=VERDICTS, submitters=names, previous_url=None,
                               next_url=None)
        size = settings.page_size
        found, total = find_records(request.app.state.archive, where, limit=size,
                                    offset=(page - 1) * size)
        pages = max(1, -(-total // size))
        statuses = latest_status(request.app.state.archive, [r.id for r in found])
        rows = [IndexRow(r.id, r.created_at, r.title, r.analyte, r.submitter,
                         short_hash(r.inputs_sha256), verdicts_of(r.result), statuses[r.id])
                for r in found]
        kept = {name: value for name, value in typed.items() if value}
        return render_page(
            request, "index.html.j2", viewer, typed=typed, problems=[], rows=rows, total=total,
            page=page, pages=pages, verdicts=VERDICTS, submitters=names,
            previous_url=_page_url(kept, page - 1) if page > 1 else None,
            next_url=_page_url(kept, page + 1) if page < pages else None,
        )

    return router


def _filters(typed: dict[str, str], page_text: str) -> tuple[RecordFilter, int, list[PageProblem]]:
    problems: list[PageProblem] = []
    verdict = typed["verdict"] or None
    if verdict is not None and verdict not in VERDICTS:
        problems.append(PageProblem("Verdict", "choose one of the listed verdicts", "verdict"))
    digest = typed["inputs_sha256"].lower() or None
    if digest is not None and not _SHA256.fullmatch(digest):
        problems.append(PageProblem("Inputs hash", "must be the 64 hexadecimal digits of an "
                                    "inputs SHA-256", "inputs_sha256"))
    first = _day(typed["from"], "from", "From", problems)
    last = _day(typed["to"], "to", "To", problems)
    if first and last and last < first:
        problems.append(PageProblem("To", "must not be before the From date", "to"))
    page = int(page_text) if page_text.isdigit() and 0 < len(page_text) < 10 else 0
    if page < 1:
        problems.append(PageProblem("Page", "must be a whole number from 1", None))
    where = RecordFilter(
        text=typed["text"] or None, verdict=verdict, submitter=typed["submitter"] or None,
        created_from=f"{first.isoformat()}T00:00:00.000000Z" if first else None,
        created_before=f"{(last + timedelta(days=1)).isoformat()}T00:00:00.000000Z" if last else None,
        inputs_sha256=digest,
    )
    return where, max(page, 1), problems


def _day(text: str, field: str, label: str, problems: list[PageProblem]) -> date | None:
    if not text:
        return None
    try:
        if not _DAY.fullmatch(text):
            raise ValueError(text)
        return date.fromisoformat(text)
    except ValueError:
        problems.append(PageProblem(label, "must be a date written as YYYY-MM-DD", field))
        return None


def _page_url(kept: dict[str, str], page: int) -> str:
    return "/?" + urlencode({**kept, "page": str(page)})
