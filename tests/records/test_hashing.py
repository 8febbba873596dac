"""The inputs hash is SHA-256 over the RFC 8785 canonical form; check that form against the RFC."""

from __future__ import annotations

import hashlib
import json
import math
import struct
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
import rfc8785
from hypothesis import given, settings
from hypothesis import strategies as st

from service.records.hashing import CanonicalText, canonical_json, inputs_sha256, load_canonical


def test_rfc8785_section_3_2_2_example() -> None:
    """RFC 8785 §3.2.2 (and §3.2.3 sorting): the sample input and its canonical output, as printed in
    the RFC (transcribed from memory of the RFC text)."""
    source = (
        '{"numbers": [333333333.33333329, 1E30, 4.50, 2e-3, 0.000000000000000000000000001],'
        ' "string": "\\u20ac$\\u000F\\u000aA\'\\u0042\\u0022\\u005c\\\\\\"\\/",'
        ' "literals": [null, true, false]}'
    )
    expected = (
        '{"literals":[null,true,false],"numbers":[333333333.3333333,1e+30,4.5,0.002,1e-27],'
        '"string":"€$\\u000f\\nA\'B\\"\\\\\\\\\\"/"}'
    )
    assert canonical_json(json.loads(source)) == expected.encode("utf-8")


def test_rfc8785_property_sorting_by_utf16_code_units() -> None:
    """RFC 8785 §3.2.3: members sorted by UTF-16 code units, so U+1F600 (surrogates D83D DE00)
    sorts before U+FB33 (from memory of the RFC's example)."""
    source = {
        "\u20ac": "Euro Sign",
        "\r": "Carriage Return",
        "\ufb33": "Hebrew Letter Dalet With Dagesh",
        "1": "One",
        "\U0001f600": "Emoji: Grinning Face",
        "\u0080": "Control",
        "ö": "Latin Small Letter O With Diaeresis",
    }
    keys = list(json.loads(canonical_json(source)).keys())
    assert keys == ["\r", "1", "\u0080", "\u00f6", "\u20ac", "\U0001f600", "\ufb33"]


@pytest.mark.parametrize(
    ("value", "text"),
    [
        (0.0, "0"),
        (-0.0, "0"),
        (5e-324, "5e-324"),
        (1.7976931348623157e308, "1.7976931348623157e+308"),
        (9007199254740992.0, "9007199254740992"),
        (295147905179352830000.0, "295147905179352830000"),
        (1e21, "1e+21"),
        (1e-7, "1e-7"),
        (0.000001, "0.000001"),
        (333333333.3333333, "333333333.3333333"),
    ],
)
def test_rfc8785_appendix_b_number_serialisation(value: float, text: str) -> None:
    """RFC 8785 Appendix B: IEEE 754 doubles and their ECMAScript serialisation (values from memory
    of the appendix table)."""
    assert canonical_json(value) == text.encode("ascii")


def test_inputs_hash_is_sha256_of_canonical_form() -> None:
    """Definition in DESIGN.md §Record: hex SHA-256 of the RFC 8785 canonical JSON; FIPS 180-4 SHA-256
    via hashlib, with the canonical bytes written out by hand."""
    inputs = {"b": [1, 2.5], "a": {"z": None, "y": "é"}}
    expected_bytes = '{"a":{"y":"é","z":null},"b":[1,2.5]}'.encode()
    assert inputs_sha256(inputs) == hashlib.sha256(expected_bytes).hexdigest()


def test_nonfinite_numbers_cannot_be_hashed() -> None:
    """RFC 8785 §3.2.2.3: NaN and Infinity are not representable; serialisation must fail."""
    with pytest.raises(Exception):  # noqa: B017 - the library's own error type
        canonical_json({"x": float("nan")})


