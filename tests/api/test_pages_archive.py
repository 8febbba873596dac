"""The archive index, the record page, session cookies on the GET API and CSRF on form posts."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import pytest

from service.archive.keys import create_key
from tests.api.conftest import json_request, table_rows
from tests.api.pages_client import Browser, Clock, browsers, elements

MakeBrowser = Callable[..., Browser]
HOSTILE = '</title><script>alert("t")</script><img src=x onerror=alert(1)>'


@pytest.fixture
def make_browser(database_url: str) -> Iterator[MakeBrowser]:
    yield from browsers(database_url)


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def post(browser: Browser, key: str, *, title: str = "", analyte: str = "",
         upper: float | None = None, seed: int = 7) -> dict[str, Any]:
    request = json_request(table_rows(seed=seed))
    request["study"] = {"title": title, "analyte": analyte}
    if upper is not None:
        request["settings"]["limits"] = {"lower": -upper, "upper": upper}
    response = browser.post("/v1/analyses", json=request, headers=bearer(key))
    assert response.status_code == 201, response.text
    record: dict[str, Any] = response.json()
    return record


def record_links(html: str) -> list[str]:
    return [attrs["href"] or "" for tag, attrs in elements(html).tags
            if tag == "a" and (attrs.get("href") or "").startswith("/analyses/")]


def ratio_verdict(record: dict[str, Any]) -> str:
    verdict: str = record["result"]["metrics"][0]["ratio_of_mean_differences"]["acceptance"]["verdict"]
    return verdict


def test_index_lists_newest_first_and_filters(make_browser: MakeBrowser) -> None:
    """GET / lists records newest first with their title, analyte, submitter, verdicts and the
    first 12 hex digits of the inputs hash; the filters narrow the list to the records whose
    archived JSON says so (the record itself is the reference for every value shown)."""
    clock = Clock()
    browser = make_browser(clock=clock)
    archive = browser.app.state.archive
    lab_a = create_key(archive, label="lab-a", role="submit")
    lab_b = create_key(archive, label="lab-b", role="submit")
    wide = post(browser, lab_a, title="Vitamin D3 softgel", analyte="25-OH-D", upper=0.5, seed=1)
    narrow = post(browser, lab_b, title="Iron tablet", analyte="ferritin", upper=0.001, seed=2)
    third = post(browser, lab_a, title="Zinc lozenge", analyte="zinc", seed=3)
    assert ratio_verdict(wide) == "within_limits"
    assert ratio_verdict(narrow) == "not_within_limits"

    browser.sign_in(lab_a)
    page = browser.get("/")
    assert page.status_code == 200
    assert record_links(page.text) == [f"/analyses/{r['id']}" for r in (third, narrow, wide)]
    for record in (wide, narrow, third):
        assert record["inputs_sha256"][:12] in page.text
        assert record["inputs_sha256"][12:20] not in page.text
    for word in ("Vitamin D3 softgel", "25-OH-D", "ferritin", "lab-a", "lab-b",
                 "within limits", "not within limits"):
        assert word in page.text

    def listed(**query: str) -> list[str]:
        response = browser.get("/", params=query)
        assert response.status_code == 200, response.text
        return record_links(response.text)

    assert listed(text="vitamin") == [f"/analyses/{wide['id']}"]
    assert listed(text="FERRITIN") == [f"/analyses/{narrow['id']}"]
    assert listed(verdict="not_within_limits") == [f"/analyses/{narrow['id']}"]
    assert listed(submitter="lab-a") == [f"/analyses/{third['id']}", f"/analyses/{wide['id']}"]
    assert listed(inputs_sha256=narrow["inputs_sha256"]) == [f"/analyses/{narrow['id']}"]
    assert len(listed(**{"from": wide["created_at"][:10], "to": third["created_at"][:10]})) == 3
    assert listed(**{"to": "2000-01-01"}) == []
    refused = browser.get("/", params={"from": "07/01/2030", "inputs_sha256": "abc"})
    assert refused.status_code == 422
    assert "YYYY-MM-DD" in refused.text and "64 hexadecimal digits" in refused.text
    assert 'value="07/01/2030"' in refused.text  # what was typed stays in the form


def test_index_pages(make_browser: MakeBrowser) -> None:
    """With a page size of 2, three records take two pages, linked newer → older; the filter
    text stays in the page links (RFC 3986 query)."""
    browser = make_browser(page_size=2)
    key = create_key(browser.app.state.archive, label="lab-a", role="submit")
    ids = [post(browser, key, title=f"Study {n}", seed=n)["id"] for n in range(3)]
    browser.sign_in(key)
    first = browser.get("/", params={"text": "study"})
    assert record_links(first.text) == [f"/analyses/{ids[2]}", f"/analyses/{ids[1]}"]
    assert "/?text=study&amp;page=2" in first.text
    second = browser.get("/", params={"text": "study", "page": "2"})
    assert record_links(second.text) == [f"/analyses/{ids[0]}"]
    assert "3 records, page 2 of 2" in second.text


def test_hostile_title_is_escaped_on_every_page(make_browser: MakeBrowser) -> None:
    """A title and analyte made of markup appear as text, never as elements: the pages hold no
    <script> or <img> element and no event-handler attribute, as html.parser tokenizes them
    (HTML Living Standard §13.1.2 escaping; the same check as tests/fuzz/test_hostile_text.py)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="lab-a", role="submit")
    record = post(browser, key, title=HOSTILE, analyte=HOSTILE + "\u202eRLO")
    browser.sign_in(key)
    for path in ("/", f"/analyses/{record['id']}", "/?text=" + "%3Cscript%3E"):
        page = browser.get(path)
        assert page.status_code == 200
        parsed = elements(page.text)
        assert not [tag for tag, _ in parsed.tags if tag in ("script", "img", "iframe")], path
        assert not [name for _, attrs in parsed.tags for name in attrs if name.startswith("on")]
        assert HOSTILE in "".join(parsed.text), path
        assert "\u202e" not in page.text and "[U+202E]" in page.text


