"""Canonical JSON (RFC 8785) and SHA-256: the basis of every hash in a record."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from dataclasses import dataclass
from operator import itemgetter
from typing import Any

import orjson
import rfc8785

# RFC 8785 section 3.2.2.3 writes every number as an IEEE 754 double in its shortest form, so a
# double from 2**53 up to 1e21 (1e20, say, or 8.333333333333333e18) comes out as plain digits
# ("8333333333333333000"). Plain json.loads reads those back as an int, which the rfc8785 library
# refuses (beyond the I-JSON range, RFC 7493 section 2.2); load_canonical reads them as the double.
_SAFE_INTEGER = 2**53
_AS_IS_LOW = 1e-4  # non-integral floats from here up to 2**53 in magnitude go to orjson as they are
_LARGEST_INTEGER = 2**53 - 1  # rfc8785 refuses ints outside ±(2**53 - 1); so does the fast path
_ABOVE_BMP_LEADS = (b"\xf0", b"\xf1", b"\xf2", b"\xf3", b"\xf4")  # bytes.__contains__: memchr-fast

# Values nested deeper than this go to the reference serialiser, so that recursion limits behave
# exactly as they do there (records are a handful of levels deep).
_FAST_DEPTH = 64

# orjson writes strings exactly as RFC 8785 section 3.2.2.2 asks (only '"', '\\' and
# U+0000..U+001F escaped, as \b \f \n \r \t or \u00xx in lowercase hex; checked for every
# character by tests/records/test_hashing.py) and, with OPT_SORT_KEYS, orders members by code
# point. It writes a float in its own layout, so _prepared hands it only floats whose layout
# agrees with RFC 8785, and the rest as ints or as finished text (orjson.Fragment).
_SORTED = orjson.OPT_SORT_KEYS


@dataclass(frozen=True, slots=True)
class CanonicalText:
    """Text that canonical_json made earlier, embedded as it is in a larger value (so that a
    record's result is serialised once for both its stored column and its chain hash)."""

    text: str


@dataclass(frozen=True, slots=True)
class RecordTexts:
    """The canonical JSON of a record's inputs and result, made once where the record is built
    (its inputs hash is the SHA-256 of ``inputs``), so that archiving it serialises neither again."""

    inputs: bytes
    result: bytes


class _NotFast(Exception):
    """The value needs the reference serialiser (or makes it raise)."""


def canonical_json(obj: Any) -> bytes:
    """RFC 8785 (JSON Canonicalization Scheme) serialisation: the bytes of rfc8785.dumps, and its
    errors, at a fraction of its cost.

    The fast path rewrites the value for orjson (exact types, a few numbers as finished text);
    anything it is not sure of (types other than exactly dict, list, tuple, str, int, float, bool
    and None, so subclasses too; keys that are not str; text holding characters above U+FFFF; integers
    outside ±(2**53 - 1); NaN and infinities; lone surrogates; deep nesting) goes to
    rfc8785.dumps, which then gives the answer or the error."""
    try:
        text = orjson.dumps(_prepared(obj, 0), option=_SORTED)
    except (_NotFast, TypeError, RecursionError):  # orjson.JSONEncodeError is a TypeError
        return bytes(rfc8785.dumps(_expanded(obj)))
    # orjson sorts keys by code point, RFC 8785 section 3.2.3 by UTF-16 code unit; the two
    # orders differ only for characters above U+FFFF (surrogate pairs sort below U+E000..U+FFFF),
    # whose UTF-8 form, alone, starts with a byte F0..F4: text holding one goes to the reference.
    if not text.isascii() and any(lead in text for lead in _ABOVE_BMP_LEADS):
        return bytes(rfc8785.dumps(_expanded(obj)))
    return text


def canonical_plain_rows(rows: list[dict[str, Any]], number: str) -> bytes:
    """canonical_json(rows) for rows the caller vouches for (intake's plain lane reads them):
    exact dicts with the same str keys whose values are exact str (no lone surrogates), None, or
    ints within ±(2**53 - 1), except that under the key `number` each row holds a finite float.
    Only that column is looked at: the rows whose float orjson would write otherwise than RFC
    8785 (see _number) are copied with the number rewritten, and orjson writes the rest."""
    odd = [i for i, value in enumerate(map(itemgetter(number), rows))
           if value.is_integer() or not _AS_IS_LOW <= abs(value) < _SAFE_INTEGER]
    given = rows
    if odd:
        rows = list(rows)
        try:
            for i in odd:
                row = rows[i] = dict(rows[i])
                row[number] = _number(row[number])
        except _NotFast:  # not what was vouched for (NaN, an infinity): the reference decides
            return canonical_json(given)
    try:
        return orjson.dumps(rows, option=_SORTED)
    except TypeError:  # orjson.JSONEncodeError (a lone surrogate, say): as above
        return canonical_json(given)


def _prepared(obj: Any, depth: int) -> Any:
    """`obj` with every float orjson would write differently replaced (see _number): the very
    same object where nothing needs replacing (most of a record: no copy is made), else a copy
    of each container on the way to a replaced value."""
    kind = type(obj)
    keyed = kind is dict
    if keyed or kind is list or kind is tuple:  # orjson writes a tuple as an array, like a list
        if depth > _FAST_DEPTH:
            raise _NotFast
        copied: Any = None
        for key, value in obj.items() if keyed else enumerate(obj):
            if keyed and type(key) is not str:
                raise _NotFast
            kind = type(value)
            if kind is str or value is None or kind is bool:
                continue
            if kind is float:
                if (_AS_IS_LOW <= value < _SAFE_INTEGER or -_SAFE_INTEGER < value <= -_AS_IS_LOW
                        ) and not value.is_integer():
                    continue  # what _number hands back unchanged
                new = _number(value)
            elif kind is int and -_LARGEST_INTEGER <= value <= _LARGEST_INTEGER:
                continue
            else:
                new = _prepared(value, depth + 1)
                if new is value:
                    continue
            if copied is None:
                copied = dict(obj) if keyed else list(obj)
            copied[key] = new
        return obj if copied is None else copied
    if kind is str or kind is bool or obj is None:
        return obj
    if kind is float:
        return _number(obj)
    if kind is int and -_LARGEST_INTEGER <= obj <= _LARGEST_INTEGER:
        return obj
    if kind is CanonicalText:
        return orjson.Fragment(obj.text)
    raise _NotFast


def _number(value: float) -> float | int | orjson.Fragment:
    """What to hand orjson for the RFC 8785 text of a float.

    RFC 8785 section 3.2.2.3 (ECMAScript Number::toString) and orjson pick the same shortest
    digits (as repr() does); they differ in layout only. Writing x = 0.d1..dk × 10**n, orjson
    uses fixed notation for -5 < n <= 16 (checked by the tests against rfc8785), ECMAScript for
    -6 < n <= 21, and ECMAScript drops the ".0" of an integral value and writes "-0" as "0".
    So: an integral double below 2**53 in magnitude is the int of the same value (exact there,
    and its digits are the shortest); a non-integral finite one with 1e-4 <= |x| (hence
    n >= -3; it is below 2**53, so n <= 16) is written alike by both; the rest — |x| < 1e-4,
    integral |x| >= 2**53, NaN and infinities — rfc8785 writes (or refuses)."""
    if value.is_integer():
        if -_SAFE_INTEGER < value < _SAFE_INTEGER:
            return int(value)
    elif _AS_IS_LOW <= value < _SAFE_INTEGER or -_SAFE_INTEGER < value <= -_AS_IS_LOW:
        return value
    try:
        return orjson.Fragment(rfc8785.dumps(value))
    except rfc8785.CanonicalizationError:
        raise _NotFast from None


def _expanded(obj: Any) -> Any:
    """`obj` for the reference serialiser: every CanonicalText read back into values (the result
    has the same canonical form, see load_canonical). rfc8785 copies dicts and tuples itself."""
    kind = type(obj)
    if kind is CanonicalText:
        return load_canonical(obj.text)
    if kind is dict:
        return {key: _expanded(value) for key, value in obj.items()}
    if kind is list or kind is tuple:
        return [_expanded(value) for value in obj]
    return obj


def load_canonical(text: str | bytes) -> Any:
    """Read canonical JSON back so that canonical_json(load_canonical(t)) == t: an integer
    literal of 2**53 or more whose digits are exactly the canonical form of a double is that
    double (normalized inputs never hold such integers: float fields are floats, int fields stay
    below 2**53)."""
    return json.loads(text, parse_int=_parse_int)


def _parse_int(literal: str) -> int | float:
    # The C decoder calls this for integer literals only (a record holds a few dozen of them);
    # fifteen characters or fewer is below 10**15 < 2**53 in magnitude.
    if len(literal) < 16:
        return int(literal)
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
