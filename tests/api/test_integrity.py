"""Tamper evidence, reproduction and idempotent retries, checked against raw SQL edits."""

from __future__ import annotations

import hashlib
import json
import sqlite3
import subprocess
import sys
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
import rfc8785

from service.api.app import create_app
from service.api.settings import ServiceSettings
from tests.api.conftest import ApiClient, csv_body, json_request, table_rows
from tests.api.test_archive import small_record

REPO = Path(__file__).resolve().parents[2]
MakeClient = Callable[..., ApiClient]


@pytest.fixture
def sqlite_client(tmp_path: Path) -> Iterator[tuple[ApiClient, Path]]:
    path = tmp_path / "tamper.sqlite3"
    client = ApiClient(create_app(ServiceSettings(database_url=f"sqlite:///{path}")))
    yield client, path
    client.close()


def fill(client: ApiClient, count: int = 4) -> None:
    for i in range(count):
        client.app.state.archive.insert(small_record(i), submitter=f"lab-{i}")


def verification(client: ApiClient) -> dict[str, Any]:
    response = client.get("/v1/archive/verification")
    assert response.status_code == 200
    body: dict[str, Any] = response.json()
    return body


TAMPERING = {
    "result": ("UPDATE records SET result = replace(result, '\"metrics\":[]', '\"metrics\":[1]') "
               "WHERE seq = 2", 2, "record_hash_mismatch"),
    "inputs": ("UPDATE records SET inputs = replace(inputs, '0.2', '0.25') WHERE seq = 3",
               3, "inputs_hash_mismatch"),
    "submitter": ("UPDATE records SET submitter = 'someone-else' WHERE seq = 2", 2,
                  "record_hash_mismatch"),
    "created_at": ("UPDATE records SET created_at = '2020-01-01T00:00:00.000000Z' WHERE seq = 4",
                   4, "record_hash_mismatch"),
    "deleted row": ("DELETE FROM records WHERE seq = 2", 3, "broken_link"),
    "reordered": ("UPDATE records SET seq = 100 WHERE seq = 2; "
                  "UPDATE records SET seq = 2 WHERE seq = 3; "
                  "UPDATE records SET seq = 3 WHERE seq = 100", 2, "broken_link"),
}


@pytest.mark.parametrize("kind", list(TAMPERING))
def test_every_direct_edit_shows_in_the_verification(
    sqlite_client: tuple[ApiClient, Path], kind: str
) -> None:
    """Each edit made with raw SQL (Python's sqlite3) breaks the SHA-256 chain where it was made:
    the record hash covers inputs_sha256, result, created_at, submitter and the previous
    record hash (hash chain / linked timestamping, Haber & Stornetta 1991, J. Cryptology 3:99)."""
    client, path = sqlite_client
    fill(client)
    before = verification(client)
    assert before["valid"] is True and before["records"] == 4 and before["first_break"] is None
    statement, seq, reason = TAMPERING[kind]
    with sqlite3.connect(path) as raw:
        for part in statement.split("; "):
            assert raw.execute(part).rowcount >= 1
    after = verification(client)
    assert after["valid"] is False
    assert after["first_break"]["seq"] == seq
    assert after["first_break"]["reason"] == reason
    assert after["records"] == (3 if kind == "deleted row" else 4)


def test_inputs_hash_is_recomputed_from_the_stored_inputs(
    sqlite_client: tuple[ApiClient, Path],
) -> None:
    """Editing inputs and inputs_sha256 together still breaks the record hash, which covers
    inputs_sha256 (SHA-256 second-preimage resistance, FIPS 180-4)."""
    client, path = sqlite_client
    fill(client, 2)
    with sqlite3.connect(path) as raw:
        text = raw.execute("SELECT inputs FROM records WHERE seq = 1").fetchone()[0]
        edited = rfc8785.dumps({**json.loads(text), "extra": 1}).decode()
        raw.execute("UPDATE records SET inputs = ?, inputs_sha256 = ? WHERE seq = 1",
                    (edited, hashlib.sha256(edited.encode()).hexdigest()))
    after = verification(client)
    assert after["first_break"]["seq"] == 1
    assert after["first_break"]["reason"] == "record_hash_mismatch"


def test_cli_verify_exit_codes(sqlite_client: tuple[ApiClient, Path]) -> None:
    """`archive verify` prints the same JSON and exits 0 when intact, 1 when broken (POSIX
    convention of a non-zero status for failure)."""
    client, path = sqlite_client
    fill(client, 3)
    command = [sys.executable, "-m", "service", "archive", "verify", "--db", str(path)]
    intact = subprocess.run(command, capture_output=True, text=True, cwd=REPO, timeout=60)
    assert intact.returncode == 0, intact.stderr
    assert json.loads(intact.stdout) == verification(client)
    with sqlite3.connect(path) as raw:
        raw.execute("UPDATE records SET submitter = 'x' WHERE seq = 3")
    broken = subprocess.run(command, capture_output=True, text=True, cwd=REPO, timeout=60)
    assert broken.returncode == 1
    report = json.loads(broken.stdout)
    assert report["valid"] is False and report["first_break"]["seq"] == 3


