"""The archive below the API: durability settings, the hash chain, concurrent appends."""

from __future__ import annotations

import hashlib
import json
import sqlite3
import threading
from pathlib import Path
from typing import Any

import pytest
import rfc8785

from service.api.settings import DEFAULT_DATABASE_URL, ServiceSettings, database_url_from_argument
from service.archive.store import Archive, ArchiveError, StoredRecord


def small_record(i: int) -> dict[str, Any]:
    inputs: dict[str, Any] = {
        "records": [{"subject": f"S{i:02d}", "value": 0.1 * i}], "settings": {"seed": i}
    }
    return {
        "inputs_sha256": hashlib.sha256(rfc8785.dumps(inputs)).hexdigest(),
        "inputs": inputs,
        "result": {"metrics": [], "warnings": [], "engine": {"name": "bioparity"}},
    }


@pytest.fixture
def archive(tmp_path: Path) -> Any:
    store = Archive.create(f"sqlite:///{tmp_path / 'store' / 'a.sqlite3'}")
    yield store
    store.close()


def test_texts_made_with_the_record_are_stored_as_made_without(
    archive: Archive, tmp_path: Path
) -> None:
    """build_record_and_texts hands the archive the canonical texts it made (RFC 8785, the
    rfc8785 package here): the stored columns are the same as when the archive makes them, and
    texts that do not match the record's inputs hash are refused before anything is written."""
    from service.intake.tables import normalize_request
    from service.records.building import build_record_and_texts

    request = normalize_request({
        "design": {"test": "T", "reference": "R", "baseline": "B"},
        "records": [{"subject": f"S{i}", "period": p, "treatment": t, "value": v + i + 0.25 * p}
                    for i in range(6) for p, (t, v) in enumerate((("B", 5.0), ("R", 9.0),
                                                                  ("T", 9.5)), 1)],
        "settings": {"replicates": 200, "seed": 3},
    })
    record, texts = build_record_and_texts(request)
    assert texts is not None
    assert texts.inputs == rfc8785.dumps(record["inputs"])
    assert texts.result == rfc8785.dumps(record["result"])
    with_texts = archive.insert(record, texts=texts)
    without = archive.insert(record)
    with sqlite3.connect(tmp_path / "store" / "a.sqlite3") as raw:
        rows = raw.execute("SELECT inputs, result, engine FROM records ORDER BY seq").fetchall()
    assert rows[0] == rows[1]
    same = ("inputs_sha256", "inputs", "result", "submitter")
    assert [with_texts[key] for key in same] == [without[key] for key in same]
    assert json.loads(with_texts.json_text)["result"] == json.loads(without.json_text)["result"]
    other = small_record(1)
    with pytest.raises(ValueError, match="inputs_sha256"):
        archive.insert(other, texts=texts)
    assert archive.list()[1] == 2


def test_a_record_not_read_back_answers_with_the_text_a_later_read_gives(
    archive: Archive,
) -> None:
    """read_back=False (the POST path) skips parsing the stored texts again: the JSON the caller
    answers with is still the stored one, byte for byte what a later read of the same record
    writes (json.loads, Python's standard library, reads both), and the scalar columns are the
    stored ones."""
    record = small_record(2)
    record["result"] = {"integral": 3.0, "pair": (1.5, 2.5), "zero": -0.0}
    fresh = archive.insert(record, read_back=False)
    later = archive.get(fresh["id"])
    assert isinstance(later, StoredRecord)
    assert json.loads(fresh.json_text) == json.loads(later.json_text) == {
        key: later[key] for key in later}
    assert fresh.json_text == later.json_text
    assert json.loads(fresh.json_text)["result"] == {"integral": 3, "pair": [1.5, 2.5], "zero": 0}
    assert fresh["result"] is record["result"]
    scalars = ("id", "created_at", "inputs_sha256", "submitter", "record_sha256",
               "previous_record_sha256")
    assert [fresh[key] for key in scalars] == [later[key] for key in scalars]
    first, first_replayed = archive.insert_once(
        record, submitter="lab", idempotency_key="k1", request_sha256="a" * 64, read_back=False)
    again, again_replayed = archive.insert_once(
        record, submitter="lab", idempotency_key="k1", request_sha256="a" * 64, read_back=False)
    assert (first_replayed, again_replayed) == (False, True)
    assert first["result"] is record["result"]
    assert again["result"] == {"integral": 3, "pair": [1.5, 2.5], "zero": 0}  # read back
    assert again.json_text == first.json_text


