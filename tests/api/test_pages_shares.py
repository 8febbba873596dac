"""Share links: POST /v1/analyses/{id}/share, GET /shared/TOKEN, expiry, ending and revocation."""

from __future__ import annotations

import base64
import hashlib
from collections.abc import Callable, Iterator
from datetime import timedelta
from typing import Any

import pytest
from sqlalchemy import select

from service.archive.keys import create_key, revoke_key
from service.archive.sessions import timestamp
from service.archive.store import share_links
from tests.api.conftest import json_request
from tests.api.pages_client import Browser, Clock, browsers, elements

MakeBrowser = Callable[..., Browser]


@pytest.fixture
def make_browser(database_url: str) -> Iterator[MakeBrowser]:
    yield from browsers(database_url)


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def setup(make_browser: MakeBrowser, clock: Clock) -> tuple[Browser, dict[str, str], str]:
    browser = make_browser(clock=clock)
    archive = browser.app.state.archive
    keys = {role: create_key(archive, label=f"{role}-key", role=role)
            for role in ("read", "submit")}
    keys["spare"] = create_key(archive, label="spare-key", role="read")
    made = browser.post("/v1/analyses", json=json_request(), headers=bearer(keys["submit"]))
    assert made.status_code == 201
    return browser, keys, made.json()["id"]


def share(browser: Browser, key: str, record_id: str, body: Any = None) -> Any:
    kwargs: dict[str, Any] = {"headers": bearer(key)}
    if body is not None:
        kwargs["json"] = body
    return browser.post(f"/v1/analyses/{record_id}/share", **kwargs)


def test_share_link_shows_the_report_without_sign_in(make_browser: MakeBrowser) -> None:
    """201 {"url": "/shared/TOKEN", "expires_at"} with the default 72 h; the token holds at least
    128 random bits (RFC 4648 §5 base64url; OWASP Session Management Cheat Sheet, common
    practice) and the archive keeps only its SHA-256 (FIPS 180-4 via hashlib); anyone opening the
    link gets the very report bytes of GET /v1/analyses/{id}/report."""
    clock = Clock()
    browser, keys, record_id = setup(make_browser, clock)
    made = share(browser, keys["submit"], record_id)
    assert made.status_code == 201, made.text
    body = made.json()
    assert body["url"].startswith("/shared/")
    assert body["expires_at"] == timestamp(clock.now + timedelta(hours=72))
    token = body["url"].removeprefix("/shared/")
    assert len(base64.urlsafe_b64decode(token + "=" * (-len(token) % 4))) >= 16
    with browser.app.state.archive.engine.connect() as conn:
        rows = [dict(r._mapping) for r in conn.execute(select(share_links))]
    assert rows[0]["token_sha256"] == hashlib.sha256(token.encode()).hexdigest()
    assert not any(token in str(value) for row in rows for value in row.values())

    stranger = make_browser(app=browser.app)
    shown = stranger.get(body["url"])
    assert shown.status_code == 200
    report = browser.get(f"/v1/analyses/{record_id}/report", headers=bearer(keys["read"]))
    assert shown.content == report.content
    assert shown.headers["cache-control"] == "no-store"
    assert "script-src" not in shown.headers["content-security-policy"]


def test_share_link_expiry_and_bounds(make_browser: MakeBrowser) -> None:
    """A link works until expires_at and answers 410 Gone from then on (RFC 9110 §15.5.11), never
    the report; expires_in_hours is 1..720 (422 outside, or not an integer); an unknown token is
    404."""
    clock = Clock()
    browser, keys, record_id = setup(make_browser, clock)
    url = share(browser, keys["submit"], record_id, {"expires_in_hours": 2}).json()["url"]
    stranger = make_browser(app=browser.app)
    clock.advance(hours=1, minutes=59)
    assert stranger.get(url).status_code == 200
    clock.advance(minutes=1)
    gone = stranger.get(url)
    assert gone.status_code == 410 and "<svg" not in gone.text and record_id not in gone.text
    for hours in (0, 721, "72", 2.5, True):
        assert share(browser, keys["submit"], record_id, {"expires_in_hours": hours}).status_code == 422
    assert share(browser, keys["submit"], record_id, {"other": 1}).status_code == 422
    assert share(browser, keys["submit"], record_id, {"expires_in_hours": 720}).status_code == 201
    assert stranger.get("/shared/" + "A" * 43).status_code == 404
    assert stranger.get("/shared/short").status_code == 404


