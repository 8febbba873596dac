"""`keys create --name` for signers, and `archive verify` over signatures, run as subprocesses."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

from service.archive.signatures import add_signature
from service.archive.store import Archive
from tests.api.test_archive import small_record
from tests.cli.test_keys import run


def test_review_and_admin_keys_need_a_printed_name(tmp_path: Path) -> None:
    """review and admin keys need --name, shown in every signature (21 CFR 11.50(a)(1), the
    printed name of the signer): without it the command exits 2 (argparse's usage-error status)
    and creates no archive; `keys list` shows the name after the state."""
    db = tmp_path / "signers.sqlite3"
    for role in ("review", "admin"):
        refused = run("keys", "create", "--db", str(db), "--role", role, "--label", "x")
        assert refused.returncode == 2 and "--name" in refused.stderr, refused.stderr
        blank = run("keys", "create", "--db", str(db), "--role", role, "--label", "x",
                    "--name", "   ")
        assert blank.returncode == 2
    assert not db.exists()
    made = run("keys", "create", "--db", str(db), "--role", "review", "--label", "rev",
               "--name", "  Rosa   Reviewer ")
    assert made.returncode == 0, made.stderr
    assert run("keys", "create", "--db", str(db), "--role", "read", "--label", "viewer")\
        .returncode == 0
    lines = run("keys", "list", "--db", str(db)).stdout.splitlines()
    assert lines[0].startswith("rev\treview\tcreated ") and lines[0].endswith("\tactive\tRosa Reviewer")
    assert lines[1].startswith("viewer\tread\tcreated ") and lines[1].endswith("\tactive")


def test_archive_verify_fails_on_an_edited_signature(tmp_path: Path) -> None:
    """`archive verify` exits 1 when a signature's comment was edited with raw SQL, and names
    the signature (POSIX non-zero status for failure; hash chain, Haber & Stornetta 1991)."""
    db = tmp_path / "verify.sqlite3"
    assert run("keys", "create", "--db", str(db), "--role", "review", "--label", "rev",
               "--name", "Rosa Reviewer").returncode == 0
    archive = Archive.open(f"sqlite:///{db}")
    try:
        record = archive.insert(small_record(1), submitter="lab")
        add_signature(archive, record_id=record["id"], signer="rev", meaning="rejected",
                      comment="wrong units", record_sha256=record["record_sha256"])
    finally:
        archive.close()
    intact = run("archive", "verify", "--db", str(db))
    assert intact.returncode == 0, intact.stdout + intact.stderr
    assert json.loads(intact.stdout)["signatures"] == 1
    with sqlite3.connect(db) as raw:
        raw.execute("UPDATE signatures SET comment = 'fine'")
    broken = run("archive", "verify", "--db", str(db))
    assert broken.returncode == 1
    report = json.loads(broken.stdout)
    assert report["valid"] is False
    assert report["first_signature_break"]["reason"] == "signature_hash_mismatch"