def test_sqlite_file_layout_and_pragmas(archive: Archive, tmp_path: Path) -> None:
    """WAL journal and one schema_version row = 1 (SQLite documentation, sqlite.org/wal.html and
    sqlite.org/pragma.html#pragma_journal_mode: WAL mode persists in the database file)."""
    archive.insert(small_record(1))
    with sqlite3.connect(tmp_path / "store" / "a.sqlite3") as raw:
        assert raw.execute("PRAGMA journal_mode").fetchone() == ("wal",)
        assert raw.execute("SELECT version FROM schema_version").fetchall() == [(1,)]
        columns = [row[1] for row in raw.execute("PRAGMA table_info(records)")]
    assert columns == [
        "seq", "id", "created_at", "inputs_sha256", "inputs", "result", "engine", "submitter",
        "record_sha256", "previous_record_sha256",
    ]


def test_stored_text_is_canonical(archive: Archive, tmp_path: Path) -> None:
    """The inputs column holds the RFC 8785 text (rfc8785 package), so its SHA-256 (hashlib)
    is the inputs hash."""
    record = small_record(3)
    stored = archive.insert(record, submitter="lab-7")
    with sqlite3.connect(tmp_path / "store" / "a.sqlite3") as raw:
        inputs_text, submitter = raw.execute("SELECT inputs, submitter FROM records").fetchone()
    assert inputs_text.encode() == rfc8785.dumps(record["inputs"])
    assert hashlib.sha256(inputs_text.encode()).hexdigest() == stored["inputs_sha256"]
    assert submitter == stored["submitter"] == "lab-7"
    assert archive.get(stored["id"]) == stored


def test_mismatched_inputs_hash_is_refused(archive: Archive) -> None:
    """A record whose hash is not SHA-256 of its canonical inputs (RFC 8785) is not archived."""
    record = small_record(4)
    record["inputs_sha256"] = "0" * 64
    with pytest.raises(ValueError, match="inputs_sha256"):
        archive.insert(record)
    assert archive.list()[1] == 0


