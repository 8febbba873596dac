"""The archive of analysis records: append-only, hash-chained; with engines.py, the only code that
speaks SQL."""

from __future__ import annotations

import json
import sqlite3
import threading
import uuid
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, Protocol

from sqlalchemy import (
    Column,
    Connection,
    Engine,
    Integer,
    MetaData,
    PrimaryKeyConstraint,
    Select,
    String,
    Table,
    Text,
    UniqueConstraint,
    bindparam,
    func,
    inspect,
    select,
    text,
)
from sqlalchemy.dialects import sqlite
from sqlalchemy.exc import IntegrityError, SQLAlchemyError
from sqlalchemy.pool import StaticPool

from service.archive.chain import record_hash
from service.archive.engines import ArchiveError as ArchiveError
from service.archive.engines import make_engine, safe_url
from service.archive.verification import verify_rows
from service.records.hashing import (
    CanonicalText,
    RecordTexts,
    canonical_json,
    load_canonical,
    sha256_hex,
)

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

# API keys: only the SHA-256 of each key is kept (service.archive.keys makes and checks the keys).
api_keys = Table(
    "api_keys",
    metadata,
    Column("label", String(200), primary_key=True),
    Column("role", String(16), nullable=False),
    Column("key_sha256", String(64), nullable=False, unique=True),
    Column("created_at", String(32), nullable=False),
    Column("revoked_at", String(32), nullable=True),
    Column("printed_name", String(200), nullable=True),  # shown in signatures; added later
)

# One row per (submitter, Idempotency-Key): the fingerprint of the first request and its record.
idempotency_keys = Table(
    "idempotency_keys",
    metadata,
    Column("submitter", String(200), nullable=False),
    Column("idempotency_key", String(200), nullable=False),
    Column("request_sha256", String(64), nullable=False),
    Column("record_id", String(64), nullable=False),
    Column("created_at", String(32), nullable=False),
    PrimaryKeyConstraint("submitter", "idempotency_key"),
)

# Browser sign-in (service.archive.sessions): the SHA-256 of each session id, never the id itself.
browser_sessions = Table(
    "browser_sessions",
    metadata,
    Column("session_sha256", String(64), primary_key=True),
    Column("label", String(200), nullable=False, index=True),  # the key that signed in
    Column("csrf_token", String(64), nullable=False),
    Column("created_at", String(32), nullable=False),
    Column("last_seen_at", String(32), nullable=False),
)

# Failed sign-ins per client address, kept for the length of the rate-limit window.
sign_in_failures = Table(
    "sign_in_failures",
    metadata,
    Column("seq", Integer, primary_key=True, autoincrement=True),
    Column("client", String(64), nullable=False, index=True),
    Column("failed_at", String(32), nullable=False),
)

# Links that show one report without sign-in (service.archive.shares); the token as SHA-256 only.
share_links = Table(
    "share_links",
    metadata,
    Column("id", String(32), primary_key=True),
    Column("token_sha256", String(64), nullable=False, unique=True),
    Column("record_id", String(64), nullable=False, index=True),
    Column("label", String(200), nullable=True),  # the key that made it; null in open mode
    Column("created_at", String(32), nullable=False),
    Column("expires_at", String(32), nullable=False),
    Column("ended_at", String(32), nullable=True),
)

# Signatures of records (service.archive.signatures): append-only rows in a hash chain of their
# own, each link also covering the signed record's record_sha256. An older archive gets the
# table empty (an empty chain), so it too needs no new schema version.
signatures = Table(
    "signatures",
    metadata,
    Column("seq", Integer, primary_key=True, autoincrement=True),
    Column("id", String(64), nullable=False, unique=True),
    Column("record_id", String(64), nullable=False, index=True),
    Column("record_sha256", String(64), nullable=False),
    Column("signer", String(200), nullable=False),
    Column("printed_name", String(200), nullable=False),
    Column("meaning", String(16), nullable=False),
    Column("comment", Text, nullable=True),
    Column("signed_at", String(32), nullable=False),
    Column("signature_sha256", String(64), nullable=False),
    Column("previous_signature_sha256", String(64), nullable=True),
    UniqueConstraint("record_id", "signer", "meaning"),
    sqlite_autoincrement=True,
)