def test_canonical_text_reads_back_to_the_same_bytes() -> None:
    """RFC 8785 §3.2.2.3 writes doubles from 2**53 up to 1e21 as plain digits (ECMAScript
    Number::toString); reading them back must give the doubles again, so re-canonicalizing is
    the identity. A genuine integer of 2**53 + 1 is not a double's canonical form and stays int."""
    text = canonical_json({"a": 1e20, "b": -8.333333333333333e18, "c": 9007199254740992.0, "d": 3})
    assert text == b'{"a":100000000000000000000,"b":-8333333333333333000,"c":9007199254740992,"d":3}'
    assert canonical_json(load_canonical(text)) == text
    assert load_canonical(b"[9007199254740993]") == [9007199254740993]


# Numbers where Python's repr() and ECMAScript's Number::toString part ways, or that RFC 8785 and
# the rfc8785 package refuse: the thresholds of fixed and exponent notation on both sides, the
# ".0" of integral doubles, -0, the end of the exact integers (2**53) and the non-finite values.
HOSTILE_NUMBERS: list[Any] = [
    0.0, -0.0, 1e21, -1e21, 1e-7, -1e-7, 5e-324, -5e-324, 1e20, 123456789012345680000.0,
    999999999999999900000.0, 1e16, 1e15, 9007199254740992.0, 9007199254740994.0,
    9007199254740991.0, float(2**55), 8.333333333333333e18, 0.1 + 0.2, 1e-4, -1e-4,
    9.999999999999999e-05, 1e-5, 1.5e-9, 1e-6, 9.999999999999999e-07, 1e-10,
    1.7976931348623157e308, 2.2250738585072014e-308, 5614.0, -107.0,
    2**53, -(2**53), 2**53 - 1, -(2**53 - 1), 2**64, True, False,
    float("nan"), float("inf"), float("-inf"),
]
# Characters that need care: controls (escaped as \b \f \n \r \t or \u00xx), DEL and
# U+2028/U+2029 (not escaped), quote and backslash, U+E000..U+FFFF against characters above U+FFFF
# (UTF-16 order), lone surrogates (refused), and the lone low surrogate the fast path uses to mark
# the values it splices back.
SPECIAL_CHARACTERS = [chr(c) for c in range(0x20)] + [
    "\x7f", "\u2028", "\u2029", '"', "\\", "/", "\ue000", "\ufb33", "\uffff", "\U0001f600",
    "\U00010000", "\U0010ffff", "\ud800", "\udc00", "\udfff", "é", "€",
]


def _double_of_bits(bits: int) -> float:
    value: float = struct.unpack("<d", bits.to_bytes(8, "little"))[0]
    return value


characters = st.one_of(st.characters(), st.sampled_from(SPECIAL_CHARACTERS))
strings = st.one_of(
    st.text(characters, max_size=8),
    st.integers(0, 9).map(lambda i: f"\udc00{i}"),  # the fast path's own marks, from outside
)
keys = st.one_of(strings, st.sampled_from(["\U0001f600", "\ufb33", "\ue000", "a", "\udc000"]))
finite_doubles = st.integers(0, 2**64 - 1).map(_double_of_bits).filter(math.isfinite)
scalars = st.one_of(
    st.none(), st.booleans(), st.integers(-(2**60), 2**60), st.integers(-(2**53) - 2, 2**53 + 2),
    st.floats(), finite_doubles, st.sampled_from(HOSTILE_NUMBERS), strings,
)
values = st.recursive(
    scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=5),
        st.tuples(inner, inner),
        st.dictionaries(keys, inner, max_size=5),
        st.dictionaries(st.integers(0, 3), inner, min_size=1, max_size=2),  # keys must be str
    ),
    max_leaves=25,
)


def _outcome(serialise: Callable[[Any], bytes], value: Any) -> bytes | type[BaseException]:
    try:
        return bytes(serialise(value))
    except Exception as exc:  # the error type is what is compared
        return type(exc)


@settings(max_examples=600, deadline=None)
@given(values)
def test_same_bytes_and_same_errors_as_the_rfc8785_package(value: Any) -> None:
    """The rfc8785 package (a reference implementation of RFC 8785) is the oracle: for nested
    dicts, lists, tuples and strings (controls, characters above U+FFFF, lone surrogates) and the
    numbers above, canonical_json gives its bytes, or raises the same error type."""
    assert _outcome(canonical_json, value) == _outcome(rfc8785.dumps, value)


