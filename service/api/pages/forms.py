"""Reading a form post: at most N bytes (as for the API's bodies), then the usual form parsers."""

from __future__ import annotations

from collections.abc import AsyncGenerator

from starlette.datastructures import FormData
from starlette.formparsers import FormParser, MultiPartException, MultiPartParser
from starlette.requests import Request

from service.api.bodies import read_body
from service.api.pages.errors import PageRefusal
from service.api.problems import ProblemError

URLENCODED = "application/x-www-form-urlencoded"
MULTIPART = "multipart/form-data"
MAX_FIELDS = 40
SMALL_FORM_BYTES = 16 * 1024  # sign-in, sign-out and the buttons of the record page


async def read_form(request: Request, *, max_bytes: int = SMALL_FORM_BYTES,
                    files: bool = False) -> FormData:
    """The fields of a form post; 413 above `max_bytes`, 415 for another media type."""
    # No Content-Type at all: a post without fields (read as an empty urlencoded form).
    media_type = request.headers.get("content-type", URLENCODED).split(";")[0].strip().lower()
    accepted = (URLENCODED, MULTIPART) if files else (URLENCODED,)
    if media_type not in accepted:
        raise PageRefusal(415, "Form not readable",
                          f"This form must be sent as {' or '.join(accepted)}; the browser sent "
                          f"{media_type or 'no content type'}.")
    try:
        body = await read_body(request, max_bytes)
    except ProblemError as exc:
        raise PageRefusal(exc.status, "Form not readable", exc.detail) from None

    async def replay() -> AsyncGenerator[bytes, None]:
        yield body

    try:
        if media_type == MULTIPART:
            return await MultiPartParser(request.headers, replay(), max_files=1,
                                         max_fields=MAX_FIELDS, max_part_size=max_bytes).parse()
        return await FormParser(request.headers, replay(), max_fields=MAX_FIELDS,
                                max_part_size=max_bytes).parse()
    except MultiPartException as exc:
        raise PageRefusal(400, "Form not readable", f"The form could not be read: {exc.message}.") from None