# Tables added after schema version 1 shipped; open() adds them to an older archive file. They
# hold no chained data, so adding them needs no new schema version.
_ADDED_TABLES = (api_keys, idempotency_keys, browser_sessions, sign_in_failures, share_links,
                 signatures)

# Nullable columns added to tables after schema version 1 shipped; create() and open() add them.
_ADDED_COLUMNS = ((api_keys, "printed_name"),)


class IdempotencyConflict(Exception):
    """An Idempotency-Key was used before, by the same submitter, for a different request."""

    def __init__(self, record_id: str) -> None:
        super().__init__(f"the key was first used for another request (record {record_id})")
        self.record_id = record_id


@dataclass(frozen=True)
class ChainBreak:
    seq: int
    id: str
    problem: str


def utc_timestamp() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


class Archive:
    """Append-only store of records. Use `Archive.create(url)` or `Archive.open(url)`."""

    def __init__(self, engine: Engine) -> None:
        self._engine = engine
        # SQLite: appends run on one connection of the pool kept for them (taken at the first
        # append, given back by close), one at a time in this process; checking a connection
        # out of the pool and back in for every append cost about as much as the INSERT.
        self._appender: Any = None
        self._appender_lock = threading.Lock()
        # SQLite file archives: the lookups made on every request (first_row) run on one
        # sqlite3 connection kept for them, one at a time; a pool checkout and SQLAlchemy's
        # execution layer cost over twenty times the query (about 230 against 10 µs).
        self._reader: Any = None
        self._reader_lock = threading.Lock()
        self._reader_sql: dict[Select[Any], _Compiled] = {}  # a Select hashes by identity

    @classmethod
    def create(cls, url: str, *, busy_timeout_ms: int = 10_000) -> Archive:
        """Open the archive at `url`, creating its tables (and SQLite file) when missing."""
        archive = cls(make_engine(url, busy_timeout_ms))
        try:
            with archive._engine.connect() as conn, _append_lock(conn):
                metadata.create_all(conn)
                _add_missing_columns(conn)
                versions = conn.execute(select(schema_version.c.version)).scalars().all()
                if not versions:
                    conn.execute(schema_version.insert().values(version=SCHEMA_VERSION))
                    versions = [SCHEMA_VERSION]
            _check_version(versions)
        except SQLAlchemyError as exc:
            archive.close()
            raise ArchiveError(f"cannot create the archive at {safe_url(url)}: {exc}") from exc
        except BaseException:
            archive.close()
            raise
        return archive

    @classmethod
    def open(cls, url: str, *, busy_timeout_ms: int = 10_000) -> Archive:
        """Open an existing archive; raise ArchiveError when `url` holds none."""
        archive = cls(make_engine(url, busy_timeout_ms, create_directory=False))
        try:
            with archive._engine.connect() as conn:
                tables = set(inspect(conn).get_table_names())
                if not {"schema_version", "records"} <= tables:
                    raise ArchiveError(f"no bioparity archive at {safe_url(url)}")
                versions = conn.execute(select(schema_version.c.version)).scalars().all()
            _check_version(versions)
            if not {t.name for t in _ADDED_TABLES} <= tables or _columns_missing(archive._engine):
                with archive._engine.connect() as conn, _append_lock(conn):
                    metadata.create_all(conn, tables=list(_ADDED_TABLES))
                    _add_missing_columns(conn)
        except SQLAlchemyError as exc:
            archive.close()
            raise ArchiveError(f"cannot open the archive at {safe_url(url)}: {exc}") from exc
        except BaseException:
            archive.close()
            raise
        return archive

    def close(self) -> None:
        with self._appender_lock:
            if self._appender is not None:
                self._appender.close()  # back to the pool, which dispose() then closes
                self._appender = None
        with self._reader_lock:
            if self._reader is not None:
                self._reader.close()
                self._reader = None
        self._engine.dispose()

    def first_row(
        self, statement: Select[Any], values: Mapping[str, Any] | None = None
    ) -> dict[str, Any] | None:
        """The first row of the read-only `statement` (column name → value), or None, read from
        the archive now: a change committed by any process is seen. `statement` is built once (at
        import) and takes its parameters as bindparams named in `values`; its columns must be of
        types the driver returns as they are (text, integers), as the raw SQLite path applies no
        result processing.

        SQLite files: on the connection kept for these lookups, outside any transaction (each
        SELECT reads the latest commit; WAL readers never wait for the writer). Other databases
        and in-memory SQLite (one shared connection): through SQLAlchemy."""
        if self._engine.dialect.name != "sqlite" or isinstance(self._engine.pool, StaticPool):
            with self._engine.connect() as conn:
                row = conn.execute(statement, dict(values or {})).first()
            return None if row is None else row._asdict()
        compiled = self._reader_sql.get(statement)
        if compiled is None:
            compiled = self._reader_sql.setdefault(statement, _for_sqlite(statement))
        parameters = [(values or {})[name] for name in compiled.names]
        with self._reader_lock:
            cursor = self._kept_connection("_reader").execute(compiled.sql, parameters)
            try:
                found = cursor.fetchone()
            finally:
                cursor.close()
        return None if found is None else dict(
            zip(statement.selected_columns.keys(), found, strict=True))

    @property
    def engine(self) -> Engine:
        """For the few modules that keep their own tables here (service.archive.keys)."""
        return self._engine

    @contextmanager
    def appending(self) -> Iterator[Connection]:
        """A write transaction that holds the archive-wide append lock until it commits (for
        the other chain of the archive, service.archive.signatures)."""
        with self._engine.connect() as conn, _append_lock(conn):
            yield conn

    def _kept_connection(self, slot: str) -> sqlite3.Connection:
        """The sqlite3 connection kept in `slot` ("_appender" or "_reader"), taken from the pool
        at its first use and given back by close; the caller holds the slot's lock."""
        kept = getattr(self, slot)
        if kept is None:
            kept = self._engine.raw_connection()
            setattr(self, slot, kept)
        connection = kept.driver_connection
        if not isinstance(connection, sqlite3.Connection):
            raise ArchiveError("the SQLite archive's connection is not a sqlite3 connection")
        return connection

    @contextmanager
    def _writing(self) -> Iterator[_Writer]:
        """An append transaction holding the append lock (as `appending`). SQLite: straight on
        the sqlite3 connection kept for appends, with the statements compiled once from these
        tables (SQLAlchemy's execution layer was three quarters of an append's CPU time); other
        databases: through SQLAlchemy."""
        if self._engine.dialect.name != "sqlite":
            with self._engine.connect() as conn, _append_lock(conn):
                yield _SqlAlchemyWriter(conn)
            return
        with self._appender_lock:
            connection = self._kept_connection("_appender")
            cursor = connection.cursor()
            cursor.execute("BEGIN IMMEDIATE")  # the write lock, before the head is read
            try:
                yield _SqliteWriter(cursor)
                cursor.execute("COMMIT")
            except BaseException:
                if connection.in_transaction:
                    connection.rollback()
                raise
            finally:
                cursor.close()

    def insert(
        self, record: Mapping[str, Any], submitter: str = "unauthenticated",
        texts: RecordTexts | None = None, *, read_back: bool = True,
    ) -> StoredRecord:
        """Append `record` ({"inputs_sha256", "inputs", "result"}) and return it as stored.
        `texts`: the canonical JSON of its inputs and result where the caller made it already
        (building.build_record_and_texts), so that it is not made twice. `read_back=False`, for
        a caller that only answers with `json_text` and `id` (POST /v1/analyses): inputs and
        result of the returned record are then `record`'s own objects, not read back from the
        stored texts (same content; tuples stay tuples, 1.0 stays a float)."""
        columns = _record_texts(record, texts)
        with self._writing() as writer:
            row = _append(writer, columns, submitter)
        return _to_record(row, None if read_back else record)

    def insert_once(
        self,
        record: Mapping[str, Any],
        *,
        submitter: str,
        idempotency_key: str,
        request_sha256: str,
        texts: RecordTexts | None = None,
        read_back: bool = True,
    ) -> tuple[StoredRecord, bool]:
        """Append `record` unless `submitter` already used `idempotency_key`: then return the
        record of that first request and True (raise IdempotencyConflict if its fingerprint
        differs). The check and the append share the append lock, so two concurrent requests
        with one key archive one record; the primary key of idempotency_keys backs that up.
        `texts` and `read_back` as for insert (a replay is always read back)."""
        columns = _record_texts(record, texts)
        for _attempt in range(2):
            try:
                with self._writing() as writer:
                    earlier = writer.idempotent_row(submitter, idempotency_key)
                    if earlier is not None:
                        return writer.replay(earlier, request_sha256), True
                    row = _append(writer, columns, submitter)
                    writer.add_key({
                        "submitter": submitter, "idempotency_key": idempotency_key,
                        "request_sha256": request_sha256, "record_id": row["id"],
                        "created_at": row["created_at"],
                    })
                return _to_record(row, None if read_back else record), False
            except (IntegrityError, sqlite3.IntegrityError):
                continue  # another writer got there first (no shared lock): read its row
        raise ArchiveError("the idempotency key could not be recorded")

    def find_idempotent(
        self, *, submitter: str, idempotency_key: str, request_sha256: str
    ) -> StoredRecord | None:
        """The record first archived under this key, if any (IdempotencyConflict if the
        request differs); a cheap read before any computing."""
        with self._engine.connect() as conn, conn.begin():
            earlier = _idempotent_row(conn, submitter, idempotency_key)
            return None if earlier is None else _replay(conn, earlier, request_sha256)

    def chain_rows(self) -> Iterator[dict[str, Any]]:
        """Every stored row, raw column text, in chain order (for service.archive.verification)."""
        with self._engine.connect() as conn, conn.begin():
            result = conn.execute(
                select(records.c.seq, records.c.engine, *_RECORD_COLUMNS).order_by(records.c.seq)
            )
            for row in result:
                yield row._asdict()

    def get(self, record_id: str) -> dict[str, Any] | None:
        with self._engine.connect() as conn:
            row = conn.execute(select(*_RECORD_COLUMNS).where(records.c.id == record_id)).first()
        return None if row is None else _to_record(row._asdict())

    def verify_chain(self) -> list[ChainBreak]:
        """Every break of the chain (service.archive.verification); an empty list means intact."""
        found = verify_rows(self.chain_rows()).breaks
        return [ChainBreak(b.seq, b.id, b.reason.replace("_", " ")) for b in found]

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