def test_concurrent_appends_form_one_chain(archive: Archive) -> None:
    """Writers on several threads still yield one unbroken chain: each record's predecessor
    hash is the record just before it (hash chain, common practice; SQLite BEGIN IMMEDIATE,
    sqlite.org/lang_transaction.html)."""
    threads = [threading.Thread(target=archive.insert, args=(small_record(i),)) for i in range(16)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    items, total = archive.list(limit=100)
    assert total == 16
    previous = None
    for item in items:
        assert item["previous_record_sha256"] == previous
        chained = {key: item[key] for key in ("inputs_sha256", "result", "created_at", "submitter")}
        chained["previous_record_sha256"] = previous
        assert item["record_sha256"] == hashlib.sha256(rfc8785.dumps(chained)).hexdigest()
        previous = item["record_sha256"]
    assert archive.verify_chain() == []


def test_a_failed_append_leaves_nothing_and_releases_the_lock(
    archive: Archive, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """An append that fails inside its transaction stores no row, and the write lock is free
    again: another connection can take it at once and the next append joins the chain (SQLite
    transactions, sqlite.org/lang_transaction.html: ROLLBACK undoes the transaction's writes)."""
    from service.archive import store

    first = archive.insert(small_record(1))

    def failing_hash(**_: Any) -> str:
        raise RuntimeError("disk went away")

    monkeypatch.setattr(store, "record_hash", failing_hash)
    with pytest.raises(RuntimeError, match="disk went away"):
        archive.insert(small_record(2))
    with pytest.raises(RuntimeError, match="disk went away"):
        archive.insert_once(small_record(3), submitter="lab-1", idempotency_key="k-1",
                            request_sha256="f" * 64)
    monkeypatch.undo()
    with sqlite3.connect(tmp_path / "store" / "a.sqlite3", timeout=0) as other:
        other.execute("BEGIN IMMEDIATE")  # would raise "database is locked" if still held
        assert other.execute("SELECT count(*) FROM records").fetchone() == (1,)
        assert other.execute("SELECT count(*) FROM idempotency_keys").fetchone() == (0,)
        other.execute("ROLLBACK")
    second = archive.insert(small_record(2))
    assert second["previous_record_sha256"] == first["record_sha256"]
    assert archive.verify_chain() == []


def test_a_replayed_key_answers_the_first_record_as_read_back(archive: Archive) -> None:
    """A second request under one Idempotency-Key gets the first record (read back from its
    stored texts), and a different request under it is refused (common practice for
    idempotent POST, IETF draft-ietf-httpapi-idempotency-key-header)."""
    from service.archive.store import IdempotencyConflict

    made, replayed = archive.insert_once(small_record(5), submitter="lab-2",
                                         idempotency_key="k-9", request_sha256="a" * 64)
    again, replayed_again = archive.insert_once(small_record(5), submitter="lab-2",
                                                idempotency_key="k-9", request_sha256="a" * 64)
    assert (replayed, replayed_again) == (False, True)
    assert again == archive.get(made["id"]) == made
    assert again.json_text == made.json_text
    with pytest.raises(IdempotencyConflict):
        archive.insert_once(small_record(6), submitter="lab-2", idempotency_key="k-9",
                            request_sha256="b" * 64)
    assert archive.list()[1] == 1


def test_tampering_is_detected(archive: Archive, tmp_path: Path) -> None:
    """Changing a stored result breaks its record hash (SHA-256 collision resistance,
    FIPS 180-4)."""
    for i in range(3):
        archive.insert(small_record(i))
    with sqlite3.connect(tmp_path / "store" / "a.sqlite3") as raw:
        raw.execute("UPDATE records SET result = '{\"metrics\":[]}' WHERE seq = 2")
    breaks = archive.verify_chain()
    assert [(b.seq, b.problem) for b in breaks] == [(2, "record hash mismatch")]


def test_open_requires_an_archive(tmp_path: Path) -> None:
    """open() does not invent an empty archive where none exists (common practice)."""
    with pytest.raises(ArchiveError, match="no archive"):
        Archive.open(f"sqlite:///{tmp_path / 'missing.sqlite3'}")
    Archive.create(f"sqlite:///{tmp_path / 'made.sqlite3'}").close()
    reopened = Archive.open(f"sqlite:///{tmp_path / 'made.sqlite3'}")
    assert reopened.list() == ([], 0)
    reopened.close()


def test_database_argument(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A plain path becomes an absolute sqlite:/// URL; URLs pass through (SQLAlchemy 2 docs,
    "Database URLs": sqlite:///ABSOLUTE-PATH has the path after the third slash)."""
    monkeypatch.chdir(tmp_path)
    assert database_url_from_argument("x/a.db") == f"sqlite:///{tmp_path / 'x' / 'a.db'}"
    assert database_url_from_argument("postgresql://u@h/db") == "postgresql://u@h/db"
    assert DEFAULT_DATABASE_URL == "sqlite:///./var/bioparity.sqlite3"
    assert ServiceSettings().database_url == DEFAULT_DATABASE_URL
    assert ServiceSettings.from_cli("b.db").database_url == f"sqlite:///{tmp_path / 'b.db'}"
    env = {"BIOPARITY_DATABASE_URL": "c.db", "BIOPARITY_MAX_BODY_BYTES": "99"}
    from_env = ServiceSettings.from_env(env)
    assert from_env.database_url == f"sqlite:///{tmp_path / 'c.db'}"
    assert from_env.max_body_bytes == 99
    with pytest.raises(ValueError, match="BIOPARITY_MAX_RECORDS"):
        ServiceSettings.from_env({"BIOPARITY_MAX_RECORDS": "many"})
