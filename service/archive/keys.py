"""API keys: made here, shown once, stored only as their SHA-256, checked on every request.

A key is `bp_` + 32 random bytes (secrets.token_urlsafe, 256 bits), so a plain SHA-256 is
enough to store it: there is nothing to guess that a slow password hash would protect.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass

from sqlalchemy import bindparam, func, select, update
from sqlalchemy.exc import IntegrityError

from service.archive.roles import ROLES
from service.archive.store import Archive, api_keys, utc_timestamp

KEY_PREFIX = "bp_"
MAX_LABEL_LENGTH = 200


class KeyProblem(Exception):
    """A key cannot be created or revoked (the message says why)."""


@dataclass(frozen=True)
class ApiKey:
    label: str
    role: str
    created_at: str
    revoked_at: str | None
    printed_name: str | None = None  # the signer's name as shown in signatures


def generate_key() -> str:
    return KEY_PREFIX + secrets.token_urlsafe(32)


def key_sha256(key: str) -> str:
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def check_label(label: str) -> str:
    cleaned = label.strip()
    if not cleaned:
        raise KeyProblem("the label must not be empty")
    if len(cleaned) > MAX_LABEL_LENGTH:
        raise KeyProblem(f"the label is longer than {MAX_LABEL_LENGTH} characters")
    if not cleaned.isprintable():
        raise KeyProblem("the label must hold printable characters only")
    return cleaned


def check_printed_name(name: str) -> str:
    cleaned = " ".join(name.split())
    if not cleaned:
        raise KeyProblem("the printed name must not be empty")
    if len(cleaned) > MAX_LABEL_LENGTH:
        raise KeyProblem(f"the printed name is longer than {MAX_LABEL_LENGTH} characters")
    if not cleaned.isprintable():
        raise KeyProblem("the printed name must hold printable characters only")
    return cleaned


def create_key(
    archive: Archive, *, label: str, role: str, printed_name: str | None = None
) -> str:
    """Store a new key under `label` and return it (the only time it exists in clear).

    A review key needs `printed_name`, the signer's name shown in every signature; the
    command line asks one of admin keys too (an admin key without one may do all but sign)."""
    if role not in ROLES:
        raise KeyProblem(f"role must be one of {', '.join(ROLES)}, got {role!r}")
    label = check_label(label)
    name = None if printed_name is None else check_printed_name(printed_name)
    if role == "review" and name is None:
        raise KeyProblem("a review key needs a printed name (--name)")
    key = generate_key()
    try:
        with archive.engine.begin() as conn:
            conn.execute(api_keys.insert().values(
                label=label, role=role, key_sha256=key_sha256(key),
                created_at=utc_timestamp(), revoked_at=None, printed_name=name,
            ))
    except IntegrityError:
        raise KeyProblem(f"a key labelled {label!r} exists already (labels are unique)") from None
    return key


def list_keys(archive: Archive) -> list[ApiKey]:
    columns = (api_keys.c.label, api_keys.c.role, api_keys.c.created_at, api_keys.c.revoked_at,
               api_keys.c.printed_name)
    with archive.engine.connect() as conn:
        rows = conn.execute(select(*columns).order_by(api_keys.c.created_at, api_keys.c.label))
        return [ApiKey(**row._asdict()) for row in rows]


def revoke_key(archive: Archive, label: str) -> ApiKey:
    with archive.engine.begin() as conn:
        done = conn.execute(
            update(api_keys)
            .where(api_keys.c.label == label, api_keys.c.revoked_at.is_(None))
            .values(revoked_at=utc_timestamp())
        )
        if done.rowcount == 0:
            known = conn.execute(
                select(api_keys.c.revoked_at).where(api_keys.c.label == label)
            ).first()
            if known is None:
                raise KeyProblem(f"no key labelled {label!r}")
            raise KeyProblem(f"the key labelled {label!r} was revoked already at {known[0]}")
    return next(k for k in list_keys(archive) if k.label == label)


_ACTIVE_KEYS = select(func.count()).select_from(api_keys).where(api_keys.c.revoked_at.is_(None))


def active_key_count(archive: Archive) -> int:
    """Read from the archive on every call, so that a key made by any process applies to the
    very next request."""
    row = archive.first_row(_ACTIVE_KEYS)
    return 0 if row is None else int(next(iter(row.values())))


# Built once, so that Archive.first_row compiles it once (and SQLAlchemy, on PostgreSQL, finds its
# compiled SQL in the cache instead of building the statement and its cache key on every request).
_KEY_BY_DIGEST = select(
    api_keys.c.label, api_keys.c.role, api_keys.c.created_at, api_keys.c.revoked_at,
    api_keys.c.key_sha256, api_keys.c.printed_name,
).where(api_keys.c.key_sha256 == bindparam("digest"))


def find_key(archive: Archive, key: str) -> ApiKey | None:
    """The active key whose hash matches `key`, read from the archive now (so a revocation
    made by any process applies to the very next request)."""
    digest = key_sha256(key)
    row = archive.first_row(_KEY_BY_DIGEST, {"digest": digest})
    if row is None or row["revoked_at"] is not None:
        return None
    # The indexed lookup found it; a constant-time comparison keeps timing from saying more.
    if not hmac.compare_digest(row["key_sha256"], digest):
        return None
    return ApiKey(row["label"], row["role"], row["created_at"], row["revoked_at"],
                  row["printed_name"])