class StoredRecord(dict[str, Any]):
    """A record as archived, read back from its stored texts; `json_text` is the same record as
    JSON (keys in this order, inputs and result as their stored RFC 8785 texts), made without
    serialising them again."""

    def __init__(self, fields: Mapping[str, Any], json_text: str) -> None:
        super().__init__(fields)
        self.json_text = json_text


_RECORD_KEYS = ("id", "created_at", "inputs_sha256", "inputs", "result", "submitter",
                "record_sha256", "previous_record_sha256")
_TEXT_COLUMNS = ("inputs", "result")  # canonical JSON text


def _to_record(row: Mapping[str, Any], given: Mapping[str, Any] | None = None) -> StoredRecord:
    """The stored row as a record; `given`: the record just appended, whose inputs and result
    stand in for reading the stored texts back (Archive.insert's read_back=False)."""
    fields = {
        key: (load_canonical(row[key]) if given is None else given[key])
        if key in _TEXT_COLUMNS else row[key]
        for key in _RECORD_KEYS
    }
    members = (
        f'"{key}":{row[key] if key in _TEXT_COLUMNS else json.dumps(row[key], ensure_ascii=False)}'
        for key in _RECORD_KEYS
    )
    return StoredRecord(fields, "{" + ",".join(members) + "}")


