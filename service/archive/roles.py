"""Roles of API keys and the loopback rule: plain data, no database (the CLI parser reads them)."""

from __future__ import annotations

import ipaddress

# read: GET endpoints; submit: also POST /v1/analyses and reproduction; review: what read may,
# plus signing records (never submitting); admin: everything, including the verification of the
# archive.
ROLES = ("read", "submit", "review", "admin")

# What each role may do. The permissions are named after the calls that need them: "read",
# "submit", "sign" and "admin" (the admin-only calls).
PERMISSIONS: dict[str, frozenset[str]] = {
    "read": frozenset({"read"}),
    "submit": frozenset({"read", "submit"}),
    "review": frozenset({"read", "sign"}),
    "admin": frozenset({"read", "submit", "sign", "admin"}),
}

# Roles whose keys must carry a printed name (`keys create --name`): it is shown in signatures.
NAMED_ROLES = ("review", "admin")


def role_allows(role: str, needed: str) -> bool:
    """Whether a key of `role` may do what needs the permission `needed` (see PERMISSIONS)."""
    if not any(needed in granted for granted in PERMISSIONS.values()):
        raise ValueError(f"unknown permission {needed!r}")
    return needed in PERMISSIONS.get(role, frozenset())


def is_loopback(host: str) -> bool:
    """True for 127.0.0.0/8, ::1 and the name localhost; anything else counts as reachable."""
    if host.strip().lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False
