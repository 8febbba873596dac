"""POST /analyses/{id}/signatures: the signing form of the record page.

Signing takes two components: the browser session (the key that signed in) and that same key
typed again into the form, so a signature is given by its holder at that moment, not by whoever
finds a signed-in browser. The form also carries csrf_token and the record_sha256 the page
showed. A wrong key counts as a failed sign-in (the same limit per client address). On success
the answer is 303 back to the record page (POST, redirect, GET); a refusal shows the record
page again with the problem at the top and what was typed kept (never the key).
"""

from __future__ import annotations

from datetime import timedelta
from typing import Any

from fastapi import APIRouter, Request
from starlette.concurrency import run_in_threadpool
from starlette.responses import Response

from service.api.access import now_of
from service.api.pages.errors import PageRefusal
from service.api.pages.forms import read_form
from service.api.pages.record import _record, _record_response
from service.api.pages.rendering import see_other
from service.api.pages.viewers import Viewer, check_form, require_viewer
from service.api.pages.views import PageProblem
from service.api.settings import ServiceSettings
from service.api.signatures import REFUSAL_STATUS
from service.archive.keys import find_key
from service.archive.sessions import recent_failures, record_failure
from service.archive.signatures import SigningRefused, add_signature
from service.archive.store import Archive

MAX_KEY_LENGTH = 200
KEY_FIELD = "signing_key"
# Where each refusal of service.archive.signatures shows on the form.
_FIELDS = {"meaning": ("Meaning", "meaning"), "comment": ("Comment", "comment"),
           "record_sha256": ("Record", None), "authorization": ("Your key", KEY_FIELD),
           "analysis_id": ("Record", None)}


def build_signing_router() -> APIRouter:
    router = APIRouter(include_in_schema=False)

    @router.post("/analyses/{analysis_id}/signatures")
    async def sign_page(request: Request, analysis_id: str) -> Response:
        viewer = await run_in_threadpool(require_viewer, request, "sign")
        if not viewer.signed_in:
            raise PageRefusal(403, "Sign in to sign",
                              "A signature names the person who gives it: sign in with your own "
                              "key of role review or admin, then sign on the record page.")
        form = await read_form(request)
        check_form(request, viewer, form.get("csrf_token"))
        record = await run_in_threadpool(_record, request, analysis_id)
        typed = {"meaning": _text(form.get("meaning")), "comment": _text(form.get("comment"))}
        return await run_in_threadpool(
            _sign, request, viewer, record, typed, _text(form.get("key")),
            _text(form.get("record_sha256")),
        )

    return router


def _sign(request: Request, viewer: Viewer, record: dict[str, Any], typed: dict[str, str],
          key: str, record_sha256: str) -> Response:
    archive: Archive = request.app.state.archive
    settings: ServiceSettings = request.app.state.settings
    now = now_of(request)
    window = timedelta(seconds=settings.sign_in_window_seconds)
    client = request.client.host if request.client else "unknown"

    def again(status: int, *problems: PageProblem) -> Response:
        return _record_response(request, viewer, record, status=status, problems=list(problems),
                                typed_signature=typed)

    if recent_failures(archive, client, now=now, window=window).failures >= settings.sign_in_attempts:
        return again(429, PageProblem("Your key", "too many wrong keys from this address; try "
                                      "again later", KEY_FIELD))
    key = key.strip()
    found = find_key(archive, key) if 0 < len(key) <= MAX_KEY_LENGTH else None
    if found is None or found.label != viewer.label:
        record_failure(archive, client, now=now, window=window)
        return again(403, PageProblem("Your key", f"is not the key {viewer.label!r} you signed in "
                                      "with; type that key again", KEY_FIELD))
    try:
        add_signature(archive, record_id=record["id"], signer=found.label,
                      meaning=typed["meaning"], comment=typed["comment"] or None,
                      record_sha256=record_sha256)
    except SigningRefused as exc:
        problems = [PageProblem(_FIELDS.get(field, (field, None))[0], message,
                                _FIELDS.get(field, (field, None))[1])
                    for field, message in exc.problems]
        if exc.kind != "invalid":
            problems.insert(0, PageProblem("Signature", exc.detail, None))
        return again(REFUSAL_STATUS[exc.kind], *problems)
    return see_other(f"/analyses/{record['id']}#signatures")


def _text(value: object) -> str:
    return value if isinstance(value, str) else ""