def _record_texts(record: Mapping[str, Any], texts: RecordTexts | None) -> dict[str, Any]:
    inputs_text = canonical_json(record["inputs"]) if texts is None else texts.inputs
    if sha256_hex(inputs_text) != record["inputs_sha256"]:
        raise ValueError("inputs_sha256 does not match the canonical form of inputs")
    result_text = (canonical_json(record["result"]) if texts is None else texts.result).decode(
        "utf-8")
    return {
        "inputs_sha256": record["inputs_sha256"],
        "inputs": inputs_text.decode("utf-8"),
        "result_text": result_text,
        # The chain hash embeds the text as it is: it is the text verification reads back, and
        # canonical_json(load_canonical(text)) == text.
        "result": CanonicalText(result_text),
        "engine": canonical_json(record["result"].get("engine", {})).decode("utf-8"),
    }


# Built once: SQLAlchemy then finds their compiled SQL in its cache without rebuilding the
# statement and its cache key on every append (a good part of an append's Python time).
_HEAD_HASH = select(records.c.record_sha256).order_by(records.c.seq.desc()).limit(1)
_INSERT_RECORD = records.insert()


def _append(writer: _Writer, texts: Mapping[str, Any], submitter: str) -> dict[str, Any]:
    """Insert one row at the head of the chain; the caller holds the append lock."""
    previous = writer.head()
    created_at = utc_timestamp()
    row = {
        "id": uuid.uuid4().hex,
        "created_at": created_at,
        "inputs_sha256": texts["inputs_sha256"],
        "inputs": texts["inputs"],
        "result": texts["result_text"],
        "engine": texts["engine"],
        "submitter": submitter,
        "record_sha256": record_hash(
            inputs_sha256=texts["inputs_sha256"],
            result=texts["result"],
            created_at=created_at,
            submitter=submitter,
            previous_record_sha256=previous,
        ),
        "previous_record_sha256": previous,
    }
    writer.add_record(row)
    return row


