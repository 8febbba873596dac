"""The inputs hash is SHA-256 over the RFC 8785 canonical form; check that form against the RFC."""

from __future__ import annotations

import hashlib
import json

import pytest

from service.records.hashing import canonical_json, inputs_sha256


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
    from service.records.hashing import load_canonical

    text = canonical_json({"a": 1e20, "b": -8.333333333333333e18, "c": 9007199254740992.0, "d": 3})
    assert text == b'{"a":100000000000000000000,"b":-8333333333333333000,"c":9007199254740992,"d":3}'
    assert canonical_json(load_canonical(text)) == text
    assert load_canonical(b"[9007199254740993]") == [9007199254740993]
