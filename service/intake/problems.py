"""Problems found in a request, and the JSON body reader that reports them."""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

import orjson

Loc = tuple[str | int, ...]


@dataclass(frozen=True)
class Problem:
    loc: Loc
    msg: str


class InvalidRequest(Exception):
    """A request that cannot be analysed; carries every problem found, never an empty list."""

    problems: list[Problem]

    def __init__(self, problems: list[Problem]) -> None:
        if not problems:
            # An empty list would render as an error response that names nothing to fix.
            problems = [Problem(("body",), "the request is invalid")]
        self.problems = list(problems)
        super().__init__("; ".join(f"{format_loc(p.loc)}: {p.msg}" for p in self.problems))


def format_loc(loc: Loc) -> str:
    """Render a location for people.

    ("records", 12, "value") -> "records[12].value"; ("line", 7, "value") -> "line 7, column value".
    """
    if not loc:
        return "body"
    if loc[0] == "line" and len(loc) >= 2:
        text = f"line {loc[1]}"
        if len(loc) >= 3:
            text += f", column {loc[2]}"
        for extra in loc[3:]:
            text += f".{extra}"
        return text
    text = str(loc[0])
    for part in loc[1:]:
        text += f"[{part}]" if isinstance(part, int) else f".{part}"
    return text


class _ConstantNotAllowed(ValueError):
    pass


def _reject_constant(name: str) -> Any:
    raise _ConstantNotAllowed(name)


def decode_utf8(body: bytes, loc: Loc) -> str:
    """Decode UTF-8 with or without a byte-order mark, or raise a problem naming the byte offset."""
    try:
        return body.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InvalidRequest(
            [Problem(loc, f"not valid UTF-8: byte {exc.start} (0x{body[exc.start]:02x}) "
                          f"cannot be decoded")]
        ) from None


# bytes.translate table: every ASCII digit to "0", every other byte to " "; nineteen digits in a
# row can be an integer literal outside the 64 bits orjson reads as an int (it reads those as a
# float, where the standard decoder keeps the int).
_DIGITS_ONLY = bytes(48 if 48 <= byte <= 57 else 32 for byte in range(256))
_LONG_DIGIT_RUN = b"0" * 19


def parse_json_body(body: bytes) -> Any:
    """The JSON value of `body`, or InvalidRequest naming what is wrong with it.

    orjson reads it (about three times as fast) unless it holds a run of nineteen or more digits;
    anything orjson refuses (NaN, lone surrogates, deep nesting, bad syntax, ...) is read again by
    the standard decoder, whose value or error is the answer. On every other text the two give
    equal values (tests/intake/test_tables.py compares them)."""
    text = decode_utf8(body, ("body",))
    if _LONG_DIGIT_RUN not in body.translate(_DIGITS_ONLY):
        try:
            return orjson.loads(text)
        except orjson.JSONDecodeError:
            pass
    try:
        return json.loads(text, parse_constant=_reject_constant)
    except _ConstantNotAllowed as exc:
        raise InvalidRequest(
            [Problem(("body",), f"{exc.args[0]} is not allowed in JSON: numbers must be finite; "
                                "use null for a missing value")]
        ) from None
    except json.JSONDecodeError as exc:
        raise InvalidRequest(
            [Problem(("body",),
                     f"malformed JSON at line {exc.lineno} column {exc.colno}: {exc.msg}")]
        ) from None
    except RecursionError:
        raise InvalidRequest([Problem(("body",), "JSON is nested too deeply")]) from None
    except ValueError as exc:
        # e.g. an integer literal longer than Python's digit limit
        raise InvalidRequest([Problem(("body",), f"JSON cannot be read: {exc}")]) from None
