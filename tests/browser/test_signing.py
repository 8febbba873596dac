"""The signing flow in a real browser (Chromium through Playwright) against `bioparity serve`.

Skipped when Playwright or a Chromium executable is missing.
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.archive.keys import create_key
from service.archive.store import Archive
from tests.system.servers import Server, small_request, start_server

sync_api = pytest.importorskip("playwright.sync_api")
CHROMIUM = os.environ.get("BIOPARITY_TEST_CHROMIUM") or shutil.which("chromium") or shutil.which(
    "chromium-browser")


@pytest.fixture
def served(tmp_path: Path) -> Iterator[tuple[Server, dict[str, str], dict[str, Any]]]:
    url = f"sqlite:///{tmp_path / 'browser.sqlite3'}"
    archive = Archive.create(url)
    try:
        keys = {
            "submit": create_key(archive, label="lab-7", role="submit"),
            "review": create_key(archive, label="rev-1", role="review",
                                 printed_name="Rosa Reviewer"),
        }
    finally:
        archive.close()
    server = start_server(url, tmp_path / "server.log")
    try:
        response = httpx.post(server.base_url + "/v1/analyses", json=small_request(5),
                              headers={"Authorization": f"Bearer {keys['submit']}"}, timeout=120)
        assert response.status_code == 201, response.text
        yield server, keys, response.json()
    finally:
        server.kill()


@pytest.fixture
def page() -> Iterator[Any]:
    if CHROMIUM is None:
        pytest.skip("no Chromium executable (set BIOPARITY_TEST_CHROMIUM)")
    with sync_api.sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=CHROMIUM, args=["--no-sandbox"])
        try:
            yield browser.new_page()
        finally:
            browser.close()


def test_sign_a_record_in_the_browser(
    served: tuple[Server, dict[str, str], dict[str, Any]], page: Any
) -> None:
    """A reviewer signs in, opens the record page, and signs with the key typed again: a wrong
    key is refused with a message at the top that links to the key field and keeps the comment;
    the right key gives the signature, shown on the page with the printed name (21 CFR
    11.50(a), 11.200(a)(1); GOV.UK error summary pattern; POST-redirect-GET, RFC 9110
    §15.4.4). Plain forms: no script runs on the pages."""
    server, keys, record = served
    page.goto(server.base_url + "/login")
    page.fill("#field-key", keys["review"])
    with page.expect_navigation():
        page.click("button:has-text('Sign in')")
    assert "Signed in with the key rev-1" in page.inner_text("header"), page.inner_text("main")
    page.goto(f"{server.base_url}/analyses/{record['id']}")
    assert "Nobody has signed this record yet." in page.inner_text("main")

    page.check("#meaning-approved")
    page.fill("#field-comment", "Table checked against the source file")
    page.fill("#field-signing_key", keys["submit"])
    with page.expect_navigation():
        page.click("button:has-text('Sign this record')")
    summary = page.locator(".problems")
    assert "is not the key 'rev-1' you signed in with" in summary.inner_text()
    assert summary.locator("a").get_attribute("href") == "#field-signing_key"
    assert page.input_value("#field-comment") == "Table checked against the source file"
    assert page.is_checked("#meaning-approved")

    page.fill("#field-signing_key", keys["review"])
    page.click("button:has-text('Sign this record')")
    page.wait_for_url(f"**/analyses/{record['id']}#signatures")
    table = page.locator("section[aria-labelledby='signatures'] table").inner_text()
    assert "Rosa Reviewer" in table and "approved" in table
    assert "Table checked against the source file" in table
    assert "approved" in page.locator("section[aria-labelledby='signatures'] p strong").first.inner_text()

    listed = httpx.get(f"{server.base_url}/v1/analyses/{record['id']}/signatures",
                       headers={"Authorization": f"Bearer {keys['review']}"}, timeout=30).json()
    assert [(s["signer"], s["meaning"]) for s in listed["signatures"]] == [("rev-1", "approved")]
    page.goto(server.base_url + "/")
    row = page.locator(f"tr:has(a[href='/analyses/{record['id']}'])")
    assert row.locator("td.status").inner_text() == "approved"