@settings(max_examples=300, deadline=None)
@given(values)
def test_the_value_serialised_is_left_as_it_was(value: Any) -> None:
    """canonical_json hands orjson the caller's own containers where nothing in them needs
    rewriting, and copies the rest: the argument itself never changes (compared by its repr,
    which shows every float exactly, -0.0 and NaN too, and every type; common practice)."""
    before = repr(value)
    _outcome(canonical_json, value)
    assert repr(value) == before


@settings(max_examples=200, deadline=None)
@given(st.dictionaries(st.text(st.sampled_from(["a", "\ue000", "\uffff", "\U00010000", "\U0001f600"]),
                               max_size=3), st.integers(0, 9), min_size=2, max_size=8))
def test_key_order_as_the_rfc8785_package(value: dict[str, int]) -> None:
    """RFC 8785 §3.2.3 orders members by UTF-16 code units, where characters above U+FFFF
    (surrogate pairs) sort below U+E000..U+FFFF, unlike code-point order; the rfc8785 package is
    the oracle."""
    assert canonical_json(value) == rfc8785.dumps(value)


@settings(max_examples=300, deadline=None)
@given(st.lists(finite_doubles, min_size=1, max_size=20))
def test_random_doubles_as_the_rfc8785_package(doubles: list[float]) -> None:
    """Doubles from uniformly random bit patterns (every exponent, subnormals, both signs),
    alone, in lists and in objects, written as the rfc8785 package writes them (RFC 8785
    section 3.2.2.3, ECMAScript Number::toString)."""
    for shape in (doubles, {f"k{i}": d for i, d in enumerate(doubles)}, doubles[0]):
        assert canonical_json(shape) == rfc8785.dumps(shape)


@pytest.mark.parametrize("number", HOSTILE_NUMBERS, ids=repr)
def test_hostile_numbers_as_the_rfc8785_package(number: Any) -> None:
    """Each number alone, in a list and as an object member: the rfc8785 package's bytes, or its
    error (IntegerDomainError beyond ±(2**53 - 1), I-JSON RFC 7493 §2.2; FloatDomainError for NaN
    and infinities, RFC 8785 §3.2.2.3)."""
    for shape in (number, [number, 1], {"b": number, "a": [number]}):
        assert _outcome(canonical_json, shape) == _outcome(rfc8785.dumps, shape)


@pytest.mark.parametrize(
    ("value", "text"),
    [
        (1e21, "1e+21"),
        (1e20, "100000000000000000000"),
        (123456789012345680000.0, "123456789012345680000"),
        (0.1 + 0.2, "0.30000000000000004"),
        (1e-6, "0.000001"),
        (1e-7, "1e-7"),
        (1.5e-5, "0.000015"),
        (-0.0, "0"),
        (5614.0, "5614"),
        (1e16, "10000000000000000"),
    ],
)
def test_ecmascript_number_to_string(value: float, text: str) -> None:
    """ECMA-262 Number::toString (which RFC 8785 §3.2.2.3 adopts): plain digits up to 21 of them,
    "0.00…" down to 1e-6, exponent form with an explicit sign beyond (from memory of the
    algorithm's steps)."""
    assert canonical_json(value) == text.encode("ascii")


def test_integers_beyond_the_exact_range_are_refused() -> None:
    """RFC 8785 §3.2.2.3 serialises numbers as IEEE 754 doubles, and I-JSON (RFC 7493 §2.2)
    keeps integers within ±(2**53 - 1); the rfc8785 package raises IntegerDomainError beyond."""
    assert canonical_json([2**53 - 1, -(2**53 - 1)]) == b"[9007199254740991,-9007199254740991]"
    for number in (2**53, -(2**53), 10**30):
        with pytest.raises(rfc8785.IntegerDomainError):
            canonical_json({"n": number})


