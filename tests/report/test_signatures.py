"""The "Signatures" section of the report and signatures.json of the bundle, from given lists."""

from __future__ import annotations

import hashlib
import io
import json
import zipfile
from typing import Any

import pytest
import rfc8785

from service.report.bundles import build_bundle
from service.report.rendering import render_report
from tests.report.fixtures import hand_record

RECORD_SHA256 = "ab" * 32


def archived_record() -> dict[str, Any]:
    return {**hand_record(), "id": "1" * 32, "created_at": "2026-01-05T09:00:00.000000Z",
            "record_sha256": RECORD_SHA256, "submitter": "lab-7"}


def signature(n: int, meaning: str, comment: str | None = None, **changes: Any) -> dict[str, Any]:
    return {"id": f"{n:032x}", "record_id": "1" * 32, "record_sha256": RECORD_SHA256,
            "signer": f"key-{n}", "printed_name": f"Person {n}", "meaning": meaning,
            "comment": comment, "signed_at": f"2026-01-0{n}T10:00:00.000000Z",
            "signature_sha256": f"{n:064x}", "previous_signature_sha256": None, **changes}


def section(html: bytes) -> str:
    text = html.decode()
    return text[text.index('<section id="signatures"'):text.index('<section id="verdicts"')]


def test_without_signatures_argument_the_report_has_no_section() -> None:
    """render_report(record) of a record that is not archived (the command line) has no
    Signatures section; with an empty list it says there are none (issue 13)."""
    record = archived_record()
    assert 'id="signatures"' not in render_report(record).decode()
    assert 'href="#signatures"' not in render_report(record).decode()
    empty = render_report(record, [])
    assert "No signatures yet." in section(empty) and 'href="#signatures"' in empty.decode()


def test_rows_show_who_when_and_what_in_time_order() -> None:
    """Each row shows printed name, key, meaning, UTC time and comment (21 CFR 11.50(a)); the
    same signatures in any order give the same bytes; text is HTML-escaped (HTML Living
    Standard §13.1.3) and bidirectional controls are shown as code points (Unicode UAX #9,
    CVE-2021-42574), as elsewhere in the report."""
    record = archived_record()
    given = [signature(3, "approved"),
             signature(1, "reviewed", comment="<b>ok</b> \u202eevil"),
             signature(2, "rejected", comment="first line\nsecond line")]
    html = render_report(record, given)
    assert render_report(record, list(reversed(given))) == html
    shown = section(html)
    positions = [shown.index(f"Person {n}") for n in (1, 2, 3)]
    assert positions == sorted(positions)
    for n, word in ((1, "Reviewed"), (2, "Rejected"), (3, "Approved")):
        row = shown[shown.index(f"Person {n}"):].split("</tr>")[0]
        assert f"key-{n}" in row and word in row and f"2026-01-0{n}T10:00:00.000000Z" in row
    assert "&lt;b&gt;ok&lt;/b&gt; [U+202E]evil" in shown
    assert '<td class="comment">first line\nsecond line</td>' in shown
    assert RECORD_SHA256 in shown and "(given for another record hash)" not in shown


def test_a_signature_for_another_hash_is_marked() -> None:
    """A signature whose record_sha256 is not the record's is flagged in its row (21 CFR
    11.70: a signature belongs to one exact record)."""
    html = render_report(archived_record(), [signature(1, "approved", record_sha256="cd" * 32)])
    assert "(given for another record hash)" in section(html)


@pytest.mark.parametrize(
    ("given", "field"),
    [([["not", "an", "object"]], "signatures[0]"),
     ([signature(1, "approved", printed_name=None)], "signatures[0].printed_name"),
     ([signature(1, "approved"), signature(2, "reviewed", comment=7)], "signatures[1].comment")],
)
def test_malformed_signatures_name_the_field(given: list[Any], field: str) -> None:
    """A malformed signature is a ValueError naming it, never a half-rendered report (the
    report's rule for a malformed record; common practice)."""
    with pytest.raises(ValueError, match=field.replace("[", r"\[").replace("]", r"\]")):
        render_report(archived_record(), given)


def test_bundle_signatures_json() -> None:
    """signatures.json is the RFC 8785 JSON (rfc8785 package) of the signatures in time order,
    with its SHA-256 (hashlib) in the manifest; without a signatures argument the bundle is as
    before, four files (issue 13)."""
    record = archived_record()
    given = [signature(2, "approved"), signature(1, "reviewed")]
    report = render_report(record, given)
    with zipfile.ZipFile(io.BytesIO(build_bundle(record, report, given))) as bundle:
        members = {name: bundle.read(name) for name in bundle.namelist()}
    assert members["signatures.json"] == rfc8785.dumps([given[1], given[0]])
    files = {f["name"]: f["sha256"] for f in json.loads(members["manifest.json"])["files"]}
    assert files["signatures.json"] == hashlib.sha256(members["signatures.json"]).hexdigest()
    assert build_bundle(record, report, list(reversed(given))) == build_bundle(record, report, given)
    with zipfile.ZipFile(io.BytesIO(build_bundle(record, render_report(record)))) as bundle:
        assert bundle.namelist() == ["inputs.json", "manifest.json", "record.json", "report.html"]
