"""Canonical JSON (RFC 8785) and SHA-256: the basis of every hash in a record."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from typing import Any

import rfc8785

# RFC 8785 section 3.2.2.3 writes every number as an IEEE 754 double in its shortest form, so a
# double from 2**53 up to 1e21 (1e20, say, or 8.333333333333333e18) comes out as plain digits
# ("8333333333333333000"). Plain json.loads reads those back as an int, which the rfc8785 library
# refuses (beyond the I-JSON range, RFC 7493 section 2.2); load_canonical reads them as the double.
_SAFE_INTEGER = 2**53


def canonical_json(obj: Any) -> bytes:
    """RFC 8785 (JSON Canonicalization Scheme) serialisation."""
    return bytes(rfc8785.dumps(obj))


def load_canonical(text: str | bytes) -> Any:
    """Read canonical JSON back so that canonical_json(load_canonical(t)) == t: an integer
    literal of 2**53 or more whose digits are exactly the canonical form of a double is that
    double (normalized inputs never hold such integers: float fields are floats, int fields stay
    below 2**53)."""
    return json.loads(text, parse_int=_parse_int)


def _parse_int(literal: str) -> int | float:
    value = int(literal)
    if abs(value) >= _SAFE_INTEGER:
        try:
            double = float(value)
        except OverflowError:
            return value
        if rfc8785.dumps(double) == literal.encode("ascii"):
            return double
    return value


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def inputs_sha256(inputs: Mapping[str, Any]) -> str:
    return sha256_hex(canonical_json(inputs))
