"""Signing records over HTTP: roles, refusals, the signatures list, report, bundle and verification."""

from __future__ import annotations

import hashlib
import io
import json
import sqlite3
import zipfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import pytest
import rfc8785

from service.api.app import create_app
from service.api.settings import ServiceSettings
from service.archive.keys import create_key
from tests.api.conftest import ApiClient, json_request
from tests.api.test_access import assert_problem, bearer

MakeClient = Callable[..., ApiClient]


def signers(client: ApiClient) -> dict[str, str]:
    archive = client.app.state.archive
    return {
        "read": create_key(archive, label="viewer", role="read"),
        "submit": create_key(archive, label="lab-7", role="submit"),
        "review": create_key(archive, label="rev-1", role="review", printed_name="Rosa Reviewer"),
        "admin": create_key(archive, label="qa-lead", role="admin", printed_name="Aldo Approver"),
    }


def posted(client: ApiClient, key: str) -> dict[str, Any]:
    response = client.post("/v1/analyses", json=json_request(), headers=bearer(key))
    assert response.status_code == 201, response.text
    record: dict[str, Any] = response.json()
    return record


def sign(client: ApiClient, record: dict[str, Any], key: str, meaning: str = "reviewed",
         comment: str | None = None, record_sha256: str | None = None) -> httpx.Response:
    body: dict[str, Any] = {"meaning": meaning,
                            "record_sha256": record_sha256 or record["record_sha256"]}
    if comment is not None:
        body["comment"] = comment
    return client.post(f"/v1/analyses/{record['id']}/signatures", json=body, headers=bearer(key))


def test_review_role_reads_and_signs_but_submits_nothing(make_client: MakeClient) -> None:
    """review may call every GET and sign; it may not post analyses, reproduce or verify; read
    and submit may not sign, admin may (the permission table of issue 13; 403 for a wrong role,
    RFC 9110 §15.5.4). The 201 names the signature in Location (RFC 9110 §15.3.2)."""
    client = make_client()
    keys = signers(client)
    record = posted(client, keys["submit"])
    base = f"/v1/analyses/{record['id']}"
    for path in ("/v1/analyses", base, base + "/report", base + "/bundle", base + "/signatures"):
        assert client.get(path, headers=bearer(keys["review"])).status_code == 200, path
    assert_problem(client.post("/v1/analyses", json=json_request(),
                               headers=bearer(keys["review"])), 403)
    assert_problem(client.post(base + "/reproduction", headers=bearer(keys["review"])), 403)
    assert_problem(client.get("/v1/archive/verification", headers=bearer(keys["review"])), 403)
    assert_problem(sign(client, record, keys["read"]), 403)
    assert_problem(sign(client, record, keys["submit"]), 403)

    given = sign(client, record, keys["review"])
    assert given.status_code == 201, given.text
    signature = given.json()
    assert signature["signer"] == "rev-1" and signature["printed_name"] == "Rosa Reviewer"
    assert signature["meaning"] == "reviewed" and signature["record_sha256"] == record["record_sha256"]
    assert client.get(given.headers["location"], headers=bearer(keys["read"])).json() == signature
    approved = sign(client, record, keys["admin"], "approved")
    assert approved.status_code == 201, approved.text

    listed = client.get(base + "/signatures", headers=bearer(keys["read"])).json()
    assert listed["status"] == "approved" and listed["record_sha256"] == record["record_sha256"]
    assert [s["meaning"] for s in listed["signatures"]] == ["reviewed", "approved"]


def test_a_stale_hash_is_a_conflict(make_client: MakeClient) -> None:
    """A record_sha256 other than the record's hash is 409: the signer did not see this record
    (RFC 9110 §15.5.10 Conflict; 21 CFR 11.70, a signature is linked to its exact record)."""
    client = make_client()
    keys = signers(client)
    first, second = posted(client, keys["submit"]), posted(client, keys["submit"])
    response = sign(client, first, keys["review"], record_sha256=second["record_sha256"])
    assert_problem(response, 409)
    assert response.json()["type"] == "urn:bioparity:problem:conflict"
    assert response.json()["errors"][0]["loc"] == ["body", "record_sha256"]
    assert first["record_sha256"] in response.json()["errors"][0]["msg"]
    assert client.get(f"/v1/analyses/{first['id']}/signatures",
                      headers=bearer(keys["read"])).json()["signatures"] == []


def test_a_submitter_cannot_sign_their_own_record(make_client: MakeClient) -> None:
    """The admin key that submitted a record is refused (403) when it signs it, and may sign a
    record another key submitted (separation of duties, EU GMP Annex 11 §14; RFC 9110
    §15.5.4)."""
    client = make_client()
    keys = signers(client)
    own = posted(client, keys["admin"])
    response = sign(client, own, keys["admin"], "approved")
    assert_problem(response, 403)
    assert "submitted" in response.json()["detail"]
    other = posted(client, keys["submit"])
    assert sign(client, other, keys["admin"], "approved").status_code == 201