class _Writer(Protocol):
    """The statements of an append, inside Archive._writing's transaction."""

    def head(self) -> str | None: ...
    def add_record(self, row: Mapping[str, Any]) -> None: ...
    def idempotent_row(self, submitter: str, key: str) -> Mapping[str, Any] | None: ...
    def add_key(self, values: Mapping[str, Any]) -> None: ...
    def replay(self, earlier: Mapping[str, Any], request_sha256: str) -> StoredRecord: ...


class _SqlAlchemyWriter:
    def __init__(self, conn: Connection) -> None:
        self._conn = conn

    def head(self) -> str | None:
        return self._conn.execute(_HEAD_HASH).scalar_one_or_none()

    def add_record(self, row: Mapping[str, Any]) -> None:
        self._conn.execute(_INSERT_RECORD, dict(row))

    def idempotent_row(self, submitter: str, key: str) -> Mapping[str, Any] | None:
        return _idempotent_row(self._conn, submitter, key)

    def add_key(self, values: Mapping[str, Any]) -> None:
        self._conn.execute(idempotency_keys.insert().values(**values))

    def replay(self, earlier: Mapping[str, Any], request_sha256: str) -> StoredRecord:
        return _replay(self._conn, earlier, request_sha256)


@dataclass(frozen=True)
class _Compiled:
    sql: str
    names: tuple[str, ...]  # the values of the ? placeholders, in order


def _for_sqlite(statement: Any, **kwargs: Any) -> _Compiled:
    compiled = statement.compile(dialect=sqlite.dialect(paramstyle="qmark"), **kwargs)
    return _Compiled(compiled.string, tuple(compiled.positiontup or ()))


# Every column but seq (which SQLite numbers), as _append fills them.
_STORED_COLUMNS = [column.name for column in records.c if column.name != "seq"]
_KEY_ROW = select(idempotency_keys.c.request_sha256, idempotency_keys.c.record_id).where(
    idempotency_keys.c.submitter == bindparam("submitter"),
    idempotency_keys.c.idempotency_key == bindparam("idempotency_key"),
)
_RECORD_BY_ID = select(*_RECORD_COLUMNS).where(records.c.id == bindparam("record_id"))
_SQLITE_HEAD = _for_sqlite(_HEAD_HASH, compile_kwargs={"literal_binds": True})
_SQLITE_INSERT_RECORD = _for_sqlite(_INSERT_RECORD, column_keys=_STORED_COLUMNS)
_SQLITE_INSERT_KEY = _for_sqlite(idempotency_keys.insert(),
                                 column_keys=[column.name for column in idempotency_keys.c])
