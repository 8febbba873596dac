"""A real browser (Debian's chromium, driven by Playwright) against a real `python -m service
serve` on a loopback port with a temporary SQLite archive.

Skipped locally when chromium or Playwright is missing; with CI=true that is a failure instead,
as tests/conftest.py does for PostgreSQL. Playwright never downloads a browser here: it starts
the system chromium by its path.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import pytest

from tests.system.servers import ROOT, Server, start_server

CHROMIUM_VARIABLE = "BIOPARITY_TEST_CHROMIUM"
CHROMIUM_ARGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
]


def chromium_path() -> str:
    """The system chromium, or skip (locally) / fail (CI=true)."""
    path = os.environ.get(CHROMIUM_VARIABLE) or shutil.which("chromium") or ""
    problem = None
    if not path or not Path(path).exists():
        problem = "no chromium on this machine (apt-get install chromium)"
    else:
        try:
            import playwright.sync_api  # noqa: F401
        except ImportError:
            problem = "the playwright package is not installed (pip install -e '.[test]')"
    if problem is not None:
        if os.environ.get("CI", "").lower() in ("true", "1", "yes"):
            pytest.fail(f"CI=true but {problem}: the browser tests cannot run")
        pytest.skip(problem)
    return path


def create_key(database_url: str, label: str, role: str) -> str:
    done = subprocess.run(
        [sys.executable, "-m", "service", "keys", "create", "--db", database_url,
         "--role", role, "--label", label],
        cwd=ROOT, capture_output=True, text=True, timeout=120,
        env={k: v for k, v in os.environ.items() if not k.startswith("BIOPARITY_")},
    )
    assert done.returncode == 0, done.stdout + done.stderr
    return done.stdout.strip().splitlines()[-1]


@dataclass
class Service:
    server: Server
    keys: dict[str, str]

    @property
    def base_url(self) -> str:
        return self.server.base_url


@pytest.fixture(scope="module")
def service(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Service]:
    chromium_path()
    folder = tmp_path_factory.mktemp("browser")
    database_url = f"sqlite:///{folder / 'archive.sqlite3'}"
    keys = {"submit": create_key(database_url, "bench-1", "submit"),
            "read": create_key(database_url, "viewer-1", "read")}
    server = start_server(database_url, folder / "server.log")
    try:
        yield Service(server, keys)
    finally:
        server.kill()


@dataclass
class Watched:
    """A page whose requests to any other origin are aborted and listed, with every message the
    browser logs about its Content-Security-Policy."""

    page: Any
    origin: str
    outside: list[str] = field(default_factory=list)
    policy_messages: list[str] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)


@pytest.fixture(scope="module")
def chromium() -> Iterator[Any]:
    path = chromium_path()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=path, args=CHROMIUM_ARGS)
        try:
            yield browser
        finally:
            browser.close()


@pytest.fixture
def watched(chromium: Any, service: Service) -> Iterator[Watched]:
    context = chromium.new_context(viewport={"width": 1280, "height": 800})
    page = context.new_page()
    parts = urlsplit(service.base_url)
    origin = f"{parts.scheme}://{parts.netloc}"
    seen = Watched(page, origin)

    def route(route: Any) -> None:
        url = route.request.url
        target = urlsplit(url)
        if target.scheme in ("data", "blob") or f"{target.scheme}://{target.netloc}" == origin:
            route.continue_()
        else:
            seen.outside.append(url)
            route.abort()

    context.route("**/*", route)

    def on_console(message: Any) -> None:
        if "Content Security Policy" in message.text:
            seen.policy_messages.append(message.text)

    page.on("console", on_console)
    page.on("pageerror", lambda error: seen.errors.append(str(error)))
    try:
        yield seen
    finally:
        context.close()
