"""The audit bundle: one zip with the inputs, the record, the report and a manifest of hashes.

The zip is deterministic (fixed member timestamps and permissions, members in name order, one
compression level), so the bundle of a record is byte-identical every time it is built.
"""

from __future__ import annotations

import io
import zipfile
from collections.abc import Mapping, Sequence
from typing import Any

from service.records.hashing import canonical_json, sha256_hex
from service.report.signatures import ordered_signatures

# 1980-01-01 00:00:00 is the earliest time a zip member can carry (MS-DOS date format).
MEMBER_TIME = (1980, 1, 1, 0, 0, 0)
MEMBER_MODE = 0o100644  # regular file, rw-r--r--
COMPRESSION_LEVEL = 9

MANIFEST_NAME = "manifest.json"


def build_bundle(
    record: Mapping[str, Any], report_html: bytes, signatures: Sequence[Any] | None = None
) -> bytes:
    """Zip of inputs.json and record.json (RFC 8785 JSON), report.html and manifest.json; with
    `signatures` (a list, maybe empty) also signatures.json, their RFC 8785 JSON in the order of
    the report (UTC time, then hash).

    inputs.json is the canonical form of `inputs`, so its SHA-256 equals the record's
    inputs_sha256; manifest.json lists the SHA-256 and size of each of the other files.
    """
    files = {
        "inputs.json": canonical_json(record["inputs"]),
        "record.json": canonical_json(dict(record)),
        "report.html": report_html,
    }
    if signatures is not None:
        files["signatures.json"] = canonical_json([dict(s) for s in ordered_signatures(signatures)])
    manifest = {
        "record_id": record.get("id"),
        "inputs_sha256": record["inputs_sha256"],
        "record_sha256": record.get("record_sha256"),
        "files": [
            {"name": name, "bytes": len(data), "sha256": sha256_hex(data)}
            for name, data in sorted(files.items())
        ],
    }
    files[MANIFEST_NAME] = canonical_json(manifest)

    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name in sorted(files):
            info = zipfile.ZipInfo(name, date_time=MEMBER_TIME)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.create_system = 3  # Unix, so external_attr carries the mode bits above
            info.external_attr = MEMBER_MODE << 16
            archive.writestr(info, files[name], compresslevel=COMPRESSION_LEVEL)
    return buffer.getvalue()
