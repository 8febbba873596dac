"""The `keys` and `archive` commands, and the access check that `serve` runs before it binds."""

from __future__ import annotations

import argparse
import json
import sys

from service.api.settings import database_url_from_argument
from service.archive.keys import KeyProblem, active_key_count, create_key
from service.archive.keys import list_keys as stored_keys
from service.archive.keys import revoke_key as revoke_stored_key
from service.archive.roles import NAMED_ROLES, is_loopback
from service.archive.store import Archive, ArchiveError

EXIT_BROKEN = 1
EXIT_INVALID = 2


def run_keys(args: argparse.Namespace) -> int:
    named = args.keys_command == "create" and args.role in NAMED_ROLES
    if named and not (args.printed_name or "").strip():
        print(f"error: a key of role {args.role!r} needs --name \"Printed Name\", shown in every "
              "signature", file=sys.stderr)
        return EXIT_INVALID
    url = database_url_from_argument(args.db)
    try:
        # create may start a new archive; list and revoke need an existing one.
        store = Archive.create(url) if args.keys_command == "create" else Archive.open(url)
    except ArchiveError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INVALID
    try:
        if args.keys_command == "create":
            key = create_key(store, label=args.label, role=args.role,
                             printed_name=args.printed_name)
            print(f"created key {args.label.strip()!r} with role {args.role!r}; it is shown only "
                  "this once, store it now:")
            print(key)
        elif args.keys_command == "list":
            for item in stored_keys(store):
                state = f"revoked {item.revoked_at}" if item.revoked_at else "active"
                name = f"\t{item.printed_name}" if item.printed_name else ""
                print(f"{item.label}\t{item.role}\tcreated {item.created_at}\t{state}{name}")
        else:
            revoked = revoke_stored_key(store, args.label)
            print(f"revoked key {revoked.label!r} at {revoked.revoked_at}")
    except KeyProblem as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_BROKEN
    finally:
        store.close()
    return 0


def run_archive(args: argparse.Namespace) -> int:
    from service.archive.signature_verification import archive_verification

    try:
        store = Archive.open(database_url_from_argument(args.db))
    except ArchiveError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INVALID
    try:
        report = archive_verification(store)
    finally:
        store.close()
    print(json.dumps(report, indent=2, sort_keys=True, ensure_ascii=False))
    return 0 if report["valid"] else EXIT_BROKEN


def access_at_start(host: str, database_url: str) -> tuple[bool, str]:
    """(may start, message) for `serve`: checked before anything binds a socket.

    Without an active key the service may run open only on a loopback address."""
    store = Archive.create(database_url)
    try:
        active = active_key_count(store)
    finally:
        store.close()
    if active:
        return True, f"bioparity: {active} active API key(s); every /v1 call needs one"
    if is_loopback(host):
        return True, (
            "bioparity: no API key in the archive: running OPEN on loopback; records name the "
            "submitter 'unauthenticated'. Create a key with `bioparity keys create`"
        )
    return False, (
        f"error: refusing to serve on {host}, which is not a loopback address, while the archive "
        "holds no active API key. Create one first: bioparity keys create --db URL "
        "--role admin --label NAME --name \"PRINTED NAME\" (or serve on 127.0.0.1)"
    )
