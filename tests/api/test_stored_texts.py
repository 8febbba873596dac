"""A record is serialised once: the archive hashes and stores the canonical texts, and POST answers
with JSON made from them; check that against independent encoders and hashes."""

from __future__ import annotations

import hashlib
import json
import sqlite3
from pathlib import Path
from typing import Any

import rfc8785
from starlette.responses import JSONResponse

from service.archive.store import Archive
from tests.api.conftest import ApiClient, json_request

# Numbers whose RFC 8785 form differs from Python's repr(), and a key above U+FFFF (it sends the
# result to the reference serialiser).
AWKWARD_RESULT: dict[str, Any] = {
    "metrics": [{"small": 1e-7, "large": 1e20, "whole": 5614.0, "zero": -0.0, "\U0001f600": 1.5e-9,
                 "ratio": 0.1 + 0.2, "text": "line\nbreak \u2028 \"quoted\""}],
    "warnings": [],
    "engine": {"name": "bioparity", "numpy": "x"},
}


def awkward_record() -> dict[str, Any]:
    inputs: dict[str, Any] = {"records": [{"subject": "S01", "value": 1e-5}], "settings": {"seed": 3}}
    return {
        "inputs_sha256": hashlib.sha256(rfc8785.dumps(inputs)).hexdigest(),
        "inputs": inputs,
        "result": AWKWARD_RESULT,
    }


def test_chain_hash_and_columns_of_a_record_with_awkward_numbers(tmp_path: Path) -> None:
    """record_sha256 is SHA-256 (hashlib, FIPS 180-4) of the RFC 8785 form (rfc8785 package) of
    the chained fields, computed here from the original objects; the stored columns are the
    package's texts, and the archive's own verification finds the chain intact."""
    archive = Archive.create(f"sqlite:///{tmp_path / 'a.sqlite3'}")
    try:
        record = awkward_record()
        stored = archive.insert(record, submitter="lab-é")
        chained = {
            "inputs_sha256": record["inputs_sha256"], "result": record["result"],
            "created_at": stored["created_at"], "submitter": "lab-é", "previous_record_sha256": None,
        }
        assert stored["record_sha256"] == hashlib.sha256(rfc8785.dumps(chained)).hexdigest()
        assert archive.verify_chain() == []
        assert archive.get(stored["id"]) == stored
    finally:
        archive.close()
    with sqlite3.connect(tmp_path / "a.sqlite3") as raw:
        inputs, result, engine = raw.execute("SELECT inputs, result, engine FROM records").fetchone()
    assert inputs.encode() == rfc8785.dumps(record["inputs"])
    assert result.encode() == rfc8785.dumps(AWKWARD_RESULT)
    assert engine.encode() == rfc8785.dumps(AWKWARD_RESULT["engine"])


def test_record_json_has_the_content_jsonresponse_would_write(tmp_path: Path) -> None:
    """The JSON text of a stored record parses (json module) to what Starlette's JSONResponse
    writes for the same record, keys in the same order; the numbers are the same doubles even
    where the texts differ (1e-7 against 1e-07)."""
    archive = Archive.create(f"sqlite:///{tmp_path / 'a.sqlite3'}")
    try:
        stored = archive.insert(awkward_record())
    finally:
        archive.close()
    ours = json.loads(stored.json_text)
    theirs = json.loads(JSONResponse(stored).body)
    assert ours == theirs
    assert list(ours) == list(theirs) == list(stored)
    assert ours["result"]["metrics"][0]["small"] == 1e-7


def test_post_answers_with_the_record_that_get_returns(client: ApiClient) -> None:
    """POST's 201 body (the archive's JSON text) has the content of GET /v1/analyses/{id} (written
    by Starlette's JSONResponse), as application/json; a replay with the same Idempotency-Key
    answers the same content."""
    created = client.post("/v1/analyses", json=json_request(), headers={"Idempotency-Key": "k-1"})
    assert created.status_code == 201, created.text
    assert created.headers["content-type"] == "application/json"
    fetched = client.get(created.headers["location"])
    assert fetched.status_code == 200
    assert created.json() == fetched.json()
    assert list(created.json()) == list(fetched.json())
    replayed = client.post("/v1/analyses", json=json_request(), headers={"Idempotency-Key": "k-1"})
    assert replayed.status_code == 201
    assert replayed.headers["idempotency-replayed"] == "true"
    assert replayed.json() == created.json()
