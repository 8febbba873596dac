"""`python -m service keys ...` and the start-up refusal of `serve`, run as subprocesses."""

from __future__ import annotations

import hashlib
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

from service.api.app import create_app
from service.api.settings import ServiceSettings
from service.cli.admin import access_at_start
from tests.api.conftest import ApiClient

REPO = Path(__file__).resolve().parents[2]


def run(*args: str, timeout: float = 60) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "service", *args], capture_output=True,
                          text=True, cwd=REPO, timeout=timeout)


def test_create_list_revoke(tmp_path: Path) -> None:
    """The key is the last stdout line and appears nowhere else: not in `keys list`, not in the
    archive file (only its SHA-256, FIPS 180-4 via hashlib); labels are unique; revocation is
    listed and a second one refused."""
    db = str(tmp_path / "keys.sqlite3")
    created = run("keys", "create", "--db", db, "--role", "submit", "--label", "lab one")
    assert created.returncode == 0, created.stderr
    key = created.stdout.rstrip("\n").splitlines()[-1]
    assert key.startswith("bp_") and " " not in key and len(key) >= 46
    assert created.stdout.count(key) == 1

    twice = run("keys", "create", "--db", db, "--role", "read", "--label", "lab one")
    assert twice.returncode != 0 and "exists already" in twice.stderr
    bad_role = run("keys", "create", "--db", db, "--role", "owner", "--label", "x")
    assert bad_role.returncode == 2 and "owner" in bad_role.stderr

    listed = run("keys", "list", "--db", db)
    assert listed.returncode == 0
    digest = hashlib.sha256(key.encode()).hexdigest()
    assert key not in listed.stdout and key[3:] not in listed.stdout
    assert digest not in listed.stdout
    (line,) = listed.stdout.splitlines()
    assert line.startswith("lab one\tsubmit\tcreated ") and line.endswith("active")
    with sqlite3.connect(db) as raw:
        assert raw.execute("SELECT key_sha256 FROM api_keys").fetchone() == (digest,)

    revoked = run("keys", "revoke", "lab one", "--db", db)
    assert revoked.returncode == 0, revoked.stderr
    assert "\trevoked " in run("keys", "list", "--db", db).stdout
    again = run("keys", "revoke", "lab one", "--db", db)
    assert again.returncode == 1 and "revoked already" in again.stderr
    assert run("keys", "revoke", "nobody", "--db", db).returncode == 1


def test_revoked_key_is_refused_at_once_by_a_running_service(tmp_path: Path) -> None:
    """A key made and revoked by the CLI in another process applies to the running app's very
    next request (RFC 6750 §3.1 invalid_token; per-request lookup)."""
    db = tmp_path / "live.sqlite3"
    client = ApiClient(create_app(ServiceSettings(database_url=f"sqlite:///{db}")))
    try:
        assert client.get("/v1/analyses").status_code == 200  # open: no key yet
        made = run("keys", "create", "--db", str(db), "--role", "read", "--label", "viewer")
        key = made.stdout.splitlines()[-1]
        assert client.get("/v1/analyses").status_code == 401
        header = {"Authorization": f"Bearer {key}"}
        assert client.get("/v1/analyses", headers=header).status_code == 200
        assert run("keys", "revoke", "viewer", "--db", str(db)).returncode == 0
        assert client.get("/v1/analyses", headers=header).status_code == 401
    finally:
        client.close()


def test_serve_on_a_reachable_address_without_keys_refuses_before_binding(tmp_path: Path) -> None:
    """`serve --host 0.0.0.0` with no key exits non-zero with a clear message before any bind:
    the port is held by this test, and no "address already in use" error appears (a bind
    attempt would give one, errno EADDRINUSE, POSIX bind(2))."""
    with socket.socket() as held:
        held.bind(("0.0.0.0", 0))
        held.listen()
        port = held.getsockname()[1]
        started = time.monotonic()
        refused = run("serve", "--host", "0.0.0.0", "--port", str(port),
                      "--db", str(tmp_path / "open.sqlite3"), timeout=60)
    assert refused.returncode == 2
    assert "refusing to serve on 0.0.0.0" in refused.stderr
    assert "keys create" in refused.stderr
    assert "already in use" not in refused.stderr + refused.stdout
    assert "listening" not in refused.stdout
    assert time.monotonic() - started < 60


def test_start_up_decision(tmp_path: Path) -> None:
    """Loopback without keys runs open and says so; any address with an active key starts
    (the access rules of the service; RFC 1122 §3.2.1.3 for loopback)."""
    url = f"sqlite:///{tmp_path / 'start.sqlite3'}"
    may, message = access_at_start("127.0.0.1", url)
    assert may and "OPEN" in message and "unauthenticated" in message
    assert access_at_start("0.0.0.0", url)[0] is False
    assert run("keys", "create", "--db", url, "--role", "admin", "--label", "ops",
               "--name", "Olga Operator").returncode == 0
    assert access_at_start("0.0.0.0", url) == (True, access_at_start("::", url)[1])
    assert access_at_start("0.0.0.0", url)[0] is True
