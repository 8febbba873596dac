"""The signatures' hash chain, checked against raw SQL edits of the archive file.

Signatures are chained like the records (linked timestamping, Haber & Stornetta 1991,
J. Cryptology 3:99): each hash covers the previous one, so an edit shows where it was made, and
only the newest entries can be removed unseen, which a head hash kept outside catches.
"""

from __future__ import annotations

import hashlib
import sqlite3
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import rfc8785

from service.archive.chain import record_hash
from service.archive.keys import create_key, find_key
from service.archive.signature_verification import archive_verification
from service.archive.signatures import (
    SigningRefused,
    add_signature,
    latest_status,
    list_signatures,
)
from service.archive.store import Archive
from tests.api.test_archive import small_record

SIGNED_FIELDS = ("record_id", "record_sha256", "signer", "printed_name", "meaning", "comment",
                 "signed_at", "previous_signature_sha256")


@pytest.fixture
def path(tmp_path: Path) -> Path:
    return tmp_path / "signed.sqlite3"


@pytest.fixture
def archive(path: Path) -> Iterator[Archive]:
    store = Archive.create(f"sqlite:///{path}")
    yield store
    store.close()


def signed_archive(archive: Archive) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Two records by lab-0 and lab-1; three signatures: reviewer on both, approver on one."""
    records = [archive.insert(small_record(i), submitter=f"lab-{i}") for i in range(2)]
    create_key(archive, label="rev", role="review", printed_name="Rita Reviewer")
    create_key(archive, label="qa", role="admin", printed_name="Quentin Approver")
    given = [
        add_signature(archive, record_id=records[0]["id"], signer="rev", meaning="reviewed",
                      comment="checked the table against the source file",
                      record_sha256=records[0]["record_sha256"]),
        add_signature(archive, record_id=records[1]["id"], signer="rev", meaning="reviewed",
                      comment=None, record_sha256=records[1]["record_sha256"]),
        add_signature(archive, record_id=records[0]["id"], signer="qa", meaning="approved",
                      comment=None, record_sha256=records[0]["record_sha256"]),
    ]
    return records, given


def raw_edit(path: Path, *statements: str) -> None:
    with sqlite3.connect(path) as raw:
        for statement in statements:
            assert raw.execute(statement).rowcount >= 1, statement


def test_each_signature_hash_covers_its_fields(archive: Archive) -> None:
    """signature_sha256 is SHA-256 (FIPS 180-4, hashlib) of the RFC 8785 JSON (rfc8785
    package) of the record id and hash, signer, printed name, meaning, comment, UTC time and the
    previous signature hash; the first signature links to null. The printed name comes from the
    key (21 CFR 11.50(a)(1): the printed name of the signer)."""
    records, given = signed_archive(archive)
    previous = None
    for signature in given:
        chained = {key: signature[key] for key in SIGNED_FIELDS}
        assert chained["previous_signature_sha256"] == previous
        assert signature["signature_sha256"] == hashlib.sha256(rfc8785.dumps(chained)).hexdigest()
        assert signature["signed_at"].endswith("Z")
        previous = signature["signature_sha256"]
    assert [s["printed_name"] for s in given] == ["Rita Reviewer"] * 2 + ["Quentin Approver"]
    assert list_signatures(archive, records[0]["id"]) == [given[0], given[2]]
    answer = archive_verification(archive)
    assert answer["valid"] is True and answer["signatures"] == 3
    assert answer["first_signature_break"] is None and answer["signature_breaks"] == 0
    assert answer["head_signature_sha256"] == given[-1]["signature_sha256"]
    assert answer["head_record_sha256"] == records[-1]["record_sha256"]


# statement(s), seq of the first break, its reason
TAMPERING = {
    "meaning": (["UPDATE signatures SET meaning = 'approved' WHERE seq = 2"], 2,
                "signature_hash_mismatch"),
    "comment": (["UPDATE signatures SET comment = 'looked fine' WHERE seq = 1"], 1,
                "signature_hash_mismatch"),
    "comment removed": (["UPDATE signatures SET comment = NULL WHERE seq = 1"], 1,
                        "signature_hash_mismatch"),
    "printed name": (["UPDATE signatures SET printed_name = 'Somebody Else' WHERE seq = 3"], 3,
                     "signature_hash_mismatch"),
    "signer": (["UPDATE signatures SET signer = 'qa' WHERE seq = 2"], 2,
               "signature_hash_mismatch"),
    "time": (["UPDATE signatures SET signed_at = '2020-01-01T00:00:00.000000Z' WHERE seq = 3"], 3,
             "signature_hash_mismatch"),
    "moved to another record": (
        ["UPDATE signatures SET record_id = (SELECT id FROM records WHERE seq = 2) WHERE seq = 3"],
        3, "signature_hash_mismatch"),
    "moved with that record's hash": (
        ["UPDATE signatures SET record_id = (SELECT id FROM records WHERE seq = 2), "
         "record_sha256 = (SELECT record_sha256 FROM records WHERE seq = 2) WHERE seq = 3"],
        3, "signature_hash_mismatch"),
    "reordered": (["UPDATE signatures SET seq = 100 WHERE seq = 1",
                   "UPDATE signatures SET seq = 1 WHERE seq = 2",
                   "UPDATE signatures SET seq = 2 WHERE seq = 100"], 1, "broken_link"),
    "deleted": (["DELETE FROM signatures WHERE seq = 2"], 3, "broken_link"),
    "copied to another record": (
        ["INSERT INTO signatures (seq, id, record_id, record_sha256, signer, printed_name, "
         "meaning, comment, signed_at, signature_sha256, previous_signature_sha256) "
         "SELECT 50, 'copy', (SELECT id FROM records WHERE seq = 2), record_sha256, signer, "
         "printed_name, meaning, comment, signed_at, signature_sha256, "
         "previous_signature_sha256 FROM signatures WHERE seq = 3"], 50, "broken_link"),
}


@pytest.mark.parametrize("kind", list(TAMPERING))
def test_every_direct_edit_of_a_signature_shows_in_the_verification(
    archive: Archive, path: Path, kind: str
) -> None:
    """An edited field, a signature moved or copied to another record, reordered or deleted
    rows, each made with raw SQL (Python's sqlite3), is a break of the signature chain at the
    row where it was made (21 CFR 11.70: signatures linked to their records so that they cannot
    be excised, copied or transferred to falsify a record; hash chain, Haber & Stornetta
    1991)."""
    signed_archive(archive)
    assert archive_verification(archive)["valid"] is True
    statements, seq, reason = TAMPERING[kind]
    raw_edit(path, *statements)
    answer = archive_verification(archive)
    assert answer["valid"] is False
    assert answer["breaks"] == 0 and answer["first_break"] is None  # the records are intact
    assert answer["signature_breaks"] >= 1
    assert answer["first_signature_break"]["seq"] == seq
    assert answer["first_signature_break"]["reason"] == reason


def test_removing_the_newest_signature_changes_the_head(archive: Archive, path: Path) -> None:
    """Nothing follows the newest signature, so deleting it leaves a consistent chain; the head
    hash kept outside the archive then differs (the limit of any hash chain without an outside
    anchor, Haber & Stornetta 1991 §5)."""
    _records, given = signed_archive(archive)
    kept_outside = archive_verification(archive)["head_signature_sha256"]
    raw_edit(path, "DELETE FROM signatures WHERE seq = 3")
    answer = archive_verification(archive)
    assert answer["signatures"] == 2
    assert answer["head_signature_sha256"] != kept_outside
    assert answer["head_signature_sha256"] == given[1]["signature_sha256"]


def test_a_signed_record_rewritten_consistently_is_caught_by_its_signatures(
    archive: Archive, path: Path
) -> None:
    """The newest record rewritten with a freshly computed record hash (so the records chain
    alone stays consistent) no longer matches the record_sha256 its signature carries; the
    signed record deleted is missing (21 CFR 11.70; SHA-256 second-preimage resistance,
    FIPS 180-4)."""
    records, _given = signed_archive(archive)
    newest = records[1]
    forged_result = {"metrics": [], "warnings": [], "engine": {"name": "forged"}}
    forged_hash = record_hash(
        inputs_sha256=newest["inputs_sha256"], result=forged_result,
        created_at=newest["created_at"], submitter=newest["submitter"],
        previous_record_sha256=newest["previous_record_sha256"])
    result_text = rfc8785.dumps(forged_result).decode()
    raw_edit(path, f"UPDATE records SET result = '{result_text}', engine = "
                   f"'{rfc8785.dumps(forged_result['engine']).decode()}', "
                   f"record_sha256 = '{forged_hash}' WHERE seq = 2")
    answer = archive_verification(archive)
    assert answer["first_break"] is None  # the records chain alone cannot tell
    assert answer["valid"] is False
    assert answer["first_signature_break"]["seq"] == 2
    assert answer["first_signature_break"]["reason"] == "record_mismatch"

    raw_edit(path, "DELETE FROM records WHERE seq = 2")
    assert archive_verification(archive)["first_signature_break"]["reason"] == "record_missing"


def test_refusals(archive: Archive) -> None:
    """A submitter cannot sign their own record; the hash the signer saw must be the record's;
    one signer gives one meaning once; a rejection says why; read and submit keys, revoked
    keys and keys without a printed name cannot sign (21 CFR 11.50, 11.100(a) uniqueness,
    11.200; EU GMP Annex 11 §14)."""
    records, _given = signed_archive(archive)
    first = records[0]
    create_key(archive, label="lab-0", role="admin", printed_name="Lab Zero")  # the submitter
    create_key(archive, label="unnamed", role="admin")
    create_key(archive, label="viewer", role="read")
    create_key(archive, label="poster", role="submit")

    def refusal(**changes: Any) -> str:
        request = {"record_id": first["id"], "signer": "rev", "meaning": "approved",
                   "comment": None, "record_sha256": first["record_sha256"], **changes}
        with pytest.raises(SigningRefused) as caught:
            add_signature(archive, **request)
        return caught.value.kind

    assert refusal(signer="lab-0") == "self_signing"
    assert refusal(record_sha256=records[1]["record_sha256"]) == "stale_record"
    assert refusal(meaning="reviewed") == "duplicate"
    assert refusal(meaning="rejected", comment="  \r\n ") == "invalid"
    assert refusal(meaning="signed off") == "invalid"
    assert refusal(comment="x" * 2001) == "invalid"
    assert refusal(comment="bell \x07") == "invalid"
    assert refusal(record_id="0" * 32) == "unknown_record"
    for signer in ("unnamed", "viewer", "poster", "nobody"):
        assert refusal(signer=signer) == "not_a_signer", signer
    assert archive_verification(archive)["signatures"] == 3  # nothing was added


def test_latest_status(archive: Archive) -> None:
    """The status shown in the archive index is the meaning of the latest signature, or
    unsigned (common practice: the last sign-off is the current state)."""
    records, _given = signed_archive(archive)
    third = archive.insert(small_record(9), submitter="lab-9")
    add_signature(archive, record_id=records[1]["id"], signer="qa", meaning="rejected",
                  comment="the sampling times\r\ndo not match the protocol",
                  record_sha256=records[1]["record_sha256"])
    status = latest_status(archive, [records[0]["id"], records[1]["id"], third["id"], "x" * 32])
    assert status == {records[0]["id"]: "approved", records[1]["id"]: "rejected",
                      third["id"]: "unsigned", "x" * 32: "unsigned"}
    rejected = list_signatures(archive, records[1]["id"])[-1]
    assert rejected["comment"] == "the sampling times\ndo not match the protocol"


def test_concurrent_signers_keep_one_chain(path: Path, archive: Archive) -> None:
    """Signatures from several archive handles (as from several workers) are appended one at a
    time under the archive's append lock (SQLite BEGIN IMMEDIATE, sqlite.org/lang_transaction),
    so the chain has no fork."""
    records = [archive.insert(small_record(i), submitter="lab") for i in range(12)]
    for signer in ("a", "b", "c"):
        create_key(archive, label=signer, role="review", printed_name=f"Signer {signer.upper()}")
    errors: list[BaseException] = []

    def sign_all(signer: str) -> None:
        store = Archive.open(f"sqlite:///{path}")
        try:
            for record in records:
                add_signature(store, record_id=record["id"], signer=signer, meaning="reviewed",
                              comment=None, record_sha256=record["record_sha256"])
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)
        finally:
            store.close()

    threads = [threading.Thread(target=sign_all, args=(s,)) for s in ("a", "b", "c")]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert errors == []
    answer = archive_verification(archive)
    assert answer["valid"] is True and answer["signatures"] == 36


def test_an_older_archive_gains_the_printed_name_column(path: Path) -> None:
    """An archive made before signatures existed (no printed_name column, no signatures table)
    is upgraded in place when opened; its keys keep working and have no printed name, so they
    cannot sign (SQLite ALTER TABLE ADD COLUMN, sqlite.org/lang_altertable)."""
    old = Archive.create(f"sqlite:///{path}")
    key = create_key(old, label="ops", role="admin")
    record = old.insert(small_record(1), submitter="lab")
    old.close()
    with sqlite3.connect(path) as raw:
        raw.execute("DROP TABLE signatures")
        raw.execute("ALTER TABLE api_keys DROP COLUMN printed_name")
        assert "printed_name" not in [r[1] for r in raw.execute("PRAGMA table_info(api_keys)")]
    for opener in (Archive.open, Archive.create):
        store = opener(f"sqlite:///{path}")
        try:
            found = find_key(store, key)
            assert found is not None and found.role == "admin" and found.printed_name is None
            with pytest.raises(SigningRefused) as caught:
                add_signature(store, record_id=record["id"], signer="ops", meaning="reviewed",
                              comment=None, record_sha256=record["record_sha256"])
            assert caught.value.kind == "not_a_signer"
            assert archive_verification(store)["valid"] is True
        finally:
            store.close()
        with sqlite3.connect(path) as raw:
            columns = [r[1] for r in raw.execute("PRAGMA table_info(api_keys)")]
            raw.execute("DROP TABLE signatures")
            raw.execute("ALTER TABLE api_keys DROP COLUMN printed_name")
        assert columns[-1] == "printed_name"
