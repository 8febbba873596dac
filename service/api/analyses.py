"""Routes of /v1/analyses: translate HTTP to the pipeline (tables → records → archive) and back."""

from __future__ import annotations

from collections.abc import Mapping
from functools import partial
from typing import Annotated, Any

import anyio
import anyio.to_thread
from fastapi import APIRouter, Depends, Path, Query, Request
from starlette.responses import JSONResponse, Response

from service.api.access import Caller, require
from service.api.bodies import body_kind, read_body
from service.api.limits import idempotency_key, request_fingerprint
from service.api.problems import ProblemError, problem_responses
from service.api.schemas import AnalysisPage, AnalysisRecord
from service.api.settings import ServiceSettings
from service.api.submissions import analyse_and_archive
from service.archive.signatures import list_signatures
from service.archive.store import Archive, IdempotencyConflict, StoredRecord
from service.intake.csvinput import SETTING_FIELDS
from service.intake.problems import InvalidRequest, Problem
from service.report.bundles import build_bundle
from service.report.rendering import render_report
from service.stats.waves import available_threads

# The report is self-contained (inline CSS and SVG, no script): forbid everything else.
REPORT_SECURITY_POLICY = (
    "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; "
    "form-action 'none'; frame-ancestors 'none'"
)

CSV_QUERY_PARAMETERS = SETTING_FIELDS  # flat query parameters of a CSV upload

ID_PATTERN = "^[0-9a-f]{32}$"


async def archive_of(request: Request) -> Archive:
    # async: FastAPI would run a plain def in the thread pool, a hop of the event loop to a
    # thread and back for one attribute read
    archive: Archive = request.app.state.archive
    return archive


ArchiveDep = Annotated[Archive, Depends(archive_of)]
AnalysisId = Annotated[str, Path(description="archive identifier of the analysis")]
# GET endpoints also take a browser session cookie (signed in at /login); POSTs take Bearer only.
Reader = Annotated[Caller, Depends(require("read", sessions=True))]
Submitter = Annotated[Caller, Depends(require("submit"))]
AUTH_PROBLEMS = (401, 403)


