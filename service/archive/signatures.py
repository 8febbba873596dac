"""Signatures of archived records: who signed, when, and what the signature means.

A signature is an append-only row bound to the exact record it signs. Its signature_sha256
covers the record's id and record_sha256, the signer's key label and printed name, the meaning,
the comment, the UTC time and the previous signature's hash, so the signatures form a hash chain
beside the records' chain (service.archive.signature_verification walks it). Signatures are
appended under the archive-wide append lock, one at a time; nothing here updates or deletes one.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterable, Iterator, Mapping
from typing import Any, Literal

from sqlalchemy import Connection, select
from sqlalchemy.exc import IntegrityError

from service.archive.roles import role_allows
from service.archive.store import Archive, api_keys, records, signatures, utc_timestamp
from service.records.hashing import canonical_json, sha256_hex

MEANINGS = ("reviewed", "approved", "rejected")
STATUSES = ("unsigned", *MEANINGS)
MAX_COMMENT_LENGTH = 2000

# Why a signature was refused; the HTTP layer maps each kind to a status.
RefusalKind = Literal[
    "invalid", "unknown_record", "not_a_signer", "self_signing", "stale_record", "duplicate"
]

_PUBLIC_COLUMNS = (
    signatures.c.id,
    signatures.c.record_id,
    signatures.c.record_sha256,
    signatures.c.signer,
    signatures.c.printed_name,
    signatures.c.meaning,
    signatures.c.comment,
    signatures.c.signed_at,
    signatures.c.signature_sha256,
    signatures.c.previous_signature_sha256,
)


class SigningRefused(Exception):
    """A signature cannot be given; `problems` lists (field, message) pairs."""

    def __init__(self, kind: RefusalKind, detail: str, problems: list[tuple[str, str]]) -> None:
        super().__init__(detail)
        self.kind = kind
        self.detail = detail
        self.problems = problems


def signature_hash(
    *,
    record_id: str,
    record_sha256: str,
    signer: str,
    printed_name: str,
    meaning: str,
    comment: str | None,
    signed_at: str,
    previous_signature_sha256: str | None,
) -> str:
    """SHA-256 of the RFC 8785 form of the signed fields (tamper evidence for signatures)."""
    chained = {
        "record_id": record_id,
        "record_sha256": record_sha256,
        "signer": signer,
        "printed_name": printed_name,
        "meaning": meaning,
        "comment": comment,
        "signed_at": signed_at,
        "previous_signature_sha256": previous_signature_sha256,
    }
    return sha256_hex(canonical_json(chained))


def normalize_comment(comment: str | None) -> str | None:
    """Line ends as \\n, no surrounding blank space; an empty comment is None."""
    if comment is None:
        return None
    cleaned = comment.replace("\r\n", "\n").replace("\r", "\n").strip()
    return cleaned or None


def signature_problems(meaning: Any, comment: str | None) -> list[tuple[str, str]]:
    """Every problem of a signing request's meaning and (normalized) comment, or []."""
    problems: list[tuple[str, str]] = []
    if meaning not in MEANINGS:
        problems.append(("meaning", f"must be one of {', '.join(MEANINGS)}"))
    if comment is not None:
        if len(comment) > MAX_COMMENT_LENGTH:
            problems.append(("comment", f"longer than {MAX_COMMENT_LENGTH} characters"))
        if any(not (ch.isprintable() or ch in "\n\t") for ch in comment):
            problems.append(("comment", "holds control characters; use plain text"))
    elif meaning == "rejected":
        problems.append(("comment", "a rejection needs a comment that says why"))
    return problems


def add_signature(
    archive: Archive,
    *,
    record_id: str,
    signer: str,
    meaning: str,
    comment: str | None,
    record_sha256: str,
) -> dict[str, Any]:
    """Append the signature of the key labelled `signer` to the record and return it.

    `record_sha256` is the hash the signer saw: it must be the record's hash now. Raises
    SigningRefused when the request is invalid, the record unknown, the key not allowed to sign
    (revoked, a role without signing, no printed name), the signer the record's submitter, the
    hash stale, or this signer gave this meaning to this record before."""
    comment = normalize_comment(comment)
    problems = signature_problems(meaning, comment)
    if problems:
        raise SigningRefused("invalid", "the signature request has problems", problems)
    try:
        with archive.appending() as conn:
            return _append_signature(conn, record_id, signer, meaning, comment, record_sha256)
    except IntegrityError:
        # The unique (record, signer, meaning) constraint backs up the check made under the lock.
        raise _duplicate(signer, meaning) from None