_SQLITE_KEY_ROW = _for_sqlite(_KEY_ROW)
_SQLITE_RECORD_BY_ID = _for_sqlite(_RECORD_BY_ID)


class _SqliteWriter:
    def __init__(self, cursor: sqlite3.Cursor) -> None:
        self._cursor = cursor

    def _run(self, statement: _Compiled, values: Mapping[str, Any]) -> sqlite3.Cursor:
        return self._cursor.execute(statement.sql, [values[name] for name in statement.names])

    def head(self) -> str | None:
        found = self._cursor.execute(_SQLITE_HEAD.sql).fetchone()
        return None if found is None else found[0]

    def add_record(self, row: Mapping[str, Any]) -> None:
        self._run(_SQLITE_INSERT_RECORD, row)

    def idempotent_row(self, submitter: str, key: str) -> Mapping[str, Any] | None:
        found = self._run(_SQLITE_KEY_ROW, {"submitter": submitter, "idempotency_key": key}
                          ).fetchone()
        return None if found is None else dict(zip(_KEY_ROW.selected_columns.keys(), found,
                                                   strict=True))

    def add_key(self, values: Mapping[str, Any]) -> None:
        self._run(_SQLITE_INSERT_KEY, values)

    def replay(self, earlier: Mapping[str, Any], request_sha256: str) -> StoredRecord:
        def row_of(record_id: str) -> Mapping[str, Any] | None:
            found = self._run(_SQLITE_RECORD_BY_ID, {"record_id": record_id}).fetchone()
            return None if found is None else dict(
                zip(_RECORD_BY_ID.selected_columns.keys(), found, strict=True))

        return _replayed(earlier, request_sha256, row_of)


def _idempotent_row(conn: Connection, submitter: str, key: str) -> Mapping[str, Any] | None:
    row = conn.execute(_KEY_ROW, {"submitter": submitter, "idempotency_key": key}).first()
    return None if row is None else row._asdict()


def _replay(conn: Connection, earlier: Mapping[str, Any], request_sha256: str) -> StoredRecord:
    def row_of(record_id: str) -> Mapping[str, Any] | None:
        row = conn.execute(_RECORD_BY_ID, {"record_id": record_id}).first()
        return None if row is None else row._asdict()

    return _replayed(earlier, request_sha256, row_of)


def _replayed(
    earlier: Mapping[str, Any], request_sha256: str,
    row_of: Callable[[str], Mapping[str, Any] | None],
) -> StoredRecord:
    """The record first archived under an idempotency key (`earlier`, its key row), read back;
    IdempotencyConflict when this request's fingerprint differs."""
    if earlier["request_sha256"] != request_sha256:
        raise IdempotencyConflict(earlier["record_id"])
    row = row_of(earlier["record_id"])
    if row is None:
        raise ArchiveError(f"record {earlier['record_id']} of an idempotency key is missing")
    return _to_record(row)


def _columns_missing(engine: Engine) -> bool:
    with engine.connect() as conn:
        return any(
            name not in {c["name"] for c in inspect(conn).get_columns(table.name)}
            for table, name in _ADDED_COLUMNS
        )


def _add_missing_columns(conn: Connection) -> None:
    """ALTER TABLE ... ADD COLUMN for each column of _ADDED_COLUMNS an older archive lacks."""
    for table, name in _ADDED_COLUMNS:
        if name not in {c["name"] for c in inspect(conn).get_columns(table.name)}:
            kind = table.c[name].type.compile(dialect=conn.dialect)
            conn.execute(text(f"ALTER TABLE {table.name} ADD COLUMN {name} {kind}"))


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


def _check_version(versions: list[int] | Any) -> None:
    found = list(versions)
    if found != [SCHEMA_VERSION]:
        raise ArchiveError(
            f"archive schema version {found} is not supported (this build reads {SCHEMA_VERSION})"
        )