def test_one_signer_gives_a_meaning_once(make_client: MakeClient) -> None:
    """The same signer and meaning on one record is refused (409); another meaning by the
    same signer, or the same meaning by another signer, is a new signature (issue 13)."""
    client = make_client()
    keys = signers(client)
    record = posted(client, keys["submit"])
    assert sign(client, record, keys["review"]).status_code == 201
    again = sign(client, record, keys["review"])
    assert_problem(again, 409)
    assert again.json()["errors"][0]["loc"] == ["body", "meaning"]
    assert sign(client, record, keys["admin"]).status_code == 201
    assert sign(client, record, keys["review"], "rejected", comment="units differ").status_code == 201
    listed = client.get(f"/v1/analyses/{record['id']}/signatures", headers=bearer(keys["read"]))
    assert listed.json()["status"] == "rejected" and len(listed.json()["signatures"]) == 3


@pytest.mark.parametrize(
    ("body", "status", "loc"),
    [
        ({"meaning": "rejected"}, 422, ["body", "comment"]),
        ({"meaning": "rejected", "comment": "   "}, 422, ["body", "comment"]),
        ({"meaning": "signed"}, 422, ["body", "meaning"]),
        ({"meaning": "approved", "record_sha256": "ABC"}, 422, ["body", "record_sha256"]),
        ({"meaning": "approved", "extra": 1}, 422, ["body", "extra"]),
        ({"meaning": "approved", "comment": 5}, 422, ["body", "comment"]),
        ({"meaning": "approved", "comment": "x" * 2001}, 422, ["body", "comment"]),
    ],
)
def test_bad_signing_requests_name_the_field(
    client: ApiClient, body: dict[str, Any], status: int, loc: list[str]
) -> None:
    """Each bad field is a 422 problem naming it (RFC 9457 §3; a rejection needs a comment,
    issue 13); nothing is archived."""
    keys = signers(client)
    record = posted(client, keys["submit"])
    sent = {"record_sha256": record["record_sha256"], **body}
    response = client.post(f"/v1/analyses/{record['id']}/signatures", json=sent,
                           headers=bearer(keys["review"]))
    assert_problem(response, status)
    assert loc in [error["loc"] for error in response.json()["errors"]], response.json()
    assert client.get(f"/v1/analyses/{record['id']}/signatures",
                      headers=bearer(keys["read"])).json()["signatures"] == []


def test_malformed_bodies_and_unknown_records(client: ApiClient) -> None:
    """Not JSON is 400, not application/json 415, too large 413, an unknown record 404
    (RFC 9110 §15.5.1, §15.5.16, §15.5.14, §15.5.5)."""
    keys = signers(client)
    record = posted(client, keys["submit"])
    url = f"/v1/analyses/{record['id']}/signatures"
    auth = bearer(keys["review"])
    assert_problem(client.post(url, content=b"{", headers={**auth, "Content-Type":
                                                           "application/json"}), 400)
    assert_problem(client.post(url, content=b"meaning=reviewed", headers={
        **auth, "Content-Type": "text/csv"}), 415)
    assert_problem(client.post(url, content=b" " * 300_000, headers={
        **auth, "Content-Type": "application/json"}), 413)
    unknown = {"meaning": "reviewed", "record_sha256": record["record_sha256"]}
    assert_problem(client.post("/v1/analyses/" + "0" * 32 + "/signatures", json=unknown,
                               headers=auth), 404)
    assert_problem(client.get("/v1/analyses/" + "0" * 32 + "/signatures", headers=auth), 404)
    assert_problem(client.get(url + "/" + "0" * 32, headers=auth), 404)


def test_signing_needs_a_named_key(make_client: MakeClient) -> None:
    """In open mode (no key) there is nobody to name, so signing is 401 with a Bearer challenge
    (RFC 6750 §3); an admin key without a printed name is 403 (21 CFR 11.50(a)(1))."""
    client = make_client()
    record = client.post("/v1/analyses", json=json_request()).json()
    response = client.post(f"/v1/analyses/{record['id']}/signatures",
                           json={"meaning": "reviewed", "record_sha256": record["record_sha256"]})
    assert_problem(response, 401)
    assert response.headers["www-authenticate"].startswith("Bearer")
    unnamed = create_key(client.app.state.archive, label="ops", role="admin")
    response = sign(client, record, unnamed)
    assert_problem(response, 403)
    assert "printed name" in response.json()["detail"]


