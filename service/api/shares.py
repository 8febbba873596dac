"""POST /v1/analyses/{id}/share: a link that shows one report to people without a key."""

from __future__ import annotations

from datetime import timedelta
from typing import Annotated

from fastapi import APIRouter, Body, Depends, Request
from pydantic import BaseModel, ConfigDict, Field
from starlette.responses import JSONResponse, Response

from service.api.access import Caller, now_of, require
from service.api.analyses import AnalysisId, ArchiveDep, stored_record
from service.api.problems import problem_responses
from service.archive.shares import create_share

DEFAULT_HOURS = 72
MAX_HOURS = 720  # 30 days


class ShareRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")

    expires_in_hours: int = Field(
        DEFAULT_HOURS, ge=1, le=MAX_HOURS, strict=True,
        description=f"how long the link works, in whole hours (1 to {MAX_HOURS})",
    )


class ShareLinkCreated(BaseModel):
    id: str = Field(description="identifier of the link (listed on the record page; not secret)")
    url: str = Field(description="path of the link, /shared/TOKEN, relative to this service; "
                     "the token is shown only this once")
    expires_at: str = Field(description="UTC time the link stops working, ISO 8601 with Z")


def shared_path(token: str) -> str:
    return f"/shared/{token}"


def build_share_router() -> APIRouter:
    router = APIRouter(prefix="/v1/analyses", tags=["analyses"])

    @router.post(
        "/{analysis_id}/share",
        status_code=201,
        response_model=ShareLinkCreated,
        summary="Make a link that shows the report without sign-in (role submit or admin)",
        description="The link works until it expires, is ended on the record page, or the key "
        "that made it is revoked; after that it answers 410 and never the report. The archive "
        "keeps only the SHA-256 of the token.",
        responses=problem_responses(400, 401, 403, 404, 422),
    )
    def share_analysis(
        analysis_id: AnalysisId,
        archive: ArchiveDep,
        request: Request,
        caller: Annotated[Caller, Depends(require("submit"))],
        body: Annotated[ShareRequest | None, Body()] = None,
    ) -> Response:
        record = stored_record(archive, analysis_id)
        hours = DEFAULT_HOURS if body is None else body.expires_in_hours
        token, link = create_share(
            archive, record_id=record["id"], label=None if caller.role is None else caller.submitter,
            now=now_of(request), lifetime=timedelta(hours=hours),
        )
        return JSONResponse(
            {"id": link.id, "url": shared_path(token), "expires_at": link.expires_at},
            status_code=201,
        )

    return router
