"""The planning page in a browser (issue on planning, item 5): form → size, power table, curve."""

from __future__ import annotations

import re
from urllib.parse import parse_qs, urlparse

from service.stats.planning import plan, plan_to_json
from tests.api.conftest import ApiClient, json_request


def test_the_page_answers_what_the_engine_answers(client: ApiClient) -> None:
    """2×2 at CV 30 %: the total shown is the engine's (40 at ratio 0.95, 80 % power — published
    tables, from memory), with the power table, an inline SVG curve and the cautions."""
    page = client.get("/planning", params={"design": "two_by_two", "cv": "0.30"})
    assert page.status_code == 200, page.text
    total = plan_to_json(plan(design="two_by_two", cv=0.30))["sample_size"]["total"]
    assert total == 40
    assert re.search(r"Sample size \(total\)</th><td class=\"num\">40<", page.text)
    assert "<svg" in page.text and "<script" not in page.text
    assert "statistician" in page.text


def test_bad_figures_are_listed_and_kept_and_nothing_breaks(client: ApiClient) -> None:
    """GOV.UK-style refusal (STYLE.md): 422, a summary linking to each field, what was typed kept,
    and user text escaped."""
    page = client.get("/planning", params={"design": "two_by_two", "cv": "thirty",
                                           "ratio": "1.4", "source": "<b>x</b>"})
    assert page.status_code == 422
    assert 'href="#field-cv"' in page.text and 'value="thirty"' in page.text
    assert "<b>x</b>" not in page.text and "&lt;b&gt;x&lt;/b&gt;" in page.text
    page = client.get("/planning", params={"design": "two_by_two", "cv": "0.3", "ratio": "1.4"})
    assert page.status_code == 422 and 'href="#field-ratio"' in page.text


def test_a_record_page_link_fills_in_the_archived_cv(client: ApiClient) -> None:
    """"Plan the next study" on a record: the form opens with the record's CV and design."""
    record = client.post("/v1/analyses", json=json_request()).json()
    moved = client.get(f"/analyses/{record['id']}/plan")
    assert moved.status_code == 303
    query = parse_qs(urlparse(moved.headers["location"]).query)
    cv = record["result"]["metrics"][0]["average_bioequivalence"]["within_subject_cv_percent"]
    assert float(query["cv"][0]) == float(f"{cv / 100:.6g}")
    assert query["source"] == [record["id"]] and query["design"] == ["two_by_two"]
    assert client.get(moved.headers["location"]).status_code == 200
    assert f"/analyses/{record['id']}/plan" in client.get(f"/analyses/{record['id']}").text
