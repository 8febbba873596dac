"""RFC 9457 problem details: the one shape of every error response."""

from __future__ import annotations

from collections.abc import Sequence
from http import HTTPStatus
from typing import Any, cast

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from pydantic import BaseModel, Field
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import JSONResponse, Response

from service.intake.tables import InvalidRequest

PROBLEM_MEDIA_TYPE = "application/problem+json"

# Our own problem type identifiers (RFC 9457 §3.1.1 allows any URI; a URN needs no web page).
TYPE_PREFIX = "urn:bioparity:problem:"
_TYPE_BY_STATUS = {
    400: "malformed-body",
    401: "unauthorized",
    403: "forbidden",
    404: "not-found",
    405: "method-not-allowed",
    409: "conflict",
    413: "body-too-large",
    415: "unsupported-media-type",
    422: "invalid-request",
    500: "internal-error",
}


class ProblemLocation(BaseModel):
    loc: list[str | int] = Field(description="path to the fault, e.g. ['records', 3, 'value']")
    msg: str = Field(description="what is wrong there, in plain words")


class ProblemDetails(BaseModel):
    """RFC 9457 problem details, with every problem found listed in `errors`."""

    type: str = Field(description="problem type URI, e.g. urn:bioparity:problem:invalid-request")
    title: str
    status: int
    detail: str
    errors: list[ProblemLocation] = Field(default_factory=list)


class ProblemError(Exception):
    """Raised by routes to answer with a problem response."""

    def __init__(
        self,
        status: int,
        detail: str,
        errors: Sequence[tuple[Sequence[str | int], str]] = (),
        headers: dict[str, str] | None = None,
    ) -> None:
        super().__init__(detail)
        self.status = status
        self.detail = detail
        self.errors = [(list(loc), msg) for loc, msg in errors]
        self.headers = headers


def problem_response(
    status: int,
    detail: str,
    errors: Sequence[tuple[Sequence[str | int], str]] = (),
    headers: dict[str, str] | None = None,
) -> JSONResponse:
    body = {
        "type": TYPE_PREFIX + _TYPE_BY_STATUS.get(status, "http-error"),
        "title": HTTPStatus(status).phrase,
        "status": status,
        "detail": detail,
        "errors": [{"loc": list(loc), "msg": msg} for loc, msg in errors],
    }
    response = JSONResponse(body, status_code=status, media_type=PROBLEM_MEDIA_TYPE)
    response.headers["X-Content-Type-Options"] = "nosniff"
    for name, value in (headers or {}).items():
        response.headers[name] = value
    return response


def invalid_request_response(exc: InvalidRequest) -> JSONResponse:
    """422 for content problems; 400 when the body itself cannot be read (all at loc ("body",))."""
    errors = [(list(p.loc), p.msg) for p in exc.problems]
    if all(tuple(p.loc) == ("body",) for p in exc.problems):
        return problem_response(400, "the request body cannot be read", errors)
    count = len(errors)
    return problem_response(
        422, f"the request has {count} problem{'s' if count != 1 else ''}", errors
    )


_PROBLEM_SCHEMA_REF = "#/components/schemas/ProblemDetails"


# Responses declared on routes so that the OpenAPI schema documents the problem bodies.
def problem_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    return {
        status: {
            "model": ProblemDetails,
            "description": HTTPStatus(status).phrase,
            "content": {PROBLEM_MEDIA_TYPE: {"schema": {"$ref": _PROBLEM_SCHEMA_REF}}},
        }
        for status in statuses
    }


def install_problem_handlers(app: FastAPI) -> None:
    async def on_problem(_request: Request, exc: Exception) -> Response:
        problem = cast(ProblemError, exc)  # registered for ProblemError only
        return problem_response(problem.status, problem.detail, problem.errors, problem.headers)

    async def on_invalid(_request: Request, exc: Exception) -> Response:
        return invalid_request_response(cast(InvalidRequest, exc))

    async def on_http(_request: Request, exc: Exception) -> Response:
        http = cast(StarletteHTTPException, exc)
        status = http.status_code
        if status == 404:
            detail = "no such resource"
        elif status == 405:
            detail = "this method is not allowed here"
        else:
            detail = str(http.detail)
        return problem_response(status, detail, headers=dict(http.headers or {}))

    async def on_validation(_request: Request, exc: Exception) -> Response:
        errors = [
            ([part for part in error.get("loc", ()) if isinstance(part, str | int)],
             str(error.get("msg", "invalid value")))
            for error in cast(RequestValidationError, exc).errors()
        ]
        count = len(errors)
        return problem_response(
            422, f"the request has {count} problem{'s' if count != 1 else ''}", errors
        )

    async def on_unexpected(_request: Request, _exc: Exception) -> Response:
        # No exception text: it may carry paths or data; the server log has the traceback.
        return problem_response(500, "an unexpected error occurred; nothing was archived")

    app.add_exception_handler(ProblemError, on_problem)
    app.add_exception_handler(InvalidRequest, on_invalid)
    app.add_exception_handler(StarletteHTTPException, on_http)
    app.add_exception_handler(RequestValidationError, on_validation)
    app.add_exception_handler(Exception, on_unexpected)
