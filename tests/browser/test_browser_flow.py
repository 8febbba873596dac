"""A bench scientist's day in a real browser: sign in, upload the demo CSV, read the record and
its report, sign out; and the API reference rendering with no network. Every request to another
origin is aborted and counted: the count must be 0."""

from __future__ import annotations

import re
from pathlib import Path

import httpx

from tests.browser.conftest import Service, Watched

DEMO_CSV = Path(__file__).resolve().parents[2] / "sample_requests" / "vitamin_d3_softgel.csv"
TITLE = "Vitamin D3 softgel, new line (invented demo)"
WAIT_MS = 30_000


def test_sign_in_upload_record_report_sign_out(watched: Watched, service: Service) -> None:
    """The whole task by keyboard and plain forms, no script on our pages: the record page shows
    the uploaded study with the same inputs hash that the API reports for the same CSV and query
    (service.intake.reading.read_request; SHA-256 of RFC 8785 JSON), the report opens from it, and
    after sign-out the archive asks for sign-in again."""
    page = watched.page
    base = service.base_url
    page.goto(base + "/", wait_until="load")
    assert page.url.startswith(base + "/login")

    # Keyboard only: Tab to the key field, type, Enter (HTML Living Standard §6.6 focus).
    for _ in range(20):
        page.keyboard.press("Tab")
        if page.evaluate("document.activeElement && document.activeElement.name") == "key":
            break
    else:
        raise AssertionError("the key field cannot be reached with Tab")
    page.keyboard.type(service.keys["submit"])
    with page.expect_navigation(wait_until="load"):
        page.keyboard.press("Enter")
    assert page.url == base + "/", page.locator("main").inner_text()
    assert page.locator("h1").inner_text() == "Archive"

    page.get_by_role("link", name="New analysis").click()
    page.wait_for_url(base + "/upload")
    page.get_by_label("Table or request file").set_input_files(str(DEMO_CSV))
    fields = {"Title": TITLE, "Test treatment": "NEW", "Reference treatment": "CURRENT",
              "Baseline or placebo treatment (if any)": "PLACEBO", "Bootstrap replicates": "400",
              "Seed of the resampling": "20261202"}
    for label, value in fields.items():
        page.get_by_label(label, exact=True).fill(value)
    with page.expect_navigation(wait_until="load", timeout=WAIT_MS * 4):
        page.get_by_role("button", name="Analyse and archive").click()
    assert re.fullmatch(re.escape(base) + r"/analyses/[0-9a-f]{32}", page.url), page.url
    assert page.locator("h1").inner_text() == TITLE
    record_id = page.url.rsplit("/", 1)[1]

    api = httpx.post(
        base + "/v1/analyses", content=DEMO_CSV.read_bytes(), timeout=120,
        params={"title": TITLE, "test": "NEW", "reference": "CURRENT", "baseline": "PLACEBO",
                "replicates": "400", "seed": "20261202"},
        headers={"content-type": "text/csv",
                 "authorization": f"Bearer {service.keys['submit']}"},
    ).json()
    assert api["inputs_sha256"] in page.content()
    assert page.get_by_text("statistical analysis plan").first.is_visible()

    # A phone's width: the page itself never scrolls sideways (tables scroll in their box).
    page.set_viewport_size({"width": 375, "height": 740})
    assert page.evaluate("document.documentElement.scrollWidth") <= 375
    page.set_viewport_size({"width": 1280, "height": 800})

    page.get_by_role("link", name="The audit report (HTML)").click()
    page.wait_for_url(f"{base}/v1/analyses/{record_id}/report")
    assert TITLE in page.content()

    page.goto(f"{base}/analyses/{record_id}", wait_until="load")
    with page.expect_navigation(wait_until="load"):
        page.get_by_role("button", name="Sign out").click()
    assert page.url == base + "/login"
    page.goto(base + "/", wait_until="load")
    assert page.url.startswith(base + "/login")
    report = page.goto(f"{base}/v1/analyses/{record_id}/report")
    assert report is not None and report.status == 401

    assert watched.outside == []
    assert watched.policy_messages == []
    assert watched.errors == []


def test_swagger_docs_render_every_operation_offline(watched: Watched, service: Service) -> None:
    """/docs lays out one block per operation of the service's OpenAPI document (OpenAPI 3.1
    paths object) with no request leaving the service and no CSP violation."""
    spec = httpx.get(service.base_url + "/openapi.json", timeout=30).json()
    operations = [(method.upper(), path) for path, methods in spec["paths"].items()
                  for method in methods]
    page = watched.page
    page.goto(service.base_url + "/docs", wait_until="load")
    page.wait_for_selector(".opblock", timeout=WAIT_MS)
    assert page.locator(".opblock").count() == len(operations)
    shown = page.locator(".opblock-summary-path").all_inner_texts()
    assert sorted(p.replace("\u200b", "") for p in shown) == sorted(p for _, p in operations)
    assert watched.outside == []
    assert watched.policy_messages == []
    assert watched.errors == []


def test_redoc_renders_offline(watched: Watched, service: Service) -> None:
    """/redoc lists the operations with no request leaving the service. ReDoc's bundle adds a
    credit logo from its maker's site; the page's CSP (img-src 'self' data:) blocks it before any
    network request, so the only CSP message allowed is about that image."""
    spec = httpx.get(service.base_url + "/openapi.json", timeout=30).json()
    page = watched.page
    page.goto(service.base_url + "/redoc", wait_until="load")
    page.wait_for_selector("[data-section-id^='operation/']", timeout=WAIT_MS)
    listed = page.locator("[data-section-id^='operation/']").count()
    assert listed == sum(len(methods) for methods in spec["paths"].values())
    assert watched.outside == []
    assert all("img-src" in message and "logo" in message for message in watched.policy_messages)
    assert watched.errors == []
