"""The archive's hash chain: what each record's record_sha256 covers."""

from __future__ import annotations

from typing import Any

from service.records.hashing import canonical_json, sha256_hex


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
