"""Archive.first_row: the per-request lookups (API keys) read what any process committed last,
give what SQLAlchemy gives, and hold no read transaction open between calls."""

from __future__ import annotations

import sqlite3
from pathlib import Path

from sqlalchemy import bindparam, select

from service.archive.keys import active_key_count, create_key, find_key, revoke_key
from service.archive.store import Archive, api_keys

BY_LABEL = select(api_keys.c.label, api_keys.c.role, api_keys.c.revoked_at).where(
    api_keys.c.label == bindparam("label"))


def test_first_row_sees_every_commit_of_another_archive(database_url: str) -> None:
    """A second Archive on the same database stands for another worker process: what it
    commits is seen by the very next lookup of the first, whose lookup connection is open
    already (the contract of service.archive.keys: a key made or revoked anywhere applies to
    the next request)."""
    first = Archive.create(database_url)
    second = Archive.open(database_url)
    try:
        assert active_key_count(first) == 0
        assert first.first_row(BY_LABEL, {"label": "lab-b"}) is None
        key = create_key(second, label="lab-b", role="submit")
        assert active_key_count(first) == 1
        found = find_key(first, key)
        assert found is not None and (found.label, found.role) == ("lab-b", "submit")
        with first.engine.connect() as conn:  # the same row through SQLAlchemy
            expected = conn.execute(BY_LABEL, {"label": "lab-b"}).first()
        assert expected is not None
        assert first.first_row(BY_LABEL, {"label": "lab-b"}) == expected._asdict()
        revoke_key(second, "lab-b")
        assert find_key(first, key) is None
        assert active_key_count(first) == 0
        row = first.first_row(BY_LABEL, {"label": "lab-b"})
        assert row is not None and row["revoked_at"] is not None
    finally:
        first.close()
        second.close()


def test_in_memory_archive_lookups(tmp_path: Path) -> None:
    """In-memory SQLite has one shared connection (StaticPool): lookups go through it."""
    archive = Archive.create("sqlite:///:memory:")
    try:
        key = create_key(archive, label="memory", role="read")
        assert active_key_count(archive) == 1
        found = find_key(archive, key)
        assert found is not None and found.label == "memory"
        assert find_key(archive, key + "x") is None
    finally:
        archive.close()


def test_lookups_leave_no_read_transaction_open(tmp_path: Path) -> None:
    """Between lookups the kept connection holds no snapshot, so a checkpoint can copy the whole
    write-ahead log back and truncate it (SQLite docs, "Write-Ahead Logging" §3.3 and PRAGMA
    wal_checkpoint: a checkpoint stops at the oldest reader's snapshot and then reports busy)."""
    path = tmp_path / "archive.sqlite3"
    archive = Archive.create(f"sqlite:///{path}")
    try:
        for number in range(3):
            create_key(archive, label=f"key-{number}", role="read")
        assert active_key_count(archive) == 3
        # Several rows match, so a lookup that left its statement unfinished would keep a
        # read transaction open.
        assert archive.first_row(select(api_keys.c.label).order_by(api_keys.c.label)) == {
            "label": "key-0"}
        create_key(archive, label="key-3", role="read")  # more log after the lookups
        outside = sqlite3.connect(path)
        try:
            busy, log_frames, copied = outside.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()
        finally:
            outside.close()
        assert busy == 0 and log_frames == copied
        assert active_key_count(archive) == 4
    finally:
        archive.close()


def test_close_then_reopen(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'archive.sqlite3'}"
    archive = Archive.create(url)
    key = create_key(archive, label="kept", role="admin")
    assert find_key(archive, key) is not None
    archive.close()
    again = Archive.open(url)
    try:
        found = find_key(again, key)
        assert found is not None and found.role == "admin"
    finally:
        again.close()
