"""Share links: a random token that shows one record's report to someone without a key.

The token is 32 random bytes (256 bits) and is stored only as its SHA-256; the link also has an
id of its own, so it can be listed and ended without the token. A link works while it is
unexpired, not ended, and the key that made it is active (the caller decides about links made
while the service ran open, which name no key).
"""

from __future__ import annotations

import hashlib
import secrets
import uuid
from dataclasses import dataclass
from datetime import datetime, timedelta

from sqlalchemy import select, update

from service.archive.sessions import parse_timestamp, timestamp
from service.archive.store import Archive, api_keys, share_links

TOKEN_BYTES = 32


@dataclass(frozen=True)
class ShareLink:
    id: str
    record_id: str
    label: str | None  # the key that made the link; None when the service ran open
    created_at: str
    expires_at: str
    ended_at: str | None
    key_revoked: bool  # the key that made it is revoked (False for links made in open mode)

    def state(self, now: datetime) -> str:
        """'active', 'expired', 'ended' or 'key revoked' (open-mode links: see the caller)."""
        if self.ended_at is not None:
            return "ended"
        if self.key_revoked:
            return "key revoked"
        if now >= parse_timestamp(self.expires_at):
            return "expired"
        return "active"


def token_sha256(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def create_share(
    archive: Archive, *, record_id: str, label: str | None, now: datetime, lifetime: timedelta
) -> tuple[str, ShareLink]:
    """A new link to `record_id`: (the token, shown this once; the link as stored)."""
    token = secrets.token_urlsafe(TOKEN_BYTES)
    link = ShareLink(
        id=uuid.uuid4().hex, record_id=record_id, label=label, created_at=timestamp(now),
        expires_at=timestamp(now + lifetime), ended_at=None, key_revoked=False,
    )
    with archive.engine.begin() as conn:
        conn.execute(share_links.insert().values(
            id=link.id, token_sha256=token_sha256(token), record_id=record_id, label=label,
            created_at=link.created_at, expires_at=link.expires_at, ended_at=None,
        ))
    return token, link


_COLUMNS = (
    share_links.c.id, share_links.c.record_id, share_links.c.label, share_links.c.created_at,
    share_links.c.expires_at, share_links.c.ended_at, api_keys.c.revoked_at,
    api_keys.c.label.label("key_label"),
)
_JOINED = share_links.outerjoin(api_keys, api_keys.c.label == share_links.c.label)


def find_share(archive: Archive, token: str) -> ShareLink | None:
    with archive.engine.connect() as conn:
        row = conn.execute(
            select(*_COLUMNS).select_from(_JOINED)
            .where(share_links.c.token_sha256 == token_sha256(token))
        ).first()
    return None if row is None else _link(row._asdict())


def list_shares(archive: Archive, record_id: str) -> list[ShareLink]:
    """Every link ever made to `record_id`, newest first, whatever its state."""
    with archive.engine.connect() as conn:
        rows = conn.execute(
            select(*_COLUMNS).select_from(_JOINED)
            .where(share_links.c.record_id == record_id)
            .order_by(share_links.c.created_at.desc(), share_links.c.id)
        ).all()
    return [_link(row._asdict()) for row in rows]


def end_share(archive: Archive, *, record_id: str, link_id: str, now: datetime) -> bool:
    """End a link before its expiry; False when the record has no such link still unended."""
    with archive.engine.begin() as conn:
        done = conn.execute(
            update(share_links)
            .where(share_links.c.id == link_id, share_links.c.record_id == record_id,
                   share_links.c.ended_at.is_(None))
            .values(ended_at=timestamp(now))
        )
    return bool(done.rowcount)


def _link(row: dict[str, object]) -> ShareLink:
    return ShareLink(
        id=str(row["id"]), record_id=str(row["record_id"]),
        label=None if row["label"] is None else str(row["label"]),
        created_at=str(row["created_at"]), expires_at=str(row["expires_at"]),
        ended_at=None if row["ended_at"] is None else str(row["ended_at"]),
        # A label with no key row cannot happen (labels are never deleted); count it as revoked.
        key_revoked=row["label"] is not None
        and (row["key_label"] is None or row["revoked_at"] is not None),
    )
