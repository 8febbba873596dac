"""The archive of analysis records: append-only, hash-chained, the only module that speaks SQL."""

from __future__ import annotations

import json
import uuid
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy import (
    Column,
    Connection,
    Engine,
    Integer,
    MetaData,
    String,
    Table,
    Text,
    create_engine,
    event,
    func,
    inspect,
    select,
    text,
)
from sqlalchemy.engine import make_url
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.pool import StaticPool

from service.hashing import canonical_json, sha256_hex

SCHEMA_VERSION = 1

# Key of the PostgreSQL transaction-level advisory lock that serialises appends to the chain
# (an arbitrary constant of our own; any two writers of one archive must use the same one).
CHAIN_LOCK_KEY = 0x62696F70  # "biop"

metadata = MetaData()

schema_version = Table(
    "schema_version",
    metadata,
    Column("version", Integer, nullable=False),
)

records = Table(
    "records",
    metadata,
    Column("seq", Integer, primary_key=True, autoincrement=True),
    Column("id", String(64), nullable=False, unique=True),
    Column("created_at", String(32), nullable=False),
    Column("inputs_sha256", String(64), nullable=False, index=True),
    Column("inputs", Text, nullable=False),
    Column("result", Text, nullable=False),
    Column("engine", Text, nullable=False),
    Column("submitter", Text, nullable=False, server_default="unauthenticated"),
    Column("record_sha256", String(64), nullable=False),
    Column("previous_record_sha256", String(64), nullable=True),
    sqlite_autoincrement=True,
)


class ArchiveError(Exception):
    """The archive cannot be opened or does not have the expected layout."""


@dataclass(frozen=True)
class ChainBreak:
    seq: int
    id: str
    problem: str


def record_hash(
    *,
    inputs_sha256: str,
    result: Any,
    created_at: str,
    submitter: str,
    previous_record_sha256: str | None,
) -> str:
    """SHA-256 of the RFC 8785 form of the chained fields (tamper evidence for the archive)."""
    chained = {
        "inputs_sha256": inputs_sha256,
        "result": result,
        "created_at": created_at,
        "submitter": submitter,
        "previous_record_sha256": previous_record_sha256,
    }
    return sha256_hex(canonical_json(chained))


def utc_timestamp() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


class Archive:
    """Append-only store of records. Use `Archive.create(url)` or `Archive.open(url)`."""

    def __init__(self, engine: Engine) -> None:
        self._engine = engine

    @classmethod
    def create(cls, url: str, *, busy_timeout_ms: int = 10_000) -> Archive:
        """Open the archive at `url`, creating its tables (and SQLite file) when missing."""
        archive = cls(_make_engine(url, busy_timeout_ms))
        try:
            with archive._engine.connect() as conn, _append_lock(conn):
                metadata.create_all(conn)
                versions = conn.execute(select(schema_version.c.version)).scalars().all()
                if not versions:
                    conn.execute(schema_version.insert().values(version=SCHEMA_VERSION))
                    versions = [SCHEMA_VERSION]
            _check_version(versions)
        except SQLAlchemyError as exc:
            archive.close()
            raise ArchiveError(f"cannot create the archive at {_safe_url(url)}: {exc}") from exc
        except BaseException:
            archive.close()
            raise
        return archive

    @classmethod
    def open(cls, url: str, *, busy_timeout_ms: int = 10_000) -> Archive:
        """Open an existing archive; raise ArchiveError when `url` holds none."""
        archive = cls(_make_engine(url, busy_timeout_ms, create_directory=False))
        try:
            with archive._engine.connect() as conn:
                tables = set(inspect(conn).get_table_names())
                if not {"schema_version", "records"} <= tables:
                    raise ArchiveError(f"no bioparity archive at {_safe_url(url)}")
                versions = conn.execute(select(schema_version.c.version)).scalars().all()
            _check_version(versions)
        except SQLAlchemyError as exc:
            archive.close()
            raise ArchiveError(f"cannot open the archive at {_safe_url(url)}: {exc}") from exc
        except BaseException:
            archive.close()
            raise
        return archive

    def close(self) -> None:
        self._engine.dispose()

    def insert(
        self, record: Mapping[str, Any], submitter: str = "unauthenticated"
    ) -> dict[str, Any]:
        """Append `record` ({"inputs_sha256", "inputs", "result"}) and return it as stored."""
        inputs_text = canonical_json(record["inputs"])
        if sha256_hex(inputs_text) != record["inputs_sha256"]:
            raise ValueError("inputs_sha256 does not match the canonical form of inputs")
        result_text = canonical_json(record["result"])
        # Re-read from the canonical text so the stored and the returned record are one object.
        result = json.loads(result_text)
        engine_text = canonical_json(result.get("engine", {}))
        with self._engine.connect() as conn, _append_lock(conn):
            previous = conn.execute(
                select(records.c.record_sha256).order_by(records.c.seq.desc()).limit(1)
            ).scalar_one_or_none()
            created_at = utc_timestamp()
            row = {
                "id": uuid.uuid4().hex,
                "created_at": created_at,
                "inputs_sha256": record["inputs_sha256"],
                "inputs": inputs_text.decode("utf-8"),
                "result": result_text.decode("utf-8"),
                "engine": engine_text.decode("utf-8"),
                "submitter": submitter,
                "record_sha256": record_hash(
                    inputs_sha256=record["inputs_sha256"],
                    result=result,
                    created_at=created_at,
                    submitter=submitter,
                    previous_record_sha256=previous,
                ),
                "previous_record_sha256": previous,
            }
            conn.execute(records.insert().values(**row))
        return _to_record(row)

    def get(self, record_id: str) -> dict[str, Any] | None:
        with self._engine.connect() as conn:
            row = conn.execute(select(*_RECORD_COLUMNS).where(records.c.id == record_id)).first()
        return None if row is None else _to_record(row._asdict())

    def verify_chain(self) -> list[ChainBreak]:
        """Recompute every record hash and link; an empty list means the chain is intact."""
        breaks: list[ChainBreak] = []
        previous: str | None = None
        with self._engine.connect() as conn, conn.begin():
            rows = conn.execute(select(records.c.seq, *_RECORD_COLUMNS).order_by(records.c.seq))
            for row in rows:
                values = row._asdict()
                if values["previous_record_sha256"] != previous:
                    breaks.append(ChainBreak(values["seq"], values["id"], "broken link"))
                expected = record_hash(
                    inputs_sha256=values["inputs_sha256"],
                    result=json.loads(values["result"]),
                    created_at=values["created_at"],
                    submitter=values["submitter"],
                    previous_record_sha256=values["previous_record_sha256"],
                )
                if expected != values["record_sha256"]:
                    breaks.append(ChainBreak(values["seq"], values["id"], "record hash mismatch"))
                if sha256_hex(values["inputs"].encode("utf-8")) != values["inputs_sha256"]:
                    breaks.append(ChainBreak(values["seq"], values["id"], "inputs hash mismatch"))
                previous = values["record_sha256"]
        return breaks

    def list(
        self, inputs_sha256: str | None = None, limit: int = 50, offset: int = 0
    ) -> tuple[list[dict[str, Any]], int]:
        """Records in insertion order, optionally only those with the given inputs hash."""
        page = select(*_RECORD_COLUMNS).order_by(records.c.seq).limit(limit).offset(offset)
        count = select(func.count()).select_from(records)
        if inputs_sha256 is not None:
            page = page.where(records.c.inputs_sha256 == inputs_sha256)
            count = count.where(records.c.inputs_sha256 == inputs_sha256)
        # One read transaction, so `total` and the page describe the same state.
        with self._engine.connect() as conn, conn.begin():
            total = conn.execute(count).scalar_one()
            rows = conn.execute(page).all()
        return [_to_record(row._asdict()) for row in rows], int(total)


