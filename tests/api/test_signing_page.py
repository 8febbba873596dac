"""The record page's signing form over HTTP: the session, the key typed again, the CSRF token."""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import Any

from service.archive.keys import create_key
from tests.api.conftest import ApiClient, json_request
from tests.api.test_access import bearer

MakeClient = Callable[..., ApiClient]
CSRF = re.compile(r'name="csrf_token" value="([^"]+)"')


def csrf_of(html: str) -> str:
    found = CSRF.search(html)
    assert found is not None, html
    return found.group(1)


def sign_in(client: ApiClient, key: str) -> None:
    page = client.get("/login")
    response = client.post("/login", data={"key": key, "csrf_token": csrf_of(page.text),
                                           "next": "/"})
    assert response.status_code == 303, response.text


def setup(client: ApiClient) -> tuple[dict[str, str], dict[str, Any]]:
    archive = client.app.state.archive
    keys = {
        "submit": create_key(archive, label="lab-7", role="submit"),
        "read": create_key(archive, label="viewer", role="read"),
        "review": create_key(archive, label="rev-1", role="review", printed_name="Rosa Reviewer"),
        "admin": create_key(archive, label="qa-lead", role="admin", printed_name="Aldo Approver"),
    }
    response = client.post("/v1/analyses", json=json_request(), headers=bearer(keys["submit"]))
    assert response.status_code == 201
    return keys, response.json()


def given(client: ApiClient, record: dict[str, Any], key: str) -> list[dict[str, Any]]:
    listed = client.get(f"/v1/analyses/{record['id']}/signatures", headers=bearer(key))
    signatures: list[dict[str, Any]] = listed.json()["signatures"]
    return signatures


def test_signing_takes_the_session_and_the_key_again(make_client: MakeClient) -> None:
    """A signature from the page needs the session, the CSRF token and the signed-in key typed
    again (21 CFR 11.200(a)(1): at least two distinct identification components; OWASP CSRF
    Prevention Cheat Sheet, synchronizer token); a refusal keeps what was typed and links to the
    field (GOV.UK error summary pattern); success is 303 back to the page (RFC 9110 §15.4.4)."""
    client = make_client()
    keys, record = setup(client)
    sign_in(client, keys["review"])
    url = f"/analyses/{record['id']}"
    page = client.get(url).text
    assert f'name="record_sha256" value="{record["record_sha256"]}"' in page
    form = {"csrf_token": csrf_of(page), "record_sha256": record["record_sha256"],
            "meaning": "approved", "comment": "Checked against the protocol", "key": keys["review"]}

    assert client.post(url + "/signatures", data={**form, "csrf_token": "x" * 43}).status_code == 403
    wrong = client.post(url + "/signatures", data={**form, "key": keys["admin"]})
    assert wrong.status_code == 403
    assert 'href="#field-signing_key"' in wrong.text
    assert "Checked against the protocol</textarea>" in wrong.text
    assert keys["admin"] not in wrong.text and keys["review"] not in wrong.text
    no_reason = client.post(url + "/signatures", data={**form, "meaning": "rejected",
                                                       "comment": ""})
    assert no_reason.status_code == 422 and 'href="#field-comment"' in no_reason.text
    assert 'id="meaning-rejected" name="meaning" value="rejected" checked' in no_reason.text
    assert given(client, record, keys["read"]) == []

    done = client.post(url + "/signatures", data=form)
    assert done.status_code == 303 and done.headers["location"] == url + "#signatures"
    (signature,) = given(client, record, keys["read"])
    assert signature["signer"] == "rev-1" and signature["printed_name"] == "Rosa Reviewer"
    assert signature["meaning"] == "approved" and signature["record_sha256"] == record["record_sha256"]
    shown = client.get(url).text
    section = shown[shown.index('<h2 id="signatures">'):]
    assert "Rosa Reviewer" in section and "Status: <strong>approved</strong>" in section
    again = client.post(url + "/signatures", data=form)
    assert again.status_code == 409 and len(given(client, record, keys["read"])) == 1


def test_wrong_keys_count_as_failed_sign_ins(make_client: MakeClient) -> None:
    """Wrong keys typed into the signing form are limited like sign-ins: past the limit the
    answer is 429 (RFC 6585 §4), even with the right key."""
    client = make_client(sign_in_attempts=2)
    keys, record = setup(client)
    sign_in(client, keys["review"])
    url = f"/analyses/{record['id']}"
    form = {"csrf_token": csrf_of(client.get(url).text), "record_sha256": record["record_sha256"],
            "meaning": "reviewed", "comment": "", "key": "bp_wrong"}
    assert [client.post(url + "/signatures", data=form).status_code for _ in range(2)] == [403, 403]
    assert client.post(url + "/signatures", data={**form, "key": keys["review"]}).status_code == 429
    assert given(client, record, keys["read"]) == []


def test_who_is_offered_the_form(make_client: MakeClient) -> None:
    """Only a signed-in review or admin key that did not submit the record gets the form; a
    read session is refused (403), and so is the open mode, where nobody is named (21 CFR
    11.50(a)(1); separation of duties, EU GMP Annex 11 §14)."""
    open_client = make_client()
    record = open_client.post("/v1/analyses", json=json_request()).json()
    page = open_client.get(f"/analyses/{record['id']}").text
    assert "Sign this record" not in page
    refused = open_client.post(f"/analyses/{record['id']}/signatures",
                               data={"csrf_token": csrf_of(page), "meaning": "reviewed"})
    assert refused.status_code == 403 and "Sign in to sign" in refused.text

    client = make_client()
    keys, record = setup(client)
    sign_in(client, keys["read"])
    page = client.get(f"/analyses/{record['id']}").text
    assert "Sign this record" not in page and "Nobody has signed this record yet." in page
    assert client.post(f"/analyses/{record['id']}/signatures", data={
        "csrf_token": csrf_of(page), "meaning": "reviewed", "key": keys["read"],
        "record_sha256": record["record_sha256"]}).status_code == 403

    own = client.post("/v1/analyses", json=json_request(), headers=bearer(keys["admin"])).json()
    sign_in(client, keys["admin"])
    assert "so you cannot sign it" in client.get(f"/analyses/{own['id']}").text
    assert "Sign this record" in client.get(f"/analyses/{record['id']}").text


def test_index_shows_the_latest_status(make_client: MakeClient) -> None:
    """The archive index shows each record's latest status: unsigned, or the meaning of its
    latest signature (issue 13)."""
    client = make_client()
    keys, record = setup(client)
    other = client.post("/v1/analyses", json=json_request(), headers=bearer(keys["submit"])).json()
    client.post(f"/v1/analyses/{record['id']}/signatures", headers=bearer(keys["review"]),
                json={"meaning": "rejected", "comment": "wrong units",
                      "record_sha256": record["record_sha256"]})
    sign_in(client, keys["read"])
    index = client.get("/").text
    rows = {row_id: index[index.index(f'/analyses/{row_id}"'):].split("</tr>")[0]
            for row_id in (record["id"], other["id"])}
    assert 'class="status status-rejected">rejected<' in rows[record["id"]]
    assert 'class="status status-unsigned">unsigned<' in rows[other["id"]]
