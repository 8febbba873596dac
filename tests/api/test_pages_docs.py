"""The API reference pages /docs and /redoc: every asset from this service, scripts never inline."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path

import fastapi_offline
import pytest

from tests.api.pages_client import Browser, browsers, elements, policy

MakeBrowser = Callable[..., Browser]
PACKAGE_ASSETS = Path(fastapi_offline.__file__).resolve().parent / "static"


@pytest.fixture
def make_browser(tmp_path: Path) -> Iterator[MakeBrowser]:
    yield from browsers(f"sqlite:///{tmp_path / 'archive.sqlite3'}")


def references(html: str) -> list[str]:
    return [value for _, attrs in elements(html).tags for name, value in attrs.items()
            if name in ("src", "href", "spec-url", "action") and value is not None]


@pytest.mark.parametrize("path", ["/docs", "/redoc"])
def test_docs_pages_reference_only_this_service(make_browser: MakeBrowser, path: str) -> None:
    """Every src/href of the docs pages is a path on this service or a data: URL (RFC 3986 §4.2
    relative references), and each one answers 200; the bundles are byte for byte the files of
    the installed fastapi-offline package."""
    browser = make_browser()
    page = browser.get(path)
    assert page.status_code == 200
    found = references(page.text)
    assert found
    for reference in found:
        if reference.startswith("data:"):
            continue
        assert reference.startswith("/") and not reference.startswith("//"), reference
        assert browser.get(reference).status_code == 200, reference
        if reference.startswith("/assets/vendor/"):
            packaged = PACKAGE_ASSETS / reference.removeprefix("/assets/vendor/")
            assert browser.get(reference).content == packaged.read_bytes()


def test_swagger_page_allows_scripts_only_from_this_service(make_browser: MakeBrowser) -> None:
    """/docs: no inline <script> (every script element has a src), and a CSP whose script-src is
    'self' alone, without 'unsafe-inline' or 'unsafe-eval' (W3C CSP Level 3 §6.1.1)."""
    browser = make_browser()
    page = browser.get("/docs")
    scripts = [attrs for tag, attrs in elements(page.text).tags if tag == "script"]
    assert scripts and all(attrs.get("src") for attrs in scripts)
    directives = policy(page)
    assert directives["script-src"] == ["'self'"]
    assert directives["default-src"] == ["'none'"] and directives["frame-ancestors"] == ["'none'"]
    init = browser.get("/assets/swagger-init.js")
    assert init.headers["content-type"].startswith("text/javascript")
    assert '"url": "/openapi.json"' in init.text and '"validatorUrl": null' in init.text


def test_redoc_policy_adds_only_worker_and_styles(make_browser: MakeBrowser) -> None:
    """/redoc may build its search worker from a blob: URL and write <style> elements; scripts
    still come from 'self' only, and no source names another origin (W3C CSP Level 3)."""
    browser = make_browser()
    directives = policy(browser.get("/redoc"))
    assert directives["script-src"] == ["'self'"]
    assert directives["worker-src"] == ["blob:"]
    assert not [s for sources in directives.values() for s in sources if "://" in s or s == "*"]
