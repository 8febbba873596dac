"""The analyses resource through HTTP: create, read, report, bundle, list, restart."""

from __future__ import annotations

import hashlib
import io
import json
import threading
import time
import zipfile
from collections.abc import Callable
from typing import Any

import pytest
import rfc8785

from service.api import submissions
from service.records.building import build_record_and_texts
from tests.api.conftest import CSV_QUERY, ApiClient, csv_body, json_request, table_rows

REPORT_POLICY = (
    "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; "
    "form-action 'none'; frame-ancestors 'none'"
)


def post_json(client: ApiClient, request: dict[str, Any]) -> dict[str, Any]:
    response = client.post("/v1/analyses", json=request)
    assert response.status_code == 201, response.text
    record: dict[str, Any] = response.json()
    return record


def test_create_then_read_report_and_bundle(client: ApiClient) -> None:
    """Post → get → report → bundle; inputs hash recomputed independently.

    Sources: RFC 8785 (canonical JSON, via the `rfc8785` package) and FIPS 180-4 SHA-256 (hashlib);
    RFC 9110 §15.3.2 (201 Created with Location).
    """
    response = client.post("/v1/analyses", json=json_request())
    assert response.status_code == 201
    record = response.json()
    assert response.headers["location"] == f"/v1/analyses/{record['id']}"
    assert response.headers["content-type"].startswith("application/json")

    expected = hashlib.sha256(rfc8785.dumps(record["inputs"])).hexdigest()
    assert record["inputs_sha256"] == expected
    assert record["inputs"]["settings"]["seed"] == 424242
    assert record["submitter"] == "unauthenticated"
    assert record["previous_record_sha256"] is None
    assert record["created_at"].endswith("Z")
    metric = record["result"]["metrics"][0]
    assert metric["metric"] == "AUC"
    assert len(metric["subjects"]["analysed"]) == 12

    fetched = client.get(response.headers["location"])
    assert fetched.status_code == 200
    assert fetched.json() == record

    first = client.get(f"/v1/analyses/{record['id']}/report")
    second = client.get(f"/v1/analyses/{record['id']}/report")
    assert first.status_code == 200
    assert first.headers["content-type"] == "text/html; charset=utf-8"
    assert first.content == second.content
    assert b"<html" in first.content.lower()

    bundle = client.get(f"/v1/analyses/{record['id']}/bundle")
    assert bundle.status_code == 200
    assert bundle.headers["content-type"] == "application/zip"
    assert bundle.content == client.get(f"/v1/analyses/{record['id']}/bundle").content
    with zipfile.ZipFile(io.BytesIO(bundle.content)) as archive:
        assert sorted(archive.namelist()) == [
            "inputs.json", "manifest.json", "record.json", "report.html", "signatures.json"
        ]
        assert archive.read("report.html") == first.content
        assert json.loads(archive.read("record.json")) == record
        assert hashlib.sha256(archive.read("inputs.json")).hexdigest() == record["inputs_sha256"]


def test_record_hash_chain(client: ApiClient) -> None:
    """record_sha256 = SHA-256(RFC 8785 of the five chained fields), linked to its predecessor.

    Sources: RFC 8785 via the `rfc8785` package, SHA-256 via hashlib; the chain rule is the
    archive contract (a hash chain: each entry commits to the previous one, common practice).
    """
    first = post_json(client, json_request())
    second = post_json(client, json_request(table_rows(seed=8)))
    for record, previous in ((first, None), (second, first["record_sha256"])):
        chained = {
            "inputs_sha256": record["inputs_sha256"],
            "result": record["result"],
            "created_at": record["created_at"],
            "submitter": record["submitter"],
            "previous_record_sha256": previous,
        }
        assert record["previous_record_sha256"] == previous
        assert record["record_sha256"] == hashlib.sha256(rfc8785.dumps(chained)).hexdigest()


def test_bundle_manifest_hashes(client: ApiClient) -> None:
    """Each manifest entry carries the SHA-256 and size of its file (hashlib, FIPS 180-4);
    the members carry one fixed timestamp (deterministic zip, common practice)."""
    record = post_json(client, json_request())
    content = client.get(f"/v1/analyses/{record['id']}/bundle").content
    with zipfile.ZipFile(io.BytesIO(content)) as archive:
        manifest = json.loads(archive.read("manifest.json"))
        listed = {entry["name"]: entry for entry in manifest["files"]}
        assert sorted(listed) == ["inputs.json", "record.json", "report.html", "signatures.json"]
        for name, entry in listed.items():
            data = archive.read(name)
            assert entry["sha256"] == hashlib.sha256(data).hexdigest()
            assert entry["bytes"] == len(data)
        assert manifest["record_id"] == record["id"]
        assert {info.date_time for info in archive.infolist()} == {(1980, 1, 1, 0, 0, 0)}


