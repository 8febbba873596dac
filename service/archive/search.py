"""Finding records for the archive index: newest first, filtered in the database.

Title and analyte are read out of the stored inputs with the database's own JSON functions
(json_extract on SQLite, ->> on PostgreSQL), so a page never loads the measurement tables. A
verdict is found in the stored result text: RFC 8785 JSON has no optional whitespace and escapes
every quote inside a string, so `"verdict":"within_limits"` occurs only as a verdict key and its
value, never inside user text.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sqlalchemy import JSON, ColumnElement, Select, String, cast, func, literal, select
from sqlalchemy.dialects import postgresql

from service.archive.store import Archive, records
from service.records.hashing import load_canonical

VERDICTS = ("within_limits", "not_within_limits", "undetermined")


@dataclass(frozen=True)
class RecordFilter:
    text: str | None = None            # in the title or the analyte, letter case ignored
    verdict: str | None = None         # one of VERDICTS, for any metric's analysis
    submitter: str | None = None       # exactly
    created_from: str | None = None    # archive timestamp text, inclusive
    created_before: str | None = None  # archive timestamp text, exclusive
    inputs_sha256: str | None = None   # exactly


@dataclass(frozen=True)
class RecordSummary:
    id: str
    created_at: str
    submitter: str
    inputs_sha256: str
    title: str
    analyte: str
    result: dict[str, Any]


def find_records(
    archive: Archive, where: RecordFilter, *, limit: int, offset: int
) -> tuple[list[RecordSummary], int]:
    """One page of matching records, newest first, and the number of matches over all pages."""
    dialect = archive.engine.dialect.name
    title, analyte = _study_text(dialect, "title"), _study_text(dialect, "analyte")
    conditions = _conditions(where, title, analyte)
    page: Select[Any] = (
        select(records.c.id, records.c.created_at, records.c.submitter, records.c.inputs_sha256,
               title.label("title"), analyte.label("analyte"), records.c.result)
        .where(*conditions).order_by(records.c.seq.desc()).limit(limit).offset(offset)
    )
    count = select(func.count()).select_from(records).where(*conditions)
    with archive.engine.connect() as conn, conn.begin():
        total = conn.execute(count).scalar_one()
        rows = conn.execute(page).all()
    return [
        RecordSummary(row.id, row.created_at, row.submitter, row.inputs_sha256,
                      str(row.title or ""), str(row.analyte or ""), load_canonical(row.result))
        for row in rows
    ], int(total)


def submitters(archive: Archive) -> list[str]:
    """Every submitter name in the archive, sorted (for the index's choice of submitter)."""
    with archive.engine.connect() as conn:
        names = conn.execute(
            select(records.c.submitter).distinct().order_by(records.c.submitter)
        ).scalars().all()
    return [str(name) for name in names]


def _study_text(dialect: str, field: str) -> ColumnElement[Any]:
    if dialect == "postgresql":
        document: Any = cast(records.c.inputs, postgresql.JSONB)
        extracted: ColumnElement[Any] = document["study"][field].astext
        return extracted
    if dialect == "sqlite":
        return func.json_extract(records.c.inputs, literal(f"$.study.{field}"), type_=String)
    generic: Any = cast(records.c.inputs, JSON)
    text: ColumnElement[Any] = generic["study"][field].as_string()
    return text


def _conditions(
    where: RecordFilter, title: ColumnElement[Any], analyte: ColumnElement[Any]
) -> list[ColumnElement[bool]]:
    conditions: list[ColumnElement[bool]] = []
    if where.text:
        # The plain-text scan first: it is cheap and rules out most rows before any JSON parse.
        conditions.append(records.c.inputs.icontains(_json_escaped(where.text), autoescape=True))
        conditions.append(
            func.coalesce(title, "").icontains(where.text, autoescape=True)
            | func.coalesce(analyte, "").icontains(where.text, autoescape=True)
        )
    if where.verdict:
        conditions.append(records.c.result.contains(f'"verdict":"{where.verdict}"', autoescape=True))
    if where.submitter:
        conditions.append(records.c.submitter == where.submitter)
    if where.created_from:
        conditions.append(records.c.created_at >= where.created_from)
    if where.created_before:
        conditions.append(records.c.created_at < where.created_before)
    if where.inputs_sha256:
        conditions.append(records.c.inputs_sha256 == where.inputs_sha256)
    return conditions


def _json_escaped(text: str) -> str:
    # How the text appears inside an RFC 8785 string: only '"', '\\' and control characters are
    # escaped (RFC 8785 §3.2.2.2), everything else is written as itself.
    out = []
    for ch in text:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ord(ch) < 0x20:
            out.append({"\b": "\\b", "\t": "\\t", "\n": "\\n", "\f": "\\f", "\r": "\\r"}.get(
                ch, f"\\u{ord(ch):04x}"))
        else:
            out.append(ch)
    return "".join(out)
