"""Request bodies: which media types are accepted, and reading at most N bytes of one."""

from __future__ import annotations

from starlette.requests import Request

from service.api.problems import ProblemError
from service.intake.reading import BodyKind

_KINDS: dict[str, BodyKind] = {"application/json": "json", "text/csv": "csv"}
_CHARSETS = {"utf-8", "utf8"}


def body_kind(content_type: str | None) -> BodyKind:
    """The kind of an upload from its Content-Type, or a 415 problem."""
    if not content_type:
        raise ProblemError(
            415,
            "a Content-Type header is required: application/json or text/csv",
            [(["header", "content-type"], "missing")],
        )
    media_type, *parameters = (part.strip() for part in content_type.split(";"))
    kind = _KINDS.get(media_type.lower())
    if kind is None:
        raise ProblemError(
            415,
            f"media type {media_type!r} is not accepted; send application/json or text/csv",
            [(["header", "content-type"], f"unsupported media type {media_type!r}")],
        )
    for parameter in parameters:
        name, _, value = parameter.partition("=")
        if name.strip().lower() == "charset":
            charset = value.strip().strip('"').lower()
            if charset not in _CHARSETS:
                raise ProblemError(
                    415,
                    f"charset {charset!r} is not accepted; send UTF-8",
                    [(["header", "content-type"], f"unsupported charset {charset!r}")],
                )
    return kind


async def read_body(request: Request, max_bytes: int) -> bytes:
    """The whole body, refusing more than `max_bytes` whether or not Content-Length says so."""
    declared = request.headers.get("content-length")
    if declared is not None:
        if not declared.strip().isdigit():
            raise ProblemError(
                400,
                "the Content-Length header is not a number",
                [(["header", "content-length"], f"not a byte count: {declared!r}")],
            )
        if int(declared) > max_bytes:
            raise _too_large(max_bytes)
    chunks: list[bytes] = []
    received = 0
    # Count while streaming: a chunked upload carries no Content-Length to trust.
    async for chunk in request.stream():
        received += len(chunk)
        if received > max_bytes:
            raise _too_large(max_bytes)
        chunks.append(chunk)
    return b"".join(chunks)


def _too_large(max_bytes: int) -> ProblemError:
    return ProblemError(
        413,
        f"the request body is larger than this service accepts ({max_bytes} bytes)",
        [(["body"], f"more than {max_bytes} bytes")],
    )
