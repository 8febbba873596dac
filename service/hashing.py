"""Canonical JSON (RFC 8785) and SHA-256: the basis of every hash in a record."""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from typing import Any

import rfc8785

# RFC 8785 section 3.2.2.3 writes every number as an IEEE 754 double in its shortest form, so a
# double from 2**53 up to 1e21 (1e20, say, or 8.333333333333333e18) comes out as plain digits
# ("8333333333333333000"), and json.loads reads those back as an int, which the rfc8785 library
# refuses (beyond the I-JSON range, RFC 7493 section 2.2).
_SAFE_INTEGER = 2**53


def canonical_json(obj: Any) -> bytes:
    """RFC 8785 (JSON Canonicalization Scheme) serialisation.

    Canonical text read back with json.loads canonicalizes to the same bytes: a large int whose
    digits are exactly the canonical form of a double is written as that double. Any other int
    beyond 2**53 is refused as before (rfc8785.IntegerDomainError).
    """
    return bytes(rfc8785.dumps(_as_doubles(obj)))


def _as_doubles(obj: Any) -> Any:
    if isinstance(obj, bool) or obj is None or isinstance(obj, str | float):
        return obj
    if isinstance(obj, int):
        if abs(obj) >= _SAFE_INTEGER:
            try:
                double = float(obj)
            except OverflowError:
                return obj
            if rfc8785.dumps(double) == str(obj).encode("ascii"):
                return double
        return obj  # a safe int, or a genuine big one: rfc8785 decides
    if isinstance(obj, Mapping):
        return {key: _as_doubles(value) for key, value in obj.items()}
    if isinstance(obj, list | tuple):
        return [_as_doubles(value) for value in obj]
    return obj


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def inputs_sha256(inputs: Mapping[str, Any]) -> str:
    return sha256_hex(canonical_json(inputs))
