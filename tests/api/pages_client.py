"""A browser-like client for the page tests: keeps cookies, reads form tokens, moves the clock.

Requests go through httpx's ASGITransport as in tests/api/conftest.py, from a chosen client
address (the sign-in limit counts per address); redirects are not followed, so every 303 shows.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager
from datetime import UTC, datetime, timedelta
from functools import partial
from html.parser import HTMLParser
from typing import Any

import anyio.from_thread
import httpx
from fastapi import FastAPI

from service.api.app import create_app
from service.api.settings import ServiceSettings

START = datetime(2030, 1, 7, 9, 0, 0, tzinfo=UTC)
_TOKEN = re.compile(r'name="csrf_token" value="([^"]+)"')


class Clock:
    """The app's clock, moved by hand."""

    def __init__(self, now: datetime = START) -> None:
        self.now = now

    def __call__(self) -> datetime:
        return self.now

    def advance(self, **delta: float) -> None:
        self.now += timedelta(**delta)


class Browser:
    def __init__(self, app: FastAPI, address: str = "192.0.2.10") -> None:
        self.app = app
        self._portal_context: AbstractContextManager[anyio.from_thread.BlockingPortal] = (
            anyio.from_thread.start_blocking_portal()
        )
        self._portal = self._portal_context.__enter__()
        transport = httpx.ASGITransport(app=app, client=(address, 50000))
        self._client = httpx.AsyncClient(transport=transport, base_url="http://testserver")

    @property
    def cookies(self) -> httpx.Cookies:
        return self._client.cookies

    def request(self, method: str, url: str, **kwargs: Any) -> httpx.Response:
        return self._portal.call(partial(self._client.request, method, url, **kwargs))

    def get(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("GET", url, **kwargs)

    def post(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("POST", url, **kwargs)

    def token(self, path: str) -> str:
        """The csrf_token of the first form on the page at `path`."""
        page = self.get(path)
        assert page.status_code == 200, (path, page.status_code, page.text[:500])
        return form_token(page.text)

    def sign_in(self, key: str) -> httpx.Response:
        return self.post("/login", data={"key": key, "csrf_token": self.token("/login")})

    def close(self) -> None:
        self._portal.call(self._client.aclose)
        self._portal_context.__exit__(None, None, None)


def form_token(html: str) -> str:
    found = _TOKEN.search(html)
    assert found is not None, "no csrf_token on the page"
    return found.group(1)


def browsers(database_url: str) -> Iterator[Callable[..., Browser]]:
    """Body of a fixture: build browsers over fresh apps on one archive; close them all after."""
    opened: list[Browser] = []
    apps: list[FastAPI] = []

    def make(address: str = "192.0.2.10", app: FastAPI | None = None, clock: Clock | None = None,
             **overrides: Any) -> Browser:
        if app is None:
            app = create_app(ServiceSettings(database_url=database_url, **overrides))
            app.state.clock = clock or Clock()
            apps.append(app)
        browser = Browser(app, address)
        opened.append(browser)
        return browser

    yield make
    for browser in opened:
        browser.close()
    for app in apps:
        app.state.archive.close()


class Elements(HTMLParser):
    """Start tags and their attributes, as a browser's tokenizer sees them (html.parser)."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def elements(html: str) -> Elements:
    parser = Elements()
    parser.feed(html)
    parser.close()
    return parser


def policy(response: httpx.Response) -> dict[str, list[str]]:
    """The Content-Security-Policy header as directive → sources (W3C CSP Level 3 §2.2 syntax)."""
    text = response.headers["content-security-policy"]
    return {part.split()[0]: part.split()[1:] for part in text.split(";") if part.strip()}