def test_report_shows_the_signatures_and_stays_byte_identical(make_client: MakeClient) -> None:
    """The report lists printed name, meaning, UTC time and comment of each signature (21 CFR
    11.50(b): signatures are part of any human-readable form of the record); the same record
    with the same signatures gives the same bytes, and a new signature changes them."""
    client = make_client()
    keys = signers(client)
    record = posted(client, keys["submit"])
    url = f"/v1/analyses/{record['id']}/report"
    unsigned = client.get(url, headers=bearer(keys["read"])).text
    assert 'id="signatures"' in unsigned and "No signatures yet." in unsigned
    signature = sign(client, record, keys["review"], "rejected",
                     comment="Period 2 of S03 is <missing> in the source").json()
    first = client.get(url, headers=bearer(keys["read"])).content
    assert client.get(url, headers=bearer(keys["review"])).content == first
    html = first.decode()
    section = html[html.index('id="signatures"'):html.index('id="verdicts"')]
    for shown in ("Rosa Reviewer", "rev-1", "Rejected", signature["signed_at"],
                  "Period 2 of S03 is &lt;missing&gt; in the source",
                  signature["signature_sha256"], record["record_sha256"]):
        assert shown in section, shown
    assert "does not replace the protocol" in section
    sign(client, record, keys["admin"], "reviewed")
    assert client.get(url, headers=bearer(keys["read"])).content != first


def test_bundle_carries_signatures_json_with_its_hash(make_client: MakeClient) -> None:
    """The bundle adds signatures.json, the RFC 8785 JSON (rfc8785 package) of the signatures
    in time order, listed with its SHA-256 (hashlib, FIPS 180-4) and size in manifest.json; the
    bundle's report.html is the report."""
    client = make_client()
    keys = signers(client)
    record = posted(client, keys["submit"])
    given = [sign(client, record, keys["review"]).json(),
             sign(client, record, keys["admin"], "approved", comment="Ready to file.").json()]
    auth = bearer(keys["read"])
    bundle = client.get(f"/v1/analyses/{record['id']}/bundle", headers=auth).content
    assert client.get(f"/v1/analyses/{record['id']}/bundle", headers=auth).content == bundle
    with zipfile.ZipFile(io.BytesIO(bundle)) as archive:
        names = archive.namelist()
        members = {name: archive.read(name) for name in names}
    assert names == sorted(["inputs.json", "manifest.json", "record.json", "report.html",
                            "signatures.json"])
    assert members["signatures.json"] == rfc8785.dumps(given)
    manifest = json.loads(members["manifest.json"])
    listed = {f["name"]: f for f in manifest["files"]}
    assert listed["signatures.json"] == {
        "name": "signatures.json", "bytes": len(members["signatures.json"]),
        "sha256": hashlib.sha256(members["signatures.json"]).hexdigest()}
    report = client.get(f"/v1/analyses/{record['id']}/report", headers=auth).content
    assert members["report.html"] == report


def test_verification_reports_an_edited_signature(tmp_path: Path) -> None:
    """GET /v1/archive/verification keeps its keys and adds the signature chain's: an edited
    meaning, made with raw SQL (sqlite3), makes the archive invalid and names the signature
    (hash chain, Haber & Stornetta 1991)."""
    path = tmp_path / "signed.sqlite3"
    client = ApiClient(create_app(ServiceSettings(database_url=f"sqlite:///{path}")))
    try:
        keys = signers(client)
        record = posted(client, keys["submit"])
        signature = sign(client, record, keys["review"]).json()
        intact = client.get("/v1/archive/verification", headers=bearer(keys["admin"])).json()
        assert {"valid", "records", "first_break", "breaks", "head_record_sha256",
                "signatures", "first_signature_break", "signature_breaks",
                "head_signature_sha256"} <= set(intact)
        assert intact["valid"] is True and intact["signatures"] == 1
        assert intact["head_signature_sha256"] == signature["signature_sha256"]
        with sqlite3.connect(path) as raw:
            raw.execute("UPDATE signatures SET meaning = 'approved'")
        broken = client.get("/v1/archive/verification", headers=bearer(keys["admin"])).json()
        assert broken["valid"] is False and broken["first_break"] is None
        assert broken["first_signature_break"] == {
            "seq": 1, "id": signature["id"], "record_id": record["id"],
            "reason": "signature_hash_mismatch", "detail": broken["first_signature_break"]["detail"]}
    finally:
        client.close()


def test_nothing_updates_or_deletes_a_signature(client: ApiClient) -> None:
    """The service offers no method that changes or removes a signature: PUT, PATCH and
    DELETE are 405 (RFC 9110 §15.5.6), and the OpenAPI document lists only GET and POST on
    the signature paths (OpenAPI 3.1 §4.8.9)."""
    keys = signers(client)
    record = posted(client, keys["submit"])
    location = sign(client, record, keys["review"]).headers["location"]
    for url in (location, f"/v1/analyses/{record['id']}/signatures"):
        for method in ("PUT", "PATCH", "DELETE"):
            refused = client.request(method, url, headers=bearer(keys["admin"]))
            assert refused.status_code == 405, (method, url)
    paths = client.get("/openapi.json").json()["paths"]
    signature_paths = {p: set(ops) for p, ops in paths.items() if "/signatures" in p}
    assert signature_paths == {"/v1/analyses/{analysis_id}/signatures": {"get", "post"},
                               "/v1/analyses/{analysis_id}/signatures/{signature_id}": {"get"}}
