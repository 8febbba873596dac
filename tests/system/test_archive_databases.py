"""The archive itself on SQLite and PostgreSQL: one chain under writers in several processes,
tampering found, open() refuses a place without an archive."""

from __future__ import annotations

import hashlib
import multiprocessing
import threading
from typing import Any

import pytest
import rfc8785
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from service.archive.store import Archive, ArchiveError
from tests.conftest import fresh_postgres_schema, postgres_base_url

PROCESSES = 4
THREADS_PER_PROCESS = 4
RECORDS_PER_THREAD = 8


def small_record(tag: str) -> dict[str, Any]:
    inputs: dict[str, Any] = {"records": [{"subject": tag, "value": len(tag)}], "settings": {}}
    return {
        "inputs_sha256": hashlib.sha256(rfc8785.dumps(inputs)).hexdigest(),
        "inputs": inputs,
        "result": {"metrics": [], "warnings": [], "engine": {"name": "bioparity"}},
    }


def write_from_process(url: str, process_number: int) -> None:
    # Each process opens (and possibly creates) the archive itself, as a service worker does.
    archive = Archive.create(url)
    try:
        def write(thread_number: int) -> None:
            for i in range(RECORDS_PER_THREAD):
                archive.insert(small_record(f"p{process_number}-t{thread_number}-{i}"),
                               submitter=f"process-{process_number}")

        threads = [threading.Thread(target=write, args=(t,)) for t in range(THREADS_PER_PROCESS)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
    finally:
        archive.close()


def test_writers_in_several_processes_form_one_chain(database_url: str) -> None:
    """4 processes x 4 threads append at once, each process creating the tables if missing:
    the chain recomputed with hashlib SHA-256 (FIPS 180-4) over rfc8785 canonical JSON
    (RFC 8785) is linear and complete."""
    context = multiprocessing.get_context("spawn")
    processes = [
        context.Process(target=write_from_process, args=(database_url, n)) for n in range(PROCESSES)
    ]
    for process in processes:
        process.start()
    try:
        for process in processes:
            process.join(timeout=120)
            assert process.exitcode == 0
    finally:
        for process in processes:
            if process.is_alive():
                process.kill()
                process.join(timeout=10)
    archive = Archive.open(database_url)
    try:
        items, total = archive.list(limit=1000)
        assert archive.verify_chain() == []
    finally:
        archive.close()
    assert total == PROCESSES * THREADS_PER_PROCESS * RECORDS_PER_THREAD
    tags = sorted(item["inputs"]["records"][0]["subject"] for item in items)
    assert tags == sorted(
        f"p{p}-t{t}-{i}" for p in range(PROCESSES) for t in range(THREADS_PER_PROCESS)
        for i in range(RECORDS_PER_THREAD)
    )
    previous = None
    for item in items:
        chained = {key: item[key] for key in ("inputs_sha256", "result", "created_at", "submitter")}
        chained["previous_record_sha256"] = previous
        assert item["previous_record_sha256"] == previous
        assert item["record_sha256"] == hashlib.sha256(rfc8785.dumps(chained)).hexdigest()
        previous = item["record_sha256"]


def test_tampering_is_found(database_url: str) -> None:
    """An UPDATE behind the archive's back breaks that record's hash (SHA-256 collision
    resistance, FIPS 180-4), on either database."""
    archive = Archive.create(database_url)
    try:
        for i in range(3):
            archive.insert(small_record(f"r{i}"))
        engine = create_engine(database_url)
        try:
            with engine.begin() as conn:
                conn.execute(text("UPDATE records SET result = '{\"metrics\":[]}' WHERE seq = 2"))
        finally:
            engine.dispose()
        assert [(b.seq, b.problem) for b in archive.verify_chain()] == [(2, "record hash mismatch")]
    finally:
        archive.close()


def test_open_needs_an_archive_and_keeps_it(database_url: str) -> None:
    """open() refuses an empty database or schema rather than inventing an archive; what was
    written before is there after reopening (common practice)."""
    with pytest.raises(ArchiveError, match="no bioparity archive|no archive file"):
        Archive.open(database_url)
    created = Archive.create(database_url)
    stored = created.insert(small_record("kept"))
    created.close()
    reopened = Archive.open(database_url)
    try:
        assert reopened.get(stored["id"]) == stored
        assert reopened.list()[1] == 1
    finally:
        reopened.close()


def test_plain_postgresql_url_uses_psycopg() -> None:
    """postgresql://… (SQLAlchemy's default driver name, psycopg2) opens with the psycopg 3
    driver that bioparity ships (SQLAlchemy 2 docs, "PostgreSQL" dialect: +psycopg)."""
    base = postgres_base_url()
    if base is None:
        pytest.skip("set BIOPARITY_TEST_POSTGRES_URL to run the PostgreSQL cases")
    with fresh_postgres_schema(base) as url:
        plain = make_url(url).set(drivername="postgresql").render_as_string(hide_password=False)
        archive = Archive.create(plain)
        try:
            archive.insert(small_record("plain"))
            assert archive.list()[1] == 1
        finally:
            archive.close()