def build_router(settings: ServiceSettings) -> APIRouter:
    router = APIRouter(prefix="/v1/analyses", tags=["analyses"])
    analysis_limiter = anyio.CapacityLimiter(available_threads())

    @router.post(
        "",
        status_code=201,
        response_model=AnalysisRecord,
        summary="Analyse a crossover table and archive the record",
        responses={
            201: {
                "description": "the archived record; `Location` names it. A retry with the "
                "same Idempotency-Key and the same request answers 201 with the first record "
                "again (and `Idempotency-Replayed: true`) instead of archiving a second one"
            },
            **problem_responses(400, *AUTH_PROBLEMS, 413, 415, 422, 500),
        },
        openapi_extra={
            "requestBody": _request_body_schema(),
            "parameters": [
                {
                    "name": name,
                    "in": "query",
                    "required": False,
                    "description": f"CSV uploads only: {text}",
                    "schema": {"type": kind},
                }
                for name, (kind, text) in CSV_QUERY_PARAMETERS.items()
            ] + [
                {
                    "name": "Idempotency-Key",
                    "in": "header",
                    "required": False,
                    "description": "1–200 printable ASCII characters; a retry with the same key "
                    "(per API key) and the same body, Content-Type and query returns the first "
                    "record; the same key with a different request is a 422 problem",
                    "schema": {"type": "string", "minLength": 1, "maxLength": 200},
                }
            ],
        },
    )
    async def create_analysis(
        request: Request, archive: ArchiveDep, caller: Submitter
    ) -> Response:
        content_type = request.headers.get("content-type")
        kind = body_kind(content_type)
        key = idempotency_key(request)
        query = _single_query_values(request)
        body = await read_body(request, settings.max_body_bytes)
        fingerprint = request_fingerprint(body, content_type, request.query_params.multi_items())
        # Parsing, resampling and the archive write are blocking: keep them off the event loop.
        try:
            # At most as many analyses at once as there are cores, first come first served:
            # more threads would only share the cores and stretch every request's latency.
            stored, replayed = await anyio.to_thread.run_sync(
                partial(analyse_and_archive, archive, settings, kind, body, query,
                        caller.submitter, idempotency_key=key, fingerprint=fingerprint),
                limiter=analysis_limiter,
            )
        except IdempotencyConflict as exc:
            raise ProblemError(
                422,
                "this Idempotency-Key was used before for a different request (body, "
                "Content-Type or query differ); use a new key for a new request",
                [(["header", "idempotency-key"], f"already names record {exc.record_id}")],
            ) from None
        return created_response(stored, replayed)

    @router.get(
        "",
        response_model=AnalysisPage,
        summary="List archived analyses in the order they were created",
        responses=problem_responses(*AUTH_PROBLEMS, 422),
    )
    def list_analyses(
        archive: ArchiveDep,
        _caller: Reader,
        # Defaults, not Annotated metadata: the bounds come from settings in this closure, and
        # string annotations (PEP 563) cannot see closure variables.
        inputs_sha256: str | None = Query(  # noqa: B008 - FastAPI parameter declaration
            None, pattern="^[0-9a-f]{64}$", description="only records with these inputs"
        ),
        limit: int = Query(  # noqa: B008
            settings.page_size, ge=1, le=settings.max_page_size, description="page size"
        ),
        offset: int = Query(0, ge=0, le=2**62, description="records to skip"),  # noqa: B008
    ) -> Response:
        items, total = archive.list(inputs_sha256=inputs_sha256, limit=limit, offset=offset)
        return JSONResponse({"items": items, "total": total})

    @router.get(
        "/{analysis_id}",
        response_model=AnalysisRecord,
        summary="One archived analysis",
        responses=problem_responses(*AUTH_PROBLEMS, 404),
    )
    def get_analysis(analysis_id: AnalysisId, archive: ArchiveDep, _caller: Reader) -> Response:
        return JSONResponse(stored_record(archive, analysis_id))

    @router.get(
        "/{analysis_id}/report",
        response_class=Response,
        summary="The HTML audit report of an analysis",
        description="Rendered from the archived record and its signatures on every request; "
        "the record and its signatures are immutable, so the bytes are identical each time "
        "until a new signature is given.",
        responses={
            200: {"content": {"text/html": {"schema": {"type": "string"}}}},
            **problem_responses(*AUTH_PROBLEMS, 404),
        },
    )
    def get_report(analysis_id: AnalysisId, archive: ArchiveDep, _caller: Reader) -> Response:
        # Rendered from the stored record and signatures on each request: both are immutable
        # and render_report is a pure function of them, so the bytes are the same every time.
        record = stored_record(archive, analysis_id)
        html = render_report(record, list_signatures(archive, record["id"]))
        return Response(
            html,
            media_type="text/html; charset=utf-8",
            headers={"Content-Security-Policy": REPORT_SECURITY_POLICY},
        )

    @router.get(
        "/{analysis_id}/bundle",
        response_class=Response,
        summary="A zip of inputs.json, record.json, report.html, signatures.json and a manifest "
        "of their hashes",
        responses={
            200: {"content": {"application/zip": {"schema": {"type": "string"}}}},
            **problem_responses(*AUTH_PROBLEMS, 404),
        },
    )
    def get_bundle(analysis_id: AnalysisId, archive: ArchiveDep, _caller: Reader) -> Response:
        record = stored_record(archive, analysis_id)
        given = list_signatures(archive, record["id"])
        bundle = build_bundle(record, render_report(record, given), given)
        return Response(
            bundle,
            media_type="application/zip",
            headers={
                "Content-Disposition": f'attachment; filename="bioparity-{record["id"]}.zip"'
            },
        )

    return router


def created_response(stored: Mapping[str, Any], replayed: bool) -> Response:
    """201 with the archived record: the JSON text the archive made from its stored columns
    (StoredRecord.json_text, the same content JSONResponse would write), not a second encoding."""
    headers = {"Location": f"/v1/analyses/{stored['id']}"}
    if replayed:
        headers["Idempotency-Replayed"] = "true"
    if isinstance(stored, StoredRecord):
        return Response(stored.json_text, status_code=201, headers=headers,
                        media_type="application/json")
    return JSONResponse(stored, status_code=201, headers=headers)


def _single_query_values(request: Request) -> dict[str, str]:
    values: dict[str, str] = {}
    repeated: list[str] = []
    for name, value in request.query_params.multi_items():
        if name in values and name not in repeated:
            repeated.append(name)
        values[name] = value
    if repeated:
        raise InvalidRequest(
            [Problem(("query", name), "given more than once") for name in sorted(repeated)]
        )
    return values


def stored_record(archive: Archive, analysis_id: str) -> dict[str, Any]:
    record = archive.get(analysis_id)
    if record is None:
        raise ProblemError(
            404,
            "no analysis with this id",
            # Echo at most a short prefix of what the client sent.
            [(["path", "analysis_id"], f"unknown analysis {analysis_id[:64]!r}")],
        )
    return record


def _request_body_schema() -> dict[str, Any]:
    return {
        "required": True,
        "content": {
            "application/json": {"schema": {"$ref": "#/components/schemas/AnalysisRequest"}},
            "text/csv": {
                "schema": {"type": "string"},
                "example": "subject,period,sequence,treatment,metric,value\n",
            },
        },
    }