def test_share_needs_submit_or_admin_bearer(make_browser: MakeBrowser) -> None:
    """Making a link changes state: Bearer of a submit or admin key (read: 403, none: 401;
    RFC 9110 §15.5.2, §15.5.4); an unknown record is 404."""
    clock = Clock()
    browser, keys, record_id = setup(make_browser, clock)
    assert share(browser, keys["read"], record_id).status_code == 403
    assert browser.post(f"/v1/analyses/{record_id}/share").status_code == 401
    assert share(browser, keys["submit"], "f" * 32).status_code == 404


def test_revoking_the_key_that_made_a_link_kills_it(make_browser: MakeBrowser) -> None:
    """A link lives only while the key that made it is active (the issue's rule): after `keys
    revoke`, 410."""
    clock = Clock()
    browser, keys, record_id = setup(make_browser, clock)
    url = share(browser, keys["submit"], record_id).json()["url"]
    stranger = make_browser(app=browser.app)
    assert stranger.get(url).status_code == 200
    revoke_key(browser.app.state.archive, "submit-key")
    assert stranger.get(url).status_code == 410


def test_record_page_lists_links_and_ends_them(make_browser: MakeBrowser) -> None:
    """Every link of a record is listed on its page with its expiry and state; a submit session
    makes a link from the page (shown once) and ends one, after which it is 410."""
    clock = Clock()
    browser, keys, record_id = setup(make_browser, clock)
    made = share(browser, keys["submit"], record_id, {"expires_in_hours": 5}).json()
    browser.sign_in(keys["submit"])
    page_path = f"/analyses/{record_id}"
    page = browser.get(page_path)
    assert made["expires_at"][:16].replace("T", " ") in page.text
    assert "active" in page.text

    token = browser.token(page_path)
    created = browser.post(page_path + "/share-links",
                           data={"csrf_token": token, "expires_in_hours": "3"})
    assert created.status_code == 200
    shown = [attrs.get("value") for tag, attrs in elements(created.text).tags
             if tag == "input" and attrs.get("id") == "new-link"]
    assert shown and (shown[0] or "").startswith("http://testserver/shared/")
    new_url = (shown[0] or "").removeprefix("http://testserver")
    stranger = make_browser(app=browser.app)
    assert stranger.get(new_url).status_code == 200
    assert browser.get(page_path).text.count("End this link") == 2
    bad = browser.post(page_path + "/share-links", data={"csrf_token": token, "expires_in_hours": "9999"})
    assert bad.status_code == 422 and 'value="9999"' in bad.text

    forms = [attrs.get("action") or "" for tag, attrs in elements(browser.get(page_path).text).tags
             if tag == "form" and (attrs.get("action") or "").endswith("/end")]
    for action in forms:
        ended = browser.post(action, data={"csrf_token": token})
        assert ended.status_code == 303
    assert stranger.get(new_url).status_code == 410
    assert stranger.get(made["url"]).status_code == 410
    assert browser.get(page_path).text.count("ended") >= 2


def test_open_mode_links_end_when_the_service_stops_running_open(make_browser: MakeBrowser) -> None:
    """A link made while the service ran open names no key; it stops working once a key exists
    (the service no longer runs open, README "Access")."""
    browser = make_browser()
    made = browser.post("/v1/analyses", json=json_request())
    assert made.status_code == 201
    link = browser.post(f"/v1/analyses/{made.json()['id']}/share", json={"expires_in_hours": 1})
    assert link.status_code == 201
    url = link.json()["url"]
    assert browser.get(url).status_code == 200
    create_key(browser.app.state.archive, label="first-key", role="read")
    assert browser.get(url).status_code == 410