def test_record_page_shows_facts_links_and_cautions(make_browser: MakeBrowser) -> None:
    """The record page names the study, the verdicts, the limits and methods used, links the
    report, bundle and JSON, and carries the caution of RULES.md (not a substitute for the
    protocol's analysis plan, a statistician's review or regulatory guidance)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="lab-a", role="read")
    submit = create_key(browser.app.state.archive, label="lab-s", role="submit")
    record = post(browser, submit, title="Vitamin D3 softgel", analyte="25-OH-D")
    browser.sign_in(key)
    page = browser.get(f"/analyses/{record['id']}")
    assert page.status_code == 200
    hrefs = {attrs.get("href") for tag, attrs in elements(page.text).tags if tag == "a"}
    base = f"/v1/analyses/{record['id']}"
    assert {base, base + "/report", base + "/bundle"} <= hrefs
    for text in ("Vitamin D3 softgel", "25-OH-D", record["inputs_sha256"], "lab-s",
                 "statistical analysis plan", "qualified statistician", "fix them in advance",
                 "acceptance limits for θ: [−0.20, +0.20]", "interval method: BCa"):
        assert text in page.text, text
    # A read-role session gets no reproduction or share-link buttons, and no verification.
    assert "/reproduction" not in page.text and "Make a share link" not in page.text
    assert "Archive verification" not in page.text
    for path in (base, base + "/report", base + "/bundle"):
        assert browser.get(path).status_code == 200, path
    assert browser.get("/analyses/" + "0" * 32).status_code == 404


def test_session_cookie_works_on_get_endpoints_only(make_browser: MakeBrowser) -> None:
    """GET /v1/analyses, /v1/analyses/{id}, /report and /bundle take the session cookie with the
    key's role; state-changing /v1 calls take Bearer only, so the cookie alone is 401 there
    (RFC 6750 §2.1; the issue's rule)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="lab-s", role="submit")
    record = post(browser, key)
    anonymous = make_browser(app=browser.app)
    base = f"/v1/analyses/{record['id']}"
    for path in ("/v1/analyses", base, base + "/report", base + "/bundle"):
        assert anonymous.get(path).status_code == 401
    browser.sign_in(key)
    for path in ("/v1/analyses", base, base + "/report", base + "/bundle"):
        assert browser.get(path).status_code == 200, path
    assert browser.post("/v1/analyses", json=json_request()).status_code == 401
    assert browser.post(base + "/reproduction").status_code == 401
    assert browser.post(base + "/share", json={}).status_code == 401


def test_reproduction_button_and_admin_verification(make_browser: MakeBrowser) -> None:
    """A submit session reproduces the record from the page (the same comparison as POST
    /v1/analyses/{id}/reproduction, README "Archive checks"); an admin session also sees the
    hash-chain verification; a read session's post is 403 (RFC 9110 §15.5.4)."""
    browser = make_browser()
    archive = browser.app.state.archive
    submit = create_key(archive, label="lab-s", role="submit")
    admin = create_key(archive, label="boss", role="admin")
    reader = create_key(archive, label="lab-r", role="read")
    record = post(browser, submit)
    page_path = f"/analyses/{record['id']}"

    browser.sign_in(submit)
    token = browser.token(page_path)
    done = browser.post(page_path + "/reproduction", data={"csrf_token": token})
    assert done.status_code == 200
    assert "the result was reproduced" in done.text
    api = browser.post(f"/v1/analyses/{record['id']}/reproduction", headers=bearer(submit))
    assert api.json()["reproduced"] is True

    browser.sign_in(admin)
    page = browser.get(page_path)
    assert "Archive verification" in page.text and "is intact" in page.text

    read = make_browser(app=browser.app)
    read.sign_in(reader)
    refused = read.post(page_path + "/reproduction", data={"csrf_token": read.token(page_path)})
    assert refused.status_code == 403


def test_form_posts_need_the_token_and_this_origin(make_browser: MakeBrowser) -> None:
    """A form post without the session's csrf_token, with another token, or from another origin
    is 403 and does nothing (OWASP CSRF Prevention Cheat Sheet, synchronizer token and Origin
    check, common practice; Origin: RFC 6454 §7)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="lab-s", role="submit")
    record = post(browser, key)
    browser.sign_in(key)
    path = f"/analyses/{record['id']}/share-links"
    token = browser.token(f"/analyses/{record['id']}")
    assert browser.post(path, data={"expires_in_hours": "5"}).status_code == 403
    assert browser.post(path, data={"expires_in_hours": "5", "csrf_token": "a" * 43}).status_code == 403
    foreign = browser.post(path, data={"expires_in_hours": "5", "csrf_token": token},
                           headers={"origin": "http://evil.example"})
    assert foreign.status_code == 403
    assert browser.post("/logout", data={}).status_code == 403
    page = browser.get(f"/analyses/{record['id']}")
    assert "No share link was made" in page.text
    made = browser.post(path, data={"expires_in_hours": "5", "csrf_token": token},
                        headers={"origin": "http://testserver"})
    assert made.status_code == 200 and "/shared/" in made.text


def test_every_page_sends_the_security_headers(make_browser: MakeBrowser) -> None:
    """Every page: a CSP with default-src 'none', no script source, frame-ancestors 'none' and no
    external origin; X-Frame-Options DENY; nosniff; no-store (W3C CSP Level 3; RFC 7034; Fetch
    §3.6.1; RFC 9111 §5.2.2.5)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="lab-s", role="submit")
    record = post(browser, key)
    browser.sign_in(key)
    for path in ("/", "/upload", f"/analyses/{record['id']}", "/login", "/analyses/x"):
        response = browser.get(path)
        assert response.headers["content-type"].startswith("text/html"), path
        directives = {part.split()[0]: part.split()[1:]
                      for part in response.headers["content-security-policy"].split(";")}
        assert directives["default-src"] == ["'none'"]
        assert "script-src" not in directives
        assert directives["frame-ancestors"] == ["'none'"]
        assert not [s for sources in directives.values() for s in sources if "://" in s or s == "*"]
        assert response.headers["x-frame-options"] == "DENY"
        assert response.headers["x-content-type-options"] == "nosniff"
        assert response.headers["cache-control"] == "no-store"
        hosts = [value for _, attrs in elements(response.text).tags
                 for name, value in attrs.items()
                 if name in ("href", "src", "action") and value and "//" in value]
        assert hosts == [], (path, hosts)
