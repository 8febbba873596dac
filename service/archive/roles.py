"""Roles of API keys and the loopback rule: plain data, no database (the CLI parser reads them)."""

from __future__ import annotations

import ipaddress

# read: GET endpoints; submit: also POST /v1/analyses and reproduction; admin: everything,
# including the verification of the archive.
ROLES = ("read", "submit", "admin")
_RANK = {role: rank for rank, role in enumerate(ROLES)}


def role_allows(role: str, needed: str) -> bool:
    """Roles are ordered read < submit < admin; each includes what the ones below may do."""
    return _RANK.get(role, -1) >= _RANK[needed]


def is_loopback(host: str) -> bool:
    """True for 127.0.0.0/8, ::1 and the name localhost; anything else counts as reachable."""
    if host.strip().lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False
