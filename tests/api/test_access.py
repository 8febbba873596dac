"""API keys through HTTP: roles, 401/403 problems, immediate effect of creation and revocation."""

from __future__ import annotations

import hashlib
import sqlite3
from collections.abc import Callable
from pathlib import Path

import httpx
import pytest
from sqlalchemy import select

from service.api.app import create_app
from service.api.settings import ServiceSettings
from service.archive.keys import create_key, key_sha256, revoke_key
from service.archive.roles import is_loopback
from service.archive.store import api_keys
from tests.api.conftest import ApiClient, json_request

MakeClient = Callable[..., ApiClient]


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def assert_problem(response: httpx.Response, status: int) -> None:
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    body = response.json()
    assert body["status"] == status and body["errors"]


def test_open_until_a_key_exists_then_every_call_needs_one(make_client: MakeClient) -> None:
    """With no key the loopback service runs open and archives "unauthenticated"; a key created
    while it runs applies to the very next request, without restart. 401 carries
    `WWW-Authenticate: Bearer` (RFC 6750 §3, RFC 9110 §15.5.2)."""
    client = make_client()
    first = client.post("/v1/analyses", json=json_request())
    assert first.status_code == 201 and first.json()["submitter"] == "unauthenticated"

    key = create_key(client.app.state.archive, label="lab-a", role="submit")
    refused = client.get("/v1/analyses")
    assert_problem(refused, 401)
    assert refused.headers["www-authenticate"].startswith("Bearer")
    assert client.get("/healthz").status_code == 200

    second = client.post("/v1/analyses", json=json_request(), headers=bearer(key))
    assert second.status_code == 201
    assert second.json()["submitter"] == "lab-a"
    assert client.get(f"/v1/analyses/{second.json()['id']}", headers=bearer(key)).status_code == 200


def test_roles(make_client: MakeClient) -> None:
    """read → GET only; submit → also POST and reproduction; admin → also verification; a
    wrong role is 403, an unknown or malformed key 401 (RFC 9110 §15.5.2 and §15.5.4)."""
    client = make_client()
    archive = client.app.state.archive
    keys = {role: create_key(archive, label=f"{role}-key", role=role)
            for role in ("read", "submit", "admin")}
    posted = client.post("/v1/analyses", json=json_request(), headers=bearer(keys["submit"]))
    assert posted.status_code == 201
    record_id = posted.json()["id"]

    for role in ("read", "submit", "admin"):
        for path in ("/v1/analyses", f"/v1/analyses/{record_id}",
                     f"/v1/analyses/{record_id}/report", f"/v1/analyses/{record_id}/bundle"):
            assert client.get(path, headers=bearer(keys[role])).status_code == 200, (role, path)

    assert_problem(client.post("/v1/analyses", json=json_request(), headers=bearer(keys["read"])),
                   403)
    reproduction = f"/v1/analyses/{record_id}/reproduction"
    assert_problem(client.post(reproduction, headers=bearer(keys["read"])), 403)
    assert client.post(reproduction, headers=bearer(keys["submit"])).status_code == 200
    assert_problem(client.get("/v1/archive/verification", headers=bearer(keys["submit"])), 403)
    assert client.get("/v1/archive/verification", headers=bearer(keys["admin"])).status_code == 200
    assert client.post("/v1/analyses", json=json_request(),
                       headers=bearer(keys["admin"])).json()["submitter"] == "admin-key"

    for header in ({"Authorization": "Bearer bp_not-a-key"}, {"Authorization": keys["admin"]},
                   {"Authorization": f"Basic {keys['admin']}"}, {"Authorization": "Bearer "}):
        response = client.get("/v1/analyses", headers=header)
        assert_problem(response, 401)
        assert 'error="invalid_token"' in response.headers["www-authenticate"]


def test_revocation_applies_to_the_next_request(make_client: MakeClient) -> None:
    """Revoking a key refuses it at once, also for a second app (worker) on the same archive:
    the hash is looked up per request (RFC 6750 §3.1 invalid_token)."""
    client = make_client()
    other = make_client()
    key = create_key(client.app.state.archive, label="short-lived", role="read")
    assert client.get("/v1/analyses", headers=bearer(key)).status_code == 200
    assert other.get("/v1/analyses", headers=bearer(key)).status_code == 200
    revoke_key(other.app.state.archive, "short-lived")
    assert_problem(client.get("/v1/analyses", headers=bearer(key)), 401)
    assert_problem(other.get("/v1/analyses", headers=bearer(key)), 401)
    # The last key is gone: a loopback service is open again, as documented.
    assert client.get("/v1/analyses").status_code == 200


def test_require_keys_never_runs_open(make_client: MakeClient) -> None:
    """With require_keys (what `serve` sets on a non-loopback address) and no active key,
    every /v1 call is refused, so revoking the last key cannot open the service (common
    practice: fail closed)."""
    client = make_client(require_keys=True)
    response = client.get("/v1/analyses")
    assert_problem(response, 401)
    assert "keys create" in response.json()["detail"]
    assert client.get("/healthz").status_code == 200


def test_keys_are_stored_only_as_sha256(tmp_path: Path) -> None:
    """The archive holds SHA-256 (FIPS 180-4, via hashlib) of the key, never the key;
    keys carry at least 256 bits from secrets.token_urlsafe(32) (Python docs, secrets)."""
    url = f"sqlite:///{tmp_path / 'keys.sqlite3'}"
    app = create_app(ServiceSettings(database_url=url))
    try:
        key = create_key(app.state.archive, label="ops", role="admin")
        with app.state.archive.engine.connect() as conn:
            stored = conn.execute(select(api_keys.c.key_sha256)).scalar_one()
    finally:
        app.state.archive.close()
    assert key.startswith("bp_") and len(key) >= 3 + 43
    assert stored == hashlib.sha256(key.encode()).hexdigest() == key_sha256(key)
    with sqlite3.connect(tmp_path / "keys.sqlite3") as raw:
        dump = "\n".join(raw.iterdump())
    assert key not in dump and key[3:] not in dump


def test_labels_are_unique(make_client: MakeClient) -> None:
    """A second key under one label is refused, so a record's submitter names one key
    (common practice)."""
    client = make_client()
    create_key(client.app.state.archive, label="lab-b", role="read")
    with pytest.raises(Exception, match="exists already"):
        create_key(client.app.state.archive, label="lab-b", role="admin")


def test_openapi_declares_bearer_security(client: ApiClient) -> None:
    """OpenAPI 3.1 §4.8.27 (Security Scheme Object, type http, scheme bearer) on every /v1
    operation; /healthz has none."""
    schema = client.get("/openapi.json").json()
    assert schema["components"]["securitySchemes"]["bearer"]["scheme"] == "bearer"
    for path, operations in schema["paths"].items():
        for operation in operations.values():
            if path.startswith("/v1/"):
                assert operation["security"] == [{"bearer": []}], path
                assert "401" in operation["responses"], path
            else:
                assert "security" not in operation, path


@pytest.mark.parametrize(
    ("host", "loopback"),
    [("127.0.0.1", True), ("127.8.9.10", True), ("::1", True), ("localhost", True),
     ("0.0.0.0", False), ("::", False), ("192.168.1.20", False), ("example.org", False)],
)
def test_loopback_addresses(host: str, loopback: bool) -> None:
    """127.0.0.0/8 and ::1 are loopback (RFC 1122 §3.2.1.3, RFC 4291 §2.5.3); the unspecified
    addresses 0.0.0.0 and :: listen everywhere and are not."""
    assert is_loopback(host) is loopback