def _append_signature(
    conn: Connection, record_id: str, signer: str, meaning: str, comment: str | None,
    record_sha256: str,
) -> dict[str, Any]:
    record = conn.execute(
        select(records.c.record_sha256, records.c.submitter).where(records.c.id == record_id)
    ).first()
    if record is None:
        raise SigningRefused("unknown_record", "no analysis with this id",
                             [("analysis_id", f"unknown analysis {record_id[:64]!r}")])
    key = conn.execute(
        select(api_keys.c.role, api_keys.c.revoked_at, api_keys.c.printed_name)
        .where(api_keys.c.label == signer)
    ).first()
    if key is None or key.revoked_at is not None or not role_allows(key.role, "sign"):
        raise SigningRefused("not_a_signer", f"the key {signer!r} may not sign",
                             [("authorization", "signing needs an active review or admin key")])
    if not key.printed_name:
        raise SigningRefused(
            "not_a_signer", f"the key {signer!r} has no printed name, which every signature shows",
            [("authorization", "make a key with `keys create --name` to sign")])
    if record.submitter == signer:
        raise SigningRefused("self_signing", "a submitter cannot sign a record they submitted",
                             [("authorization", f"{signer!r} submitted this record")])
    if record.record_sha256 != record_sha256:
        raise SigningRefused(
            "stale_record",
            "record_sha256 is not the hash of this record: the signer did not see this record",
            [("record_sha256", f"this record's hash is {record.record_sha256}")])
    earlier = conn.execute(
        select(signatures.c.id).where(
            signatures.c.record_id == record_id, signatures.c.signer == signer,
            signatures.c.meaning == meaning,
        )
    ).first()
    if earlier is not None:
        raise _duplicate(signer, meaning)
    previous = conn.execute(
        select(signatures.c.signature_sha256).order_by(signatures.c.seq.desc()).limit(1)
    ).scalar_one_or_none()
    signed_at = utc_timestamp()
    fields = {
        "record_id": record_id,
        "record_sha256": record_sha256,
        "signer": signer,
        "printed_name": key.printed_name,
        "meaning": meaning,
        "comment": comment,
        "signed_at": signed_at,
        "previous_signature_sha256": previous,
    }
    row = {"id": uuid.uuid4().hex, **fields, "signature_sha256": signature_hash(**fields)}
    conn.execute(signatures.insert().values(**row))
    return row


def _duplicate(signer: str, meaning: str) -> SigningRefused:
    return SigningRefused("duplicate", f"{signer!r} gave this record the meaning {meaning!r} before",
                          [("meaning", f"already {meaning} by this signer")])


def list_signatures(archive: Archive, record_id: str) -> list[dict[str, Any]]:
    """The signatures of one record, in the order they were given."""
    with archive.engine.connect() as conn:
        rows = conn.execute(
            select(*_PUBLIC_COLUMNS).where(signatures.c.record_id == record_id)
            .order_by(signatures.c.seq)
        )
        return [row._asdict() for row in rows]


def get_signature(archive: Archive, record_id: str, signature_id: str) -> dict[str, Any] | None:
    with archive.engine.connect() as conn:
        row = conn.execute(select(*_PUBLIC_COLUMNS).where(
            signatures.c.record_id == record_id, signatures.c.id == signature_id)).first()
    return None if row is None else row._asdict()


def status_of(given: Iterable[Mapping[str, Any]]) -> str:
    """The meaning of the latest of a record's signatures (in the order given), or "unsigned"."""
    status = "unsigned"
    for signature in given:
        status = str(signature["meaning"])
    return status


def latest_status(archive: Archive, record_ids: Iterable[str]) -> dict[str, str]:
    """Each record's latest status: unsigned, or the meaning of its latest signature."""
    wanted = list(dict.fromkeys(record_ids))
    status = dict.fromkeys(wanted, "unsigned")
    with archive.engine.connect() as conn:
        for start in range(0, len(wanted), 500):  # keep each IN list well below driver limits
            rows = conn.execute(
                select(signatures.c.record_id, signatures.c.meaning)
                .where(signatures.c.record_id.in_(wanted[start:start + 500]))
                .order_by(signatures.c.seq)
            )
            for record_id, meaning in rows:
                status[record_id] = meaning
    return status


def signature_chain_rows(archive: Archive) -> Iterator[dict[str, Any]]:
    """Every signature row, raw, in chain (seq) order, with the current record_sha256 of the
    record it names (None when no such record exists) as `current_record_sha256`."""
    current = records.c.record_sha256.label("current_record_sha256")
    query = (
        select(signatures.c.seq, *_PUBLIC_COLUMNS, current)
        .select_from(signatures.outerjoin(records, records.c.id == signatures.c.record_id))
        .order_by(signatures.c.seq)
    )
    with archive.engine.connect() as conn, conn.begin():
        for row in conn.execute(query):
            yield row._asdict()
