"""The upload page: same record as the API, every problem listed with what was typed, roles, caps."""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from pathlib import Path

import httpx
import pytest

from service.archive.keys import create_key
from tests.api.conftest import json_request, table_rows
from tests.api.pages_client import Browser, browsers, elements

MakeBrowser = Callable[..., Browser]
DEMO_CSV = Path(__file__).resolve().parents[2] / "sample_requests" / "vitamin_d3_softgel.csv"
DEMO_FIELDS = {"title": "Vitamin D3 softgel (invented demo)", "test": "NEW",
               "reference": "CURRENT", "baseline": "PLACEBO", "replicates": "400",
               "seed": "20261202", "interval": "percentile"}


@pytest.fixture
def make_browser(database_url: str) -> Iterator[MakeBrowser]:
    yield from browsers(database_url)


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def upload(browser: Browser, fields: dict[str, str], name: str, body: bytes,
           media_type: str = "text/csv") -> httpx.Response:
    data = {"csrf_token": browser.token("/upload"), **fields}
    return browser.post("/upload", data=data, files={"file": (name, body, media_type)})


def archived(browser: Browser) -> int:
    total: int = browser.app.state.archive.list(limit=1)[1]
    return total


def test_upload_of_the_demo_csv_matches_the_api(make_browser: MakeBrowser) -> None:
    """The demo CSV with the form's fields gives the record POST /v1/analyses gives the same CSV
    with the same query parameters: same inputs_sha256, same result (both go through
    service.intake.reading.read_request; inputs hash = SHA-256 of RFC 8785 JSON)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="bench-1", role="submit")
    browser.sign_in(key)
    sent = upload(browser, DEMO_FIELDS, DEMO_CSV.name, DEMO_CSV.read_bytes())
    assert sent.status_code == 303, sent.text[:2000]
    location = sent.headers["location"]
    assert location.startswith("/analyses/")
    record = browser.get("/v1" + location).json()
    api = browser.post("/v1/analyses", content=DEMO_CSV.read_bytes(), params=DEMO_FIELDS,
                       headers={**bearer(key), "content-type": "text/csv"}).json()
    assert record["inputs_sha256"] == api["inputs_sha256"]
    assert record["result"] == api["result"]
    assert record["submitter"] == "bench-1"
    page = browser.get(location)
    assert page.status_code == 200 and "Vitamin D3 softgel (invented demo)" in page.text


def test_upload_of_a_json_request_matches_the_api(make_browser: MakeBrowser) -> None:
    """A JSON request file gives POST /v1/analyses' inputs hash for the same body; form fields
    beside a JSON request are refused (a JSON request carries its settings inside)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="bench-1", role="submit")
    browser.sign_in(key)
    body = json.dumps(json_request()).encode()
    sent = upload(browser, {}, "request.json", body, "application/json")
    assert sent.status_code == 303
    record = browser.get("/v1" + sent.headers["location"]).json()
    api = browser.post("/v1/analyses", content=body,
                       headers={**bearer(key), "content-type": "application/json"}).json()
    assert record["inputs_sha256"] == api["inputs_sha256"]
    before = archived(browser)
    mixed = upload(browser, {"seed": "5"}, "request.json", body, "application/json")
    assert mixed.status_code == 422 and "CSV tables only" in mixed.text
    assert archived(browser) == before


def test_invalid_upload_lists_every_problem_and_keeps_what_was_typed(
    make_browser: MakeBrowser,
) -> None:
    """A table with a bad value on CSV line 3 and a bad setting: 422 (RFC 9110 §15.5.21), an error
    summary naming line 3 and its column and the field, every typed value kept, and nothing
    archived (GOV.UK Design System error summary pattern, common practice)."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="bench-1", role="submit")
    browser.sign_in(key)
    lines = DEMO_CSV.read_text().splitlines()
    cells = lines[2].split(",")
    cells[-1] = "lots"
    lines[2] = ",".join(cells)
    fields = {**DEMO_FIELDS, "confidence_level": "ninety", "title": 'Batch "7" <b>'}
    refused = upload(browser, fields, "bad.csv", ("\n".join(lines) + "\n").encode())
    assert refused.status_code == 422
    text = refused.text
    assert "line 3, column value" in text
    assert "field confidence_level" in text
    inputs = {attrs.get("name"): attrs.get("value") for tag, attrs in elements(text).tags
              if tag == "input"}
    assert inputs["confidence_level"] == "ninety"
    assert inputs["title"] == 'Batch "7" <b>'
    assert inputs["seed"] == "20261202"
    selected = [attrs.get("value") for tag, attrs in elements(text).tags
                if tag == "option" and "selected" in attrs]
    assert "percentile" in selected
    hrefs = {attrs.get("href") for tag, attrs in elements(text).tags if tag == "a"}
    assert {"#field-file", "#field-confidence_level"} <= hrefs
    assert archived(browser) == 0
    empty = upload(browser, DEMO_FIELDS, "", b"")
    assert empty.status_code == 422 and "choose the CSV table" in empty.text


def test_read_role_session_cannot_upload(make_browser: MakeBrowser) -> None:
    """A session of a read key gets 403 on the upload page and on the post (RFC 9110 §15.5.4),
    and nothing is archived."""
    browser = make_browser()
    key = create_key(browser.app.state.archive, label="viewer", role="read")
    browser.sign_in(key)
    assert browser.get("/upload").status_code == 403
    token = browser.token("/")
    refused = browser.post("/upload", data={"csrf_token": token, **DEMO_FIELDS},
                           files={"file": (DEMO_CSV.name, DEMO_CSV.read_bytes(), "text/csv")})
    assert refused.status_code == 403
    assert archived(browser) == 0


def test_upload_size_and_work_caps_are_the_apis(make_browser: MakeBrowser) -> None:
    """A form larger than max_body_bytes is 413 (RFC 9110 §15.5.14) and an analysis above
    max_work is 422 naming replicates, as on POST /v1/analyses (README, Limits)."""
    browser = make_browser(max_body_bytes=4096, max_work=1000)
    key = create_key(browser.app.state.archive, label="bench-1", role="submit")
    browser.sign_in(key)
    big = upload(browser, DEMO_FIELDS, DEMO_CSV.name, DEMO_CSV.read_bytes() * 3)
    assert big.status_code == 413
    rows = table_rows()
    small = "subject,period,sequence,treatment,metric,value\n" + "".join(
        f"{r['subject']},{r['period']},{r['sequence']},{r['treatment']},{r['metric']},{r['value']}\n"
        for r in rows)
    heavy = upload(browser, {"test": "T", "reference": "R", "baseline": "B", "replicates": "500"},
                   "t.csv", small.encode())
    assert heavy.status_code == 422
    assert "#field-replicates" in heavy.text
    assert archived(browser) == 0
