"""Walk the signatures' hash chain, and check the whole archive: records and signatures.

Each signature's signature_sha256 covers the record id and record_sha256 it signs, the signer's
label and printed name, the meaning, the comment, the UTC time and the previous signature's
hash (service.archive.signatures.signature_hash). So an edited field breaks the signature's own
hash; a signature moved to another record breaks its hash, or no longer matches that record's
hash; a deleted or reordered signature breaks the link of the one after it; and a signed record
whose hash changed (re-chained after an edit) no longer matches the hash its signatures carry.
What a chain alone cannot show: removing the newest signatures (nothing follows them to
disagree) — compare `head_signature_sha256` with a copy kept outside the archive for that, as
with `head_record_sha256`.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from service.archive.signatures import MEANINGS, signature_chain_rows, signature_hash
from service.archive.store import Archive
from service.archive.verification import verification_to_json, verify_rows


@dataclass(frozen=True)
class SignatureBreak:
    seq: int
    id: str
    record_id: str
    reason: str  # a short stable code, see _check
    detail: str


@dataclass(frozen=True)
class SignatureVerification:
    signatures: int
    breaks: tuple[SignatureBreak, ...]
    head_signature_sha256: str | None

    @property
    def valid(self) -> bool:
        return not self.breaks


def verify_signature_rows(rows: Iterable[Mapping[str, Any]]) -> SignatureVerification:
    """Check every signature row in chain (seq) order; rows carry the stored column values and
    `current_record_sha256`, the hash of the named record now (None when it is missing)."""
    breaks: list[SignatureBreak] = []
    previous: str | None = None
    count = 0
    for row in rows:
        count += 1
        breaks.extend(_check(row, previous))
        previous = row["signature_sha256"]
    return SignatureVerification(count, tuple(breaks), previous)


def archive_verification(archive: Archive) -> dict[str, Any]:
    """The answer of GET /v1/archive/verification and `archive verify`: the records' fields as
    before (service.archive.verification), the signatures' beside them, and `valid` for both."""
    answer = verification_to_json(verify_rows(archive.chain_rows()))
    signed = verify_signature_rows(signature_chain_rows(archive))
    first = signed.breaks[0] if signed.breaks else None
    answer.update({
        "valid": answer["valid"] and signed.valid,
        "signatures": signed.signatures,
        "first_signature_break": None if first is None else {
            "seq": first.seq, "id": first.id, "record_id": first.record_id,
            "reason": first.reason, "detail": first.detail,
        },
        "signature_breaks": len(signed.breaks),
        "head_signature_sha256": signed.head_signature_sha256,
        "signatures_checked": "for every signature in order: the link to the previous signature "
        "hash, the signature hash over record_id, record_sha256, signer, printed_name, meaning, "
        "comment, signed_at and previous_signature_sha256, and that the signed record exists "
        "with that record_sha256",
    })
    return answer


def _check(row: Mapping[str, Any], previous: str | None) -> list[SignatureBreak]:
    found: list[SignatureBreak] = []

    def add(reason: str, detail: str) -> None:
        found.append(SignatureBreak(int(row["seq"]), str(row["id"]), str(row["record_id"]),
                                    reason, detail))

    if row["previous_signature_sha256"] != previous:
        add("broken_link", "previous_signature_sha256 is not the hash of the signature before "
            "it: a signature was removed, inserted or moved")
    expected = signature_hash(
        record_id=row["record_id"],
        record_sha256=row["record_sha256"],
        signer=row["signer"],
        printed_name=row["printed_name"],
        meaning=row["meaning"],
        comment=row["comment"],
        signed_at=row["signed_at"],
        previous_signature_sha256=row["previous_signature_sha256"],
    )
    if expected != row["signature_sha256"]:
        add("signature_hash_mismatch", "the signature hash does not match record_id, "
            "record_sha256, signer, printed_name, meaning, comment, signed_at and "
            "previous_signature_sha256 as stored")
    if row["current_record_sha256"] is None:
        add("record_missing", "the signed record is not in the archive")
    elif row["current_record_sha256"] != row["record_sha256"]:
        add("record_mismatch", "the signed record's record_sha256 is not the hash this signature "
            "was given for")
    if row["meaning"] not in MEANINGS:
        add("unknown_meaning", f"meaning must be one of {', '.join(MEANINGS)}")
    return found
