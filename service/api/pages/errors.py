"""How a page route says "go elsewhere" or "refused": exceptions that become HTML responses."""

from __future__ import annotations

from collections.abc import Mapping


class PageRedirect(Exception):
    """Answer with 303 See Other to `location` (a path of this service)."""

    def __init__(self, location: str) -> None:
        super().__init__(location)
        self.location = location


class PageRefusal(Exception):
    """Answer with an HTML page that says, in plain words, why the request was refused."""

    def __init__(
        self, status: int, heading: str, message: str, headers: Mapping[str, str] | None = None
    ) -> None:
        super().__init__(message)
        self.status = status
        self.heading = heading
        self.message = message
        self.headers = dict(headers or {})
