"""The signatures of a record as the report and the bundle show them, in one fixed order."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from service.report.formatting import DASH, text

MEANING_WORDS = {"reviewed": "Reviewed", "approved": "Approved", "rejected": "Rejected"}
_TEXT_FIELDS = ("printed_name", "signer", "meaning", "signed_at", "record_sha256",
                "signature_sha256")


def ordered_signatures(signatures: Sequence[Any]) -> list[Mapping[str, Any]]:
    """The signatures checked and sorted by UTC time, then hash: the same list in any order
    gives the same report and the same signatures.json. Raises ValueError naming the field."""
    for index, signature in enumerate(signatures):
        if not isinstance(signature, Mapping):
            raise ValueError(f"signatures[{index}]: expected a JSON object")
        for key in _TEXT_FIELDS:
            if not isinstance(signature.get(key), str):
                raise ValueError(f"signatures[{index}].{key}: missing or not a string")
        if not isinstance(signature.get("comment"), str | None):
            raise ValueError(f"signatures[{index}].comment: not a string")
    return sorted(signatures, key=lambda s: (s["signed_at"], s["signature_sha256"]))


def signatures_view(
    signatures: Sequence[Any] | None, record: Mapping[str, Any]
) -> dict[str, Any] | None:
    """The "Signatures" section, or None when the caller has no signatures to show (a record
    that is not archived)."""
    if signatures is None:
        return None
    record_sha256 = text(record.get("record_sha256"))
    return {
        "record_sha256": record_sha256 or "not archived",
        "rows": [
            {
                "printed_name": s["printed_name"],
                "signer": s["signer"],
                "meaning": MEANING_WORDS.get(s["meaning"], s["meaning"]),
                "signed_at": s["signed_at"],
                "comment": s.get("comment") or DASH,
                "signature_sha256": s["signature_sha256"],
                "bound": s["record_sha256"] == record_sha256,
            }
            for s in ordered_signatures(signatures)
        ],
    }
