"""Browser sessions and failed sign-ins, kept in the archive database so every worker sees them.

A session id is 32 random bytes (secrets.token_urlsafe, 256 bits); the archive keeps only its
SHA-256, so a copy of the database holds no cookie that works. Each session belongs to the API
key that signed in and is checked against that key on every use: a revoked key's sessions end at
their next request, in every process.
"""

from __future__ import annotations

import hashlib
import secrets
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

from sqlalchemy import bindparam, delete, func, select, update

from service.archive.store import Archive, api_keys, browser_sessions, sign_in_failures

# A session's last use is written at most once a minute: idle expiry is counted to the minute,
# and a page view does not have to take the database's write lock each time.
TOUCH_AFTER = timedelta(seconds=60)
TIMESTAMP_FORMAT = "%Y-%m-%dT%H:%M:%S.%fZ"
MAX_CLIENT_LENGTH = 64  # the client column; an IPv6 address text is at most 45 characters


@dataclass(frozen=True)
class BrowserSession:
    label: str
    role: str
    csrf_token: str
    created_at: str
    last_seen_at: str


def timestamp(moment: datetime) -> str:
    """The archive's timestamp text (UTC, microseconds, Z): it sorts as the times do."""
    return moment.astimezone(UTC).strftime(TIMESTAMP_FORMAT)


def parse_timestamp(text: str) -> datetime:
    return datetime.strptime(text, TIMESTAMP_FORMAT).replace(tzinfo=UTC)


def session_sha256(session_id: str) -> str:
    return hashlib.sha256(session_id.encode("utf-8")).hexdigest()


def start_session(archive: Archive, *, label: str, now: datetime) -> tuple[str, BrowserSession]:
    """A new session for the key labelled `label`: (the id for the cookie, the session)."""
    session_id = secrets.token_urlsafe(32)
    csrf_token = secrets.token_urlsafe(32)
    stamp = timestamp(now)
    with archive.engine.begin() as conn:
        role = conn.execute(
            select(api_keys.c.role).where(api_keys.c.label == label)
        ).scalar_one()
        conn.execute(browser_sessions.insert().values(
            session_sha256=session_sha256(session_id), label=label, csrf_token=csrf_token,
            created_at=stamp, last_seen_at=stamp,
        ))
    return session_id, BrowserSession(label, str(role), csrf_token, stamp, stamp)


# Built once (a session is looked up on every request from a browser), so that SQLAlchemy
# finds its compiled SQL in the cache instead of building the statement each time.
_SESSION_BY_DIGEST = (
    select(browser_sessions.c.label, browser_sessions.c.csrf_token,
           browser_sessions.c.created_at, browser_sessions.c.last_seen_at,
           api_keys.c.role, api_keys.c.revoked_at)
    .select_from(browser_sessions.outerjoin(
        api_keys, api_keys.c.label == browser_sessions.c.label))
    .where(browser_sessions.c.session_sha256 == bindparam("digest"))
)


def find_session(
    archive: Archive, session_id: str, *, now: datetime, idle: timedelta, absolute: timedelta
) -> BrowserSession | None:
    """The live session with this id, or None. A session past its idle or absolute expiry, or
    whose key was revoked, is deleted here and counts as none."""
    digest = session_sha256(session_id)
    with archive.engine.connect() as conn:
        row = conn.execute(_SESSION_BY_DIGEST, {"digest": digest}).first()
    if row is None:
        return None
    last_seen = parse_timestamp(row.last_seen_at)
    dead = (
        row.role is None
        or row.revoked_at is not None
        or now >= last_seen + idle
        or now >= parse_timestamp(row.created_at) + absolute
    )
    if dead:
        _delete(archive, digest)
        return None
    seen = row.last_seen_at
    if now - last_seen >= TOUCH_AFTER:
        seen = timestamp(now)
        with archive.engine.begin() as conn:
            conn.execute(update(browser_sessions)
                         .where(browser_sessions.c.session_sha256 == digest)
                         .values(last_seen_at=seen))
    return BrowserSession(row.label, str(row.role), row.csrf_token, row.created_at, seen)


def end_session(archive: Archive, session_id: str) -> None:
    _delete(archive, session_sha256(session_id))


def end_sessions_before(archive: Archive, *, idle_since: datetime, started_since: datetime) -> int:
    """Delete every session idle since before `idle_since` or started before `started_since`."""
    with archive.engine.begin() as conn:
        done = conn.execute(delete(browser_sessions).where(
            (browser_sessions.c.last_seen_at < timestamp(idle_since))
            | (browser_sessions.c.created_at < timestamp(started_since))
        ))
    return int(done.rowcount or 0)


def _delete(archive: Archive, digest: str) -> None:
    with archive.engine.begin() as conn:
        conn.execute(delete(browser_sessions).where(browser_sessions.c.session_sha256 == digest))


@dataclass(frozen=True)
class SignInLimit:
    """Failed sign-ins of one client within the window, and when the oldest of them expires."""

    failures: int
    retry_at: datetime | None


def recent_failures(archive: Archive, client: str, *, now: datetime, window: timedelta) -> SignInLimit:
    since = timestamp(now - window)
    client = client[:MAX_CLIENT_LENGTH]
    with archive.engine.connect() as conn:
        count, oldest = conn.execute(
            select(func.count(), func.min(sign_in_failures.c.failed_at))
            .where(sign_in_failures.c.client == client, sign_in_failures.c.failed_at > since)
        ).one()
    retry_at = None if oldest is None else parse_timestamp(oldest) + window
    return SignInLimit(int(count), retry_at)


def record_failure(archive: Archive, client: str, *, now: datetime, window: timedelta) -> None:
    """Count one failed sign-in of `client`; rows older than the window are dropped on the way."""
    with archive.engine.begin() as conn:
        conn.execute(delete(sign_in_failures).where(
            sign_in_failures.c.failed_at <= timestamp(now - window)))
        conn.execute(sign_in_failures.insert().values(
            client=client[:MAX_CLIENT_LENGTH], failed_at=timestamp(now)))
