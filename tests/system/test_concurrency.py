"""Many clients against two uvicorn workers on one archive: nothing lost, one linear chain."""

from __future__ import annotations

import hashlib
import json
import random
import threading
from collections.abc import Callable
from typing import Any

import httpx
import rfc8785

from service.archive.store import Archive
from tests.system.servers import Server, small_request

CLIENTS = 16
POSTS_PER_CLIENT = 100


def post_many(base_url: str, client_number: int, acknowledged: dict[str, dict[str, Any]],
              failures: list[str], lock: threading.Lock) -> None:
    with httpx.Client(base_url=base_url, timeout=60.0) as http:
        for i in range(POSTS_PER_CLIENT):
            seed = client_number * 1000 + i
            body = json.dumps(small_request(seed)).encode()
            try:
                response = http.post(
                    "/v1/analyses", content=body, headers={"Content-Type": "application/json"}
                )
            except httpx.HTTPError as exc:
                with lock:
                    failures.append(f"client {client_number} post {i}: {exc!r}")
                continue
            with lock:
                if response.status_code == 201:
                    record = response.json()
                    if record["id"] in acknowledged:
                        failures.append(f"duplicate id {record['id']}")
                    acknowledged[record["id"]] = {"seed": seed, "record": record}
                else:
                    failures.append(f"client {client_number} post {i}: {response.status_code} "
                                    f"{response.text[:200]}")


def test_sixteen_clients_two_workers(database_url: str, serve: Callable[..., Server]) -> None:
    """16 clients x 100 POSTs on `serve --workers 2`: every 201 is archived once, the total is
    exact and the hash chain is linear. The chain is recomputed here with hashlib (FIPS 180-4
    SHA-256) over rfc8785 (RFC 8785) canonical JSON, independently of service.archive; run on
    SQLite (BEGIN IMMEDIATE, sqlite.org/lang_transaction.html) and PostgreSQL (advisory locks,
    PostgreSQL docs "Advisory Locks")."""
    server = serve(database_url, workers=2)
    acknowledged: dict[str, dict[str, Any]] = {}
    failures: list[str] = []
    lock = threading.Lock()
    threads = [
        threading.Thread(target=post_many, args=(server.base_url, n, acknowledged, failures, lock))
        for n in range(CLIENTS)
    ]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=240)
    assert not any(thread.is_alive() for thread in threads), "clients did not finish in time"
    assert failures == []
    assert len(acknowledged) == CLIENTS * POSTS_PER_CLIENT
    assert sorted(entry["seed"] for entry in acknowledged.values()) == sorted(
        n * 1000 + i for n in range(CLIENTS) for i in range(POSTS_PER_CLIENT)
    )

    with httpx.Client(base_url=server.base_url, timeout=30.0) as http:
        listing = http.get("/v1/analyses", params={"limit": 1}).json()
        assert listing["total"] == CLIENTS * POSTS_PER_CLIENT
        for record_id in random.Random(5).sample(sorted(acknowledged), 40):
            fetched = http.get(f"/v1/analyses/{record_id}")
            assert fetched.status_code == 200
            assert fetched.json() == acknowledged[record_id]["record"]

    archive = Archive.open(database_url)
    try:
        items, total = archive.list(limit=10 * CLIENTS * POSTS_PER_CLIENT)
        assert archive.verify_chain() == []
    finally:
        archive.close()
    assert total == len(items) == CLIENTS * POSTS_PER_CLIENT
    ids = [item["id"] for item in items]
    assert len(set(ids)) == len(ids)
    assert set(ids) == set(acknowledged)
    previous = None
    for item in items:
        assert item["previous_record_sha256"] == previous
        chained = {key: item[key] for key in ("inputs_sha256", "result", "created_at", "submitter")}
        chained["previous_record_sha256"] = previous
        assert item["record_sha256"] == hashlib.sha256(rfc8785.dumps(chained)).hexdigest()
        assert item["inputs_sha256"] == hashlib.sha256(rfc8785.dumps(item["inputs"])).hexdigest()
        previous = item["record_sha256"]
