"""Routes of /v1/analyses/{id}/signatures: sign a record (review or admin) and list its signatures."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Depends, Request
from pydantic import BaseModel, ConfigDict, Field, ValidationError
from starlette.concurrency import run_in_threadpool
from starlette.responses import JSONResponse, Response

from service.api.access import CHALLENGE, Caller, require
from service.api.analyses import AnalysisId, ArchiveDep, stored_record
from service.api.bodies import body_kind, read_body
from service.api.problems import ProblemError, problem_responses
from service.archive.signatures import (
    MAX_COMMENT_LENGTH,
    MEANINGS,
    SigningRefused,
    add_signature,
    get_signature,
    list_signatures,
    status_of,
)
from service.intake.problems import InvalidRequest, Problem, parse_json_body

# Far above any valid body (a 2000-character comment, each character escaped, stays below 50 KB).
MAX_SIGNATURE_BODY_BYTES = 256 * 1024
HASH_PATTERN = "^[0-9a-f]{64}$"

# What each refusal of service.archive.signatures answers (RFC 9110 §15.5).
REFUSAL_STATUS = {
    "invalid": 422,
    "unknown_record": 404,
    "not_a_signer": 403,
    "self_signing": 403,
    "stale_record": 409,
    "duplicate": 409,
}
_REFUSAL_PLACE = {"authorization": ["header", "authorization"], "analysis_id": ["path", "analysis_id"]}

Meaning = Literal["reviewed", "approved", "rejected"]
Status = Literal["unsigned", "reviewed", "approved", "rejected"]


class SignatureRequest(BaseModel):
    """The body of POST /v1/analyses/{id}/signatures."""

    model_config = ConfigDict(extra="forbid", strict=True)

    meaning: Meaning = Field(description="what the signature means: " + ", ".join(MEANINGS))
    comment: str | None = Field(
        None, max_length=MAX_COMMENT_LENGTH,
        description=f"plain text, at most {MAX_COMMENT_LENGTH} characters; required for rejected",
    )
    record_sha256: str = Field(
        pattern=HASH_PATTERN,
        description="the record_sha256 the signer saw; it must be the record's hash now",
    )


class Signature(BaseModel):
    """One signature, as archived (append-only; nothing updates or deletes one)."""

    id: str = Field(description="identifier of the signature (32 hexadecimal digits)")
    record_id: str
    record_sha256: str = Field(description="the hash of the record that was signed")
    signer: str = Field(description="label of the signer's API key")
    printed_name: str = Field(description="printed name of the signer, from `keys create --name`")
    meaning: Meaning
    comment: str | None
    signed_at: str = Field(description="UTC time of signing, ISO 8601 with microseconds and Z")
    signature_sha256: str = Field(
        description="SHA-256 of the RFC 8785 JSON of record_id, record_sha256, signer, "
        "printed_name, meaning, comment, signed_at and previous_signature_sha256"
    )
    previous_signature_sha256: str | None = Field(
        description="signature_sha256 of the signature given just before in the archive (any "
        "record); null for the first"
    )


class SignatureList(BaseModel):
    record_id: str
    record_sha256: str
    status: Status = Field(description="the meaning of the latest signature, or unsigned")
    signatures: list[Signature] = Field(description="in the order they were given")


Signer = Annotated[Caller, Depends(require("sign"))]
Reader = Annotated[Caller, Depends(require("read", sessions=True))]


def build_signatures_router() -> APIRouter:
    router = APIRouter(prefix="/v1/analyses", tags=["signatures"])

    @router.post(
        "/{analysis_id}/signatures",
        status_code=201,
        response_model=Signature,
        summary="Sign a record: reviewed, approved or rejected (role review or admin)",
        description="The signer's key must carry a printed name and must not be the key that "
        "submitted the record. `record_sha256` must be the record's hash (else 409: the signer "
        "did not see this record); one signer gives each meaning to a record once (else 409).",
        responses={
            201: {"description": "the signature", "headers": {"Location": {
                "description": "the path of the new signature", "schema": {"type": "string"}}}},
            **problem_responses(400, 401, 403, 404, 409, 413, 415, 422),
        },
        openapi_extra={"requestBody": {"required": True, "content": {"application/json": {
            "schema": SignatureRequest.model_json_schema()}}}},
    )
    async def sign_analysis(
        analysis_id: AnalysisId, request: Request, archive: ArchiveDep, caller: Signer
    ) -> Response:
        if caller.role is None:
            raise ProblemError(
                401, "signing needs an API key of role review or admin with a printed name; this "
                "service runs open because no key exists",
                [(["header", "authorization"], "missing")], headers={"WWW-Authenticate": CHALLENGE})
        if body_kind(request.headers.get("content-type")) != "json":
            raise ProblemError(415, "a signature is sent as application/json",
                               [(["header", "content-type"], "use application/json")])
        parsed = parse_signature_request(await read_body(request, MAX_SIGNATURE_BODY_BYTES))
        try:
            signature = await run_in_threadpool(
                lambda: add_signature(
                    archive, record_id=analysis_id, signer=caller.submitter,
                    meaning=parsed.meaning, comment=parsed.comment,
                    record_sha256=parsed.record_sha256,
                )
            )
        except SigningRefused as exc:
            raise refusal_problem(exc) from None
        location = f"/v1/analyses/{analysis_id}/signatures/{signature['id']}"
        return JSONResponse(signature, status_code=201, headers={"Location": location})

    @router.get(
        "/{analysis_id}/signatures",
        response_model=SignatureList,
        summary="The signatures of a record and its latest status",
        responses=problem_responses(401, 403, 404),
    )
    def list_analysis_signatures(
        analysis_id: AnalysisId, archive: ArchiveDep, _caller: Reader
    ) -> Response:
        record = stored_record(archive, analysis_id)
        given = list_signatures(archive, analysis_id)
        return JSONResponse({
            "record_id": record["id"], "record_sha256": record["record_sha256"],
            "status": status_of(given), "signatures": given,
        })

    @router.get(
        "/{analysis_id}/signatures/{signature_id}",
        response_model=Signature,
        summary="One signature of a record",
        responses=problem_responses(401, 403, 404),
    )
    def get_analysis_signature(
        analysis_id: AnalysisId, signature_id: str, archive: ArchiveDep, _caller: Reader
    ) -> Response:
        found = get_signature(archive, analysis_id, signature_id)
        if found is None:
            raise ProblemError(404, "no signature with this id on this analysis",
                               [(["path", "signature_id"], f"unknown signature {signature_id[:64]!r}")])
        return JSONResponse(found)

    return router


def parse_signature_request(body: bytes) -> SignatureRequest:
    """The signing request in `body`, or InvalidRequest naming every bad field."""
    data: Any = parse_json_body(body)
    try:
        return SignatureRequest.model_validate(data)
    except ValidationError as exc:
        raise InvalidRequest([
            Problem(("body", *(part for part in error["loc"] if isinstance(part, str | int))),
                    error["msg"])
            for error in exc.errors()
        ]) from None


def refusal_problem(exc: SigningRefused) -> ProblemError:
    errors = [(_REFUSAL_PLACE.get(field, ["body", field]), msg) for field, msg in exc.problems]
    return ProblemError(REFUSAL_STATUS[exc.kind], exc.detail, errors)