def test_report_headers_and_escaping(client: ApiClient) -> None:
    """A script-like subject id arrives HTML-escaped, under a CSP that forbids scripts.

    Sources: HTML Living Standard §13.1.2 (text escaping), W3C CSP Level 3 (policy syntax),
    Fetch Standard §3.6.1 (X-Content-Type-Options: nosniff).
    """
    rows = table_rows()
    hostile = "<script>alert(1)</script>"
    for row in rows:
        if row["subject"] == "S05":
            row["subject"] = hostile
    record = post_json(client, json_request(rows))
    assert hostile in record["result"]["metrics"][0]["subjects"]["analysed"]

    report = client.get(f"/v1/analyses/{record['id']}/report")
    assert report.headers["content-security-policy"] == REPORT_POLICY
    assert report.headers["x-content-type-options"] == "nosniff"
    assert hostile.encode() not in report.content
    assert b"&lt;script&gt;alert(1)&lt;/script&gt;" in report.content


def test_csv_variants_match_json(client: ApiClient) -> None:
    """Comma, semicolon with decimal comma, and tab CSV give the JSON request's hash and result.

    Source: RFC 4180 (CSV), and the data contract's rule that a CSV upload normalizes to the
    inputs of the equivalent JSON request; decimal comma is the ISO 80000-1 §7.1 alternative.
    """
    rows = table_rows()
    reference = post_json(client, json_request(rows))
    variants = {
        "comma": csv_body(rows, ","),
        "semicolon": csv_body(rows, ";", decimal=","),
        "tab": csv_body(rows, "\t", decimal=","),
    }
    assert b"," in variants["semicolon"].split(b"\n")[1]
    for name, body in variants.items():
        response = client.post(
            "/v1/analyses",
            content=body,
            params=CSV_QUERY,
            headers={"Content-Type": "text/csv; charset=utf-8"},
        )
        assert response.status_code == 201, (name, response.text)
        record = response.json()
        assert record["inputs_sha256"] == reference["inputs_sha256"], name
        assert record["inputs"] == reference["inputs"], name
        result = dict(record["result"])
        expected = dict(reference["result"])
        assert result == expected, name


def test_restart_keeps_records(make_client: Callable[..., ApiClient]) -> None:
    """A new app on the same SQLite file serves what the first archived (SQLite durability,
    sqlite.org/wal.html: committed WAL transactions persist), with byte-identical reports."""
    first = make_client()
    record = post_json(first, json_request())
    report = first.get(f"/v1/analyses/{record['id']}/report").content
    first.close()

    second = make_client()
    assert second.get(f"/v1/analyses/{record['id']}").json() == record
    assert second.get(f"/v1/analyses/{record['id']}/report").content == report
    later = post_json(second, json_request(table_rows(seed=9)))
    assert later["previous_record_sha256"] == record["record_sha256"]


def test_list_filter_and_paging(client: ApiClient) -> None:
    """Listing is in creation order with `total` over all pages; the filter keeps only equal
    inputs hashes (offset/limit paging, common practice)."""
    a = post_json(client, json_request())
    b = post_json(client, json_request(table_rows(seed=11)))
    c = post_json(client, json_request())
    assert a["inputs_sha256"] == c["inputs_sha256"] != b["inputs_sha256"]

    everything = client.get("/v1/analyses").json()
    assert everything["total"] == 3
    assert [r["id"] for r in everything["items"]] == [a["id"], b["id"], c["id"]]

    page = client.get("/v1/analyses", params={"limit": 1, "offset": 1}).json()
    assert page["total"] == 3
    assert [r["id"] for r in page["items"]] == [b["id"]]

    same = client.get("/v1/analyses", params={"inputs_sha256": a["inputs_sha256"]}).json()
    assert same["total"] == 2
    assert [r["id"] for r in same["items"]] == [a["id"], c["id"]]
    assert client.get("/v1/analyses", params={"offset": 5}).json() == {"items": [], "total": 3}


def test_analysis_runs_off_the_event_loop(
    client: ApiClient, monkeypatch: pytest.MonkeyPatch
) -> None:
    """While an analysis computes, the same event loop still answers /healthz: the work runs in
    a worker thread (Starlette docs, "Thread pool": blocking calls belong in run_in_threadpool)."""
    entered, finished = threading.Event(), threading.Event()

    def slow_build_record(inputs: dict[str, Any], **options: Any) -> tuple[dict[str, Any], Any]:
        entered.set()
        time.sleep(1.5)
        built: tuple[dict[str, Any], Any] = build_record_and_texts(inputs, **options)
        finished.set()
        return built

    monkeypatch.setattr(submissions, "build_record_and_texts", slow_build_record)
    pending = client.submit("POST", "/v1/analyses", json=json_request())
    assert entered.wait(30)
    assert client.get("/healthz").status_code == 200
    assert not finished.is_set()
    assert pending.result(timeout=60).status_code == 201


def test_health(client: ApiClient) -> None:
    """Liveness answers {"status": "ok"} with nosniff (Fetch Standard §3.6.1)."""
    response = client.get("/healthz")
    assert response.status_code == 200
    assert response.json() == {"status": "ok"}
    assert response.headers["x-content-type-options"] == "nosniff"
