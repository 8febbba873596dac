"""Canonical JSON (RFC 8785) and SHA-256: the basis of every hash in a record."""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from typing import Any

import rfc8785


def canonical_json(obj: Any) -> bytes:
    """RFC 8785 (JSON Canonicalization Scheme) serialisation."""
    return bytes(rfc8785.dumps(obj))


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def inputs_sha256(inputs: Mapping[str, Any]) -> str:
    return sha256_hex(canonical_json(inputs))