@pytest.mark.parametrize(
    ("value", "error"),
    [
        ("\ud800", rfc8785.CanonicalizationError),
        (["ok", "\udc00"], rfc8785.CanonicalizationError),
        ({"a": "\udc000", "b": 1e-7}, rfc8785.CanonicalizationError),
        ({"\udfff": 1}, UnicodeEncodeError),  # the package's UTF-16 sort key fails first
    ],
)
def test_lone_surrogates_are_refused(value: Any, error: type[ValueError]) -> None:
    """RFC 8785 §3.2.2.2 (strings are Unicode, written as UTF-8): a lone surrogate has no UTF-8
    form; the rfc8785 package refuses it, with these error types, and so does canonical_json."""
    with pytest.raises(error):
        rfc8785.dumps(value)
    with pytest.raises(error):
        canonical_json(value)


def test_demo_record_as_the_rfc8785_package() -> None:
    """A whole record the project makes (the demo study in sample_requests, invented numbers) is
    written as the rfc8785 package writes it."""
    from service.intake.reading import read_request
    from service.records.building import build_record

    body = (Path(__file__).resolve().parents[2] / "sample_requests" / "vitamin_d3_softgel.json")
    record = build_record(read_request("json", body.read_bytes(), {}))
    assert canonical_json(record) == rfc8785.dumps(record)


@settings(max_examples=300, deadline=None)
@given(values, keys)
def test_canonical_text_is_spliced_as_the_value_it_came_from(value: Any, key: str) -> None:
    """An object holding CanonicalText(canonical_json(v)) has the canonical form of the object
    holding v (rfc8785 package as the oracle), also when a key above U+FFFF sends the whole object
    to the reference serialiser."""
    try:
        text = rfc8785.dumps(value).decode("utf-8")
        expected = rfc8785.dumps({key: 1.0, "result": value, "z": [0.5]})
    except (rfc8785.CanonicalizationError, UnicodeError):
        return  # nothing to embed
    assert canonical_json({key: 1.0, "result": CanonicalText(text), "z": [0.5]}) == expected


@settings(max_examples=300, deadline=None)
@given(values)
def test_canonical_text_reads_back_to_itself(value: Any) -> None:
    """canonical form → load_canonical → canonical form is the identity (the rfc8785 package
    writes both forms), which lets the archive hash a record's stored text as it is."""
    try:
        text = rfc8785.dumps(value)
    except (rfc8785.CanonicalizationError, UnicodeError):
        return
    assert rfc8785.dumps(load_canonical(text)) == text


def _typed(value: Any) -> Any:
    """A value with the type of every number kept (1 and 1.0 compare equal in Python)."""
    if isinstance(value, dict):
        return {key: _typed(item) for key, item in value.items()}
    if isinstance(value, list):
        return [_typed(item) for item in value]
    return (type(value).__name__, value)


@settings(max_examples=300, deadline=None)
@given(values)
def test_reading_back_without_the_integer_hook_changes_no_type(value: Any) -> None:
    """load_canonical reads text that holds no integer literal of 16 digits or more with the plain
    C decoder (json.loads), and any other text with the hook that turns canonical doubles back
    into floats; either way the values and their types are the hook's."""
    from service.records.hashing import _parse_int

    try:
        text = rfc8785.dumps(value)
    except (rfc8785.CanonicalizationError, UnicodeError):
        return
    expected = json.loads(text, parse_int=_parse_int)
    assert _typed(load_canonical(text)) == _typed(expected)
    assert _typed(load_canonical(text.decode("utf-8"))) == _typed(expected)


