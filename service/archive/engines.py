"""Database engines for the archive: SQLite (WAL, BEGIN IMMEDIATE) and PostgreSQL (psycopg 3)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from sqlalchemy import Connection, Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.pool import StaticPool

# Connections per process: beyond pool_size each extra one is closed after use, and a new
# PostgreSQL login (SCRAM) per request is costly; 4 workers x 20 stay under the server's default
# max_connections of 100 (PostgreSQL docs, "Connections and Authentication").
POSTGRES_POOL_SIZE = 16
POSTGRES_POOL_OVERFLOW = 4


class ArchiveError(Exception):
    """The archive cannot be opened or does not have the expected layout."""



def make_engine(url: str, busy_timeout_ms: int, *, create_directory: bool = True) -> Engine:
    try:
        parsed = make_url(url)
        if parsed.get_backend_name() == "postgresql":
            if parsed.drivername == "postgresql":
                # SQLAlchemy's default PostgreSQL driver is psycopg2; we ship psycopg 3.
                parsed = parsed.set(drivername="postgresql+psycopg")
            # READ COMMITTED: the head of the chain is read by a statement that starts after
            # the advisory lock is held, so it sees the previous writer's commit (PostgreSQL
            # docs, "Read Committed Isolation Level"); a snapshot-per-transaction level would not.
            return create_engine(
                parsed, pool_pre_ping=True, isolation_level="READ COMMITTED",
                pool_size=POSTGRES_POOL_SIZE, max_overflow=POSTGRES_POOL_OVERFLOW,
            )
        if parsed.get_backend_name() != "sqlite":
            return create_engine(parsed, pool_pre_ping=True)
    except SQLAlchemyError as exc:
        raise ArchiveError(f"cannot use database URL {safe_url(url)}: {exc}") from exc
    except ImportError as exc:
        raise ArchiveError(
            f"cannot use database URL {safe_url(url)}: its driver is not installed ({exc.name}); "
            "for PostgreSQL install bioparity[postgres]"
        ) from exc
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
            # First, so that the journal-mode switch below also waits for a lock held by
            # another process instead of failing at once with "database is locked".
            cursor.execute(f"PRAGMA busy_timeout={int(busy_timeout_ms)}")
            if wal:
                cursor.execute("PRAGMA journal_mode=WAL")
            # FULL: a committed record survives power loss, which an archive must promise.
            cursor.execute("PRAGMA synchronous=FULL")
        finally:
            cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:
        conn.exec_driver_sql(conn.get_execution_options().get("sqlite_begin", "BEGIN"))


def safe_url(url: str) -> str:
    try:
        return make_url(url).render_as_string(hide_password=True)
    except SQLAlchemyError:
        return "(an unreadable URL)"