_RECORD_COLUMNS = (
    records.c.id,
    records.c.created_at,
    records.c.inputs_sha256,
    records.c.inputs,
    records.c.result,
    records.c.submitter,
    records.c.record_sha256,
    records.c.previous_record_sha256,
)


def _to_record(row: Mapping[str, Any]) -> dict[str, Any]:
    return {
        "id": row["id"],
        "created_at": row["created_at"],
        "inputs_sha256": row["inputs_sha256"],
        "inputs": json.loads(row["inputs"]),
        "result": json.loads(row["result"]),
        "submitter": row["submitter"],
        "record_sha256": row["record_sha256"],
        "previous_record_sha256": row["previous_record_sha256"],
    }


@contextmanager
def _append_lock(conn: Connection) -> Iterator[None]:
    """A write transaction that holds the archive-wide append lock until commit.

    SQLite: BEGIN IMMEDIATE takes the write lock before the previous hash is read.
    PostgreSQL: a transaction-level advisory lock does the same job across processes.
    """
    if conn.dialect.name == "sqlite":
        conn.execution_options(sqlite_begin="BEGIN IMMEDIATE")
    with conn.begin():
        if conn.dialect.name == "postgresql":
            conn.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": CHAIN_LOCK_KEY})
        yield


def _make_engine(url: str, busy_timeout_ms: int, *, create_directory: bool = True) -> Engine:
    try:
        parsed = make_url(url)
        if parsed.get_backend_name() != "sqlite":
            return create_engine(url, pool_pre_ping=True)
    except SQLAlchemyError as exc:
        raise ArchiveError(f"cannot use database URL {_safe_url(url)}: {exc}") from exc
    database = parsed.database or ""
    in_memory = database in ("", ":memory:") or database.startswith("file::memory:")
    if in_memory:
        # One shared connection, or every pooled connection would see its own empty database.
        engine = create_engine(
            url, poolclass=StaticPool, connect_args={"check_same_thread": False}
        )
    else:
        path = Path(database)
        if create_directory:
            path.parent.mkdir(parents=True, exist_ok=True)
        elif not path.exists():
            raise ArchiveError(f"no archive file at {path}")
        engine = create_engine(url, connect_args={"check_same_thread": False})
    _configure_sqlite(engine, busy_timeout_ms, wal=not in_memory)
    return engine


def _configure_sqlite(engine: Engine, busy_timeout_ms: int, *, wal: bool) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        # Let SQLAlchemy, not the sqlite3 module, issue BEGIN, so a writer can ask for
        # BEGIN IMMEDIATE (the documented pysqlite recipe for explicit transactions).
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        try:
            if wal:
                cursor.execute("PRAGMA journal_mode=WAL")
            # FULL: a committed record survives power loss, which an archive must promise.
            cursor.execute("PRAGMA synchronous=FULL")
            cursor.execute(f"PRAGMA busy_timeout={int(busy_timeout_ms)}")
        finally:
            cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:
        conn.exec_driver_sql(conn.get_execution_options().get("sqlite_begin", "BEGIN"))


def _check_version(versions: list[int] | Any) -> None:
    found = list(versions)
    if found != [SCHEMA_VERSION]:
        raise ArchiveError(
            f"archive schema version {found} is not supported (this build reads {SCHEMA_VERSION})"
        )


def _safe_url(url: str) -> str:
    try:
        return make_url(url).render_as_string(hide_password=True)
    except SQLAlchemyError:
        return "(an unreadable URL)"