def test_every_character_is_written_as_the_rfc8785_package_writes_it() -> None:
    """RFC 8785 §3.2.2.2: a string escapes only '"', '\\' and U+0000..U+001F (as \\b \\f \\n \\r
    \\t or \\u00xx, lowercase hex) and writes every other character as it is. Every code point
    outside the surrogates, alone, as a key and in a longer string, against the rfc8785 package."""
    characters = [chr(c) for c in range(0x110000) if not 0xD800 <= c <= 0xDFFF]
    for start in range(0, len(characters), 4096):
        chunk = characters[start:start + 4096]
        text = "".join(chunk)
        assert canonical_json(chunk) == rfc8785.dumps(chunk)
        assert canonical_json({"k": text, text[:64]: 1}) == rfc8785.dumps({"k": text, text[:64]: 1})


@pytest.mark.parametrize("exponent", range(-330, 310))
def test_doubles_near_every_power_of_ten_as_the_rfc8785_package(exponent: int) -> None:
    """Where fixed and exponent layouts meet (ECMAScript Number::toString switches at 1e-6 and
    1e21): 10**e and its neighbours one unit in the last place away, both signs, against the
    rfc8785 package."""
    power = float(f"1e{exponent}")
    doubles = [x for x in (math.nextafter(power, 0.0), power, math.nextafter(power, math.inf),
                           power * 1.5, power * 9.999999999999998) if math.isfinite(x)]
    doubles += [-x for x in doubles]
    assert canonical_json(doubles) == rfc8785.dumps(doubles)


# Text that could fool a search for `"value":<number>` in the serialised rows: the pattern itself
# inside a label, quotes, backslashes, and the digits of the values around it.
_TRICKY_LABELS = ['"value":5614.0}', '"value":1.0,', 'value', '\\', '"', '\\"value\\":2.0}',
                  ':1.0}', "S1", "é", "\u2028"]
_plain_labels = st.one_of(st.sampled_from(_TRICKY_LABELS), st.text(max_size=4).filter(
    lambda text: all(not 0xD800 <= ord(c) <= 0xDFFF for c in text)))
_plain_numbers = st.one_of(
    finite_doubles, st.sampled_from([n for n in HOSTILE_NUMBERS if type(n) is float
                                     and math.isfinite(n)]),
    st.integers(-(2**53) + 1, 2**53 - 1).map(float),
)


@settings(max_examples=500, deadline=None)
@given(st.sampled_from(["value", "a", "zz"]),
       st.lists(st.tuples(_plain_labels, st.integers(-(2**53) + 1, 2**53 - 1),
                          st.none() | _plain_labels, _plain_numbers), max_size=20),
       st.lists(_plain_numbers, min_size=1, max_size=3))
def test_plain_rows_as_the_rfc8785_package(
    number: str, cells: list[tuple[str, int, str | None, float]], repeated: list[float],
) -> None:
    """canonical_plain_rows (orjson's text with some numbers replaced) gives rfc8785's bytes for
    rows of the kind the plain lane vouches for, with the number's key first, last or between,
    labels holding the very pattern it replaces, and repeated hostile numbers (1e21, 5e-324,
    -0.0, 1e-7, integral doubles past 2**53)."""
    from service.records.hashing import canonical_plain_rows

    rows = [{"subject": s, "period": p, "sequence": q, number: v} for s, p, q, v in cells]
    rows += [{"subject": "S", "period": 1, "sequence": None, number: v} for v in repeated * 2]
    assert canonical_plain_rows(rows, number) == rfc8785.dumps(rows)


def test_plain_rows_that_are_not_plain_go_to_the_reference() -> None:
    """Rows that break the promise (a NaN, a lone surrogate) get the reference's error (not
    orjson's null or its own error); many numbers to rewrite give the same bytes."""
    from service.records.hashing import canonical_plain_rows

    rows = [{"subject": "S1", "value": 1.0}, {"subject": "S2", "value": float("nan")}]
    with pytest.raises(ValueError):
        canonical_plain_rows(rows, "value")
    with pytest.raises(ValueError):  # a lone surrogate: rfc8785 refuses it, so does this
        canonical_plain_rows([{"subject": "\ud800", "value": 1.5}], "value")
    many = [{"subject": f"S{i}", "value": float(i)} for i in range(40)]
    assert canonical_plain_rows(many, "value") == rfc8785.dumps(many)
