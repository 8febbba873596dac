"""Walk the archive's hash chain and say whether, and where, the stored rows were changed.

Each row's record_sha256 covers inputs_sha256, result, created_at, submitter and the previous
row's record_sha256 (service.archive.chain.record_hash); inputs_sha256 is the SHA-256 of the stored
RFC 8785 inputs text. So an edited result, submitter or timestamp breaks the row's own hash, an
edited inputs text breaks its inputs hash, and a deleted or reordered row breaks the link of the
row after it. What a chain alone cannot show: removing the newest rows (nothing follows them to
disagree) — compare `head_record_sha256` with a copy kept outside the archive for that.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from service.archive.chain import record_hash
from service.records.hashing import canonical_json, load_canonical, sha256_hex


@dataclass(frozen=True)
class Break:
    seq: int
    id: str
    reason: str  # a short stable code, see _check
    detail: str


@dataclass(frozen=True)
class Verification:
    records: int
    breaks: tuple[Break, ...]
    head_record_sha256: str | None

    @property
    def valid(self) -> bool:
        return not self.breaks


def verify_rows(rows: Iterable[Mapping[str, Any]]) -> Verification:
    """Check every row in chain (seq) order; rows carry the raw column text."""
    breaks: list[Break] = []
    previous: str | None = None
    count = 0
    for row in rows:
        count += 1
        breaks.extend(_check(row, previous))
        previous = row["record_sha256"]
    return Verification(count, tuple(breaks), previous)


def verification_to_json(v: Verification) -> dict[str, Any]:
    first = v.breaks[0] if v.breaks else None
    return {
        "valid": v.valid,
        "records": v.records,
        "first_break": None if first is None else {
            "seq": first.seq, "id": first.id, "reason": first.reason, "detail": first.detail,
        },
        "breaks": len(v.breaks),
        "head_record_sha256": v.head_record_sha256,
        "checked": "for every record in order: the link to the previous record hash, the record "
        "hash over inputs_sha256, result, created_at, submitter and previous_record_sha256, the "
        "SHA-256 of the stored inputs text, and that the stored engine equals result.engine",
    }


def _check(row: Mapping[str, Any], previous: str | None) -> list[Break]:
    seq, record_id = int(row["seq"]), str(row["id"])
    found: list[Break] = []

    def add(reason: str, detail: str) -> None:
        found.append(Break(seq, record_id, reason, detail))

    if row["previous_record_sha256"] != previous:
        add("broken_link", "previous_record_sha256 is not the record hash of the record before "
            "it: a record was removed, inserted or moved")
    if sha256_hex(str(row["inputs"]).encode("utf-8")) != row["inputs_sha256"]:
        add("inputs_hash_mismatch", "the stored inputs do not hash to inputs_sha256")
    else:
        try:
            if canonical_json(load_canonical(row["inputs"])).decode("utf-8") != row["inputs"]:
                add("inputs_not_canonical", "the stored inputs text is not in RFC 8785 form")
        except (ValueError, TypeError):
            add("inputs_unreadable", "the stored inputs are not JSON")
    try:
        result = load_canonical(row["result"])
    except (ValueError, TypeError):
        add("result_unreadable", "the stored result is not JSON")
        return found
    expected = record_hash(
        inputs_sha256=row["inputs_sha256"],
        result=result,
        created_at=row["created_at"],
        submitter=row["submitter"],
        previous_record_sha256=row["previous_record_sha256"],
    )
    if expected != row["record_sha256"]:
        add("record_hash_mismatch", "the record hash does not match inputs_sha256, result, "
            "created_at, submitter and previous_record_sha256 as stored")
        return found  # an edited result explains a differing engine column too
    engine = result.get("engine", {}) if isinstance(result, dict) else None
    if "engine" in row and canonical_json(engine).decode("utf-8") != row["engine"]:
        add("engine_mismatch", "the stored engine column differs from result.engine")
    return found