def test_reproduction(sqlite_client: tuple[ApiClient, Path]) -> None:
    """The archived inputs recompute the archived result exactly (seeded SeedSequence/PCG64
    streams are reproducible, NumPy random docs); an edited figure is named by its path; an
    engine version change alone is reported apart and does not fail reproduction."""
    client, path = sqlite_client
    record = client.post("/v1/analyses", json=json_request()).json()
    url = f"/v1/analyses/{record['id']}/reproduction"
    same = client.post(url).json()
    assert same["reproduced"] is True and same["differences"] == []
    assert same["engine_differences"] == []
    assert "result.engine" in same["compared"]

    result = json.loads(json.dumps(record["result"]))
    version = result["engine"]["version"]
    theta = result["metrics"][0]["ratio_of_mean_differences"]["estimate"]["theta"]
    result["metrics"][0]["ratio_of_mean_differences"]["estimate"]["theta"] = theta + 1e-12
    with sqlite3.connect(path) as raw:
        raw.execute("UPDATE records SET result = ? WHERE id = ?",
                    (rfc8785.dumps(result).decode(), record["id"]))
    edited = client.post(url).json()
    assert edited["reproduced"] is False
    assert [d["path"] for d in edited["differences"]] == [
        ["result", "metrics", 0, "ratio_of_mean_differences", "estimate", "theta"]
    ]
    assert edited["differences"][0]["recomputed"] == theta

    result["metrics"][0]["ratio_of_mean_differences"]["estimate"]["theta"] = theta
    result["engine"]["version"] = "0.0.1-old"
    with sqlite3.connect(path) as raw:
        raw.execute("UPDATE records SET result = ? WHERE id = ?",
                    (rfc8785.dumps(result).decode(), record["id"]))
    older = client.post(url).json()
    assert older["reproduced"] is True
    assert older["engine_differences"] == [
        {"path": ["result", "engine", "version"], "archived": "0.0.1-old",
         "recomputed": version}
    ]
    assert client.post("/v1/analyses/" + "0" * 32 + "/reproduction").status_code == 404


def test_idempotent_retry_returns_the_first_record(make_client: MakeClient) -> None:
    """A retry with the same Idempotency-Key and request answers 201 with the identical first
    record and archives nothing new; the same key with another body is a 422 problem
    (IETF draft-ietf-httpapi-idempotency-key-header, from memory)."""
    client = make_client()
    headers = {"Idempotency-Key": "order-7 retry ~ok"}
    first = client.post("/v1/analyses", json=json_request(), headers=headers)
    again = client.post("/v1/analyses", json=json_request(), headers=headers)
    assert first.status_code == again.status_code == 201
    assert again.json() == first.json()
    assert again.headers["location"] == first.headers["location"]
    assert again.headers["idempotency-replayed"] == "true"
    assert client.get("/v1/analyses").json()["total"] == 1

    other = client.post("/v1/analyses", json=json_request(table_rows(seed=3)), headers=headers)
    assert other.status_code == 422
    assert other.json()["errors"][0]["loc"] == ["header", "idempotency-key"]
    as_csv = client.post("/v1/analyses", content=csv_body(table_rows()), headers={
        **headers, "Content-Type": "text/csv"}, params={"test": "T", "reference": "R"})
    assert as_csv.status_code == 422
    fresh = client.post("/v1/analyses", json=json_request(), headers={"Idempotency-Key": "new"})
    assert fresh.status_code == 201 and fresh.json()["id"] != first.json()["id"]
    assert client.get("/v1/analyses").json()["total"] == 2


def test_idempotency_keys_are_scoped_per_submitter(make_client: MakeClient) -> None:
    """Two API keys may use the same Idempotency-Key for their own requests (the key is scoped
    to its client, common practice)."""
    from service.archive.keys import create_key

    client = make_client()
    one = create_key(client.app.state.archive, label="one", role="submit")
    two = create_key(client.app.state.archive, label="two", role="submit")
    a = client.post("/v1/analyses", json=json_request(),
                    headers={"Authorization": f"Bearer {one}", "Idempotency-Key": "k"})
    b = client.post("/v1/analyses", json=json_request(),
                    headers={"Authorization": f"Bearer {two}", "Idempotency-Key": "k"})
    assert a.status_code == b.status_code == 201
    assert a.json()["id"] != b.json()["id"]
    assert (a.json()["submitter"], b.json()["submitter"]) == ("one", "two")


def test_concurrent_identical_posts_archive_one_record(make_client: MakeClient) -> None:
    """Two overlapping POSTs with one key both answer the first record and the archive holds
    one (the check and the append share the archive's append lock; common practice)."""
    client = make_client()
    headers = {"Idempotency-Key": "together"}
    pending = [client.submit("POST", "/v1/analyses", json=json_request(), headers=headers)
               for _ in range(3)]
    responses = [p.result(timeout=120) for p in pending]
    assert [r.status_code for r in responses] == [201, 201, 201]
    assert len({r.json()["id"] for r in responses}) == 1
    assert client.get("/v1/analyses").json()["total"] == 1


@pytest.mark.parametrize("value", ["", "x" * 201, "naïve", "tab\there"])
def test_bad_idempotency_keys(client: ApiClient, value: str) -> None:
    """The header must hold 1–200 printable ASCII characters (the service's documented rule;
    printable ASCII is 0x20–0x7E, ANSI X3.4)."""
    response = client.post("/v1/analyses", json=json_request(),
                           headers={"Idempotency-Key": value.encode("utf-8")})
    assert response.status_code == 422
    assert response.json()["errors"][0]["loc"] == ["header", "idempotency-key"]
    assert client.get("/v1/analyses").json()["total"] == 0
