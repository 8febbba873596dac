"""Routes that check the archive: the hash-chain verification and the reproduction of a result."""

from __future__ import annotations

import time
from typing import Annotated, Any

from fastapi import APIRouter, Depends
from starlette.responses import JSONResponse, Response

from service.api.access import Caller, require
from service.api.analyses import AnalysisId, ArchiveDep, stored_record
from service.api.limits import check_work, time_exceeded
from service.api.problems import problem_responses
from service.api.settings import ServiceSettings
from service.archive.signature_verification import archive_verification
from service.records.reproduction import reproduce
from service.stats.deadlines import ComputeTimeExceeded

AUTH_PROBLEMS = (401, 403)


def build_integrity_router(settings: ServiceSettings) -> APIRouter:
    router = APIRouter(prefix="/v1", tags=["integrity"])

    @router.get(
        "/archive/verification",
        summary="Walk the hash chain of the archive and report the first break (role admin)",
        description="Recomputes every inputs hash from the stored inputs and every record hash "
        "and link, and every signature hash and link. `valid` is false when any stored row "
        "was edited, removed or moved; `first_break` names the earliest record affected and "
        "why, `first_signature_break` the earliest signature.",
        responses=problem_responses(*AUTH_PROBLEMS),
    )
    def verify_archive(
        archive: ArchiveDep, _caller: Annotated[Caller, Depends(require("admin"))]
    ) -> Response:
        return JSONResponse(archive_verification(archive))

    @router.post(
        "/analyses/{analysis_id}/reproduction",
        summary="Recompute an archived result from its archived inputs (role submit or admin)",
        description="Answers `reproduced` and the paths of every differing value; engine "
        "version differences are listed in `engine_differences` and do not count as a "
        "failure. Nothing is archived.",
        responses=problem_responses(*AUTH_PROBLEMS, 404, 422),
    )
    def reproduce_analysis(
        analysis_id: AnalysisId,
        archive: ArchiveDep,
        _caller: Annotated[Caller, Depends(require("submit"))],
    ) -> Response:
        return JSONResponse(reproduce_stored(stored_record(archive, analysis_id), settings))

    return router


def reproduce_stored(record: dict[str, Any], settings: ServiceSettings) -> dict[str, Any]:
    """The reproduction of an archived record within the service's work and time caps (a 422
    ProblemError above them). Blocking; also used by the record page's reproduction button."""
    check_work(record["inputs"], settings.max_work)
    deadline = time.monotonic() + settings.max_compute_seconds
    try:
        answer: dict[str, Any] = reproduce(record, deadline=deadline,
                                                threads=settings.bootstrap_threads or None)
    except ComputeTimeExceeded as exc:
        raise time_exceeded(exc, settings.max_compute_seconds) from None
    return answer
