"""CSV uploads (service/csvinput.py, exposed as service.tables.parse_csv_body)."""

from __future__ import annotations

import io
from typing import Any

import numpy as np
import pandas as pd
import pytest
import rfc8785
from hypothesis import given, settings
from hypothesis import strategies as st

from service.intake.tables import InvalidRequest, Problem, normalize_request, parse_csv_body

QUERY = {"test": "T", "reference": "R", "baseline": "B", "seed": "424242", "replicates": "500"}


def make_rows(n: int = 6, seed: int = 5) -> list[dict[str, Any]]:
    """A constructed three-arm crossover with seeded values (3 decimals, so text round-trips)."""
    rng = np.random.default_rng(seed)
    orders = [("T", "R", "B"), ("R", "B", "T"), ("B", "T", "R")]
    rows = []
    for i in range(n):
        order = orders[i % 3]
        for period, treatment in enumerate(order, start=1):
            rows.append({"subject": f"S{i + 1:02d}", "period": period,
                         "sequence": "".join(order), "treatment": treatment, "metric": "AUC",
                         "value": float(np.round(rng.uniform(5, 50), 3))})
    return rows


def to_csv(rows: list[dict[str, Any]], delimiter: str = ",", decimal: str = ".",
           header: list[str] | None = None) -> bytes:
    names = header or ["subject", "period", "sequence", "treatment", "metric", "value"]
    keys = [n.strip().lower() for n in names]
    lines = [delimiter.join(names)]
    for row in rows:
        cells = []
        for key in keys:
            cell = row.get(key, "")
            text = "" if cell is None else str(cell)
            cells.append(text.replace(".", decimal) if key == "value" else text)
        lines.append(delimiter.join(cells))
    return ("\n".join(lines) + "\n").encode("utf-8")


def problems_of(body: bytes, query: dict[str, str] | None = None) -> list[Problem]:
    with pytest.raises(InvalidRequest) as info:
        parse_csv_body(body, QUERY if query is None else query)
    assert info.value.problems
    return info.value.problems


def find(problems: list[Problem], loc: tuple[str | int, ...], fragment: str) -> Problem:
    hits = [p for p in problems if p.loc == loc and fragment in p.msg]
    assert hits, f"no problem at {loc} containing {fragment!r}; got {problems}"
    return hits[0]


def check_against_pandas(body: bytes, sep: str, decimal: str) -> None:
    parsed = parse_csv_body(body, QUERY)["records"]
    frame = pd.read_csv(io.BytesIO(body), sep=sep, decimal=decimal, encoding="utf-8-sig",
                        dtype={"subject": str, "sequence": str, "treatment": str, "metric": str})
    frame.columns = [c.strip().lower() for c in frame.columns]
    assert len(parsed) == len(frame)
    for record, (_, row) in zip(parsed, frame.iterrows(), strict=True):
        assert record["subject"] == row["subject"] and record["treatment"] == row["treatment"]
        assert record["period"] == int(row["period"]) and type(record["period"]) is int
        assert record["value"] == float(row["value"]) and type(record["value"]) is float


def test_comma_delimited_matches_pandas() -> None:
    """Cells agree with pandas.read_csv on the same bytes (reference library; RFC 4180 CSV)."""
    check_against_pandas(to_csv(make_rows()), ",", ".")


def test_semicolon_with_decimal_comma_matches_pandas() -> None:
    """Semicolon lists with decimal commas are the common spreadsheet export in comma-decimal
    locales (common practice); pandas.read_csv(sep=';', decimal=',') is the reference."""
    check_against_pandas(to_csv(make_rows(), ";", ","), ";", ",")


def test_tab_delimited_with_decimal_comma_matches_pandas() -> None:
    """Tab-separated values (IANA text/tab-separated-values); pandas.read_csv(sep='\\t') is the
    reference."""
    check_against_pandas(to_csv(make_rows(), "\t", "."), "\t", ".")
    check_against_pandas(to_csv(make_rows(), "\t", ","), "\t", ",")


def test_bom_and_case_insensitive_headers() -> None:
    """A UTF-8 byte-order mark is tolerated (RFC 3629 section 6, "utf-8-sig" in Python); header
    names compare after stripping and lower-casing (common practice for spreadsheet exports)."""
    header = [" Subject", "PERIOD ", "Sequence", "Treatment", "METRIC", " Value "]
    body = b"\xef\xbb\xbf" + to_csv(make_rows(), ",", ".", header)
    check_against_pandas(body, ",", ".")
    assert parse_csv_body(body, QUERY) == parse_csv_body(to_csv(make_rows()), QUERY)


def test_csv_normalizes_to_the_json_request() -> None:
    """The CSV form and the JSON form of one request give the same inputs and the same RFC 8785
    canonical bytes (data contract: same inputs_sha256)."""
    rows = make_rows()
    for row in rows[::4]:
        row["sequence"] = None  # empty optional cell -> absent
    json_request = {
        "study": {"title": "Lot change", "analyte": "compound X", "unit": "ng·h/mL"},
        "design": {"test": "T", "reference": "R", "baseline": "B"},
        "records": [{k: v for k, v in r.items() if v is not None} for r in rows],
        "settings": {"seed": 424242, "replicates": 500, "confidence_level": 0.95,
                     "interval": "percentile", "limits": {"lower": -0.25, "upper": 0.25},
                     "stratify_by_sequence": True, "incomplete_subjects": "reject"},
    }
    query = {**QUERY, "title": "Lot change", "analyte": "compound X", "unit": "ng·h/mL",
             "confidence_level": "0.95", "interval": "percentile", "limit_lower": "-0.25",
             "limit_upper": "0.25", "stratify_by_sequence": "1", "incomplete_subjects": "reject"}
    for delimiter, decimal in ((",", "."), (";", ","), ("\t", ",")):
        from_csv = normalize_request(parse_csv_body(to_csv(rows, delimiter, decimal), query))
        from_json = normalize_request(json_request)
        assert from_csv == from_json
        assert rfc8785.dumps(from_csv) == rfc8785.dumps(from_json)


def test_missing_query_parameters_are_absent() -> None:
    """Absent parameters take the JSON defaults (data contract), so the dicts match too."""
    raw = parse_csv_body(to_csv(make_rows()), {"test": "T", "reference": "R", "baseline": "B"})
    assert set(raw) == {"design", "records"}
    assert all("sequence" in r for r in raw["records"])
    rows = make_rows()
    for row in rows:
        row["metric"] = None
    raw = parse_csv_body(to_csv(rows), QUERY)
    assert all("metric" not in r for r in raw["records"])
    assert {r["metric"] for r in normalize_request(raw)["records"]} == {"response"}


def test_error_lines_and_columns() -> None:
    """Line numbers are physical lines, header = line 1 (common practice for text-file
    diagnostics); a quoted cell may span lines (RFC 4180 section 2.6), and the row is named by its
    first line."""
    body = (
        b"subject,period,treatment,value\n"      # line 1
        b"S01,1,T,3.5\n"                         # line 2
        b"S01,one,R,2\n"                         # line 3: bad period
        b"\"S\n02\",1,T,\n"                      # lines 4-5: empty value
        b"S02,2,R,NaN\n"                         # line 6: not finite
        b"S03,1,T\n"                             # line 7: too few cells
        b"S03,2,R,1e999\n"                       # line 8: overflows to infinity
        b"S04,2.0,R,3,5\n"                       # line 9: too many cells (comma delimiter)
        b",3,R,4\n"                              # line 10: empty subject
    )
    problems = problems_of(body)
    find(problems, ("line", 3, "period"), "whole number, got 'one'")
    find(problems, ("line", 4, "value"), "is empty")
    find(problems, ("line", 6, "value"), "finite number, got 'NaN'")
    find(problems, ("line", 7), "has 3 cells but the header has 4")
    find(problems, ("line", 8, "value"), "finite number, got '1e999'")
    find(problems, ("line", 9), "has 5 cells")
    find(problems, ("line", 10, "subject"), "is empty")
    assert len(problems) == 7


def test_header_problems() -> None:
    """Required columns from the data contract; unknown columns are refused rather than ignored
    (common practice for strict imports)."""
    find(problems_of(b"subject,period,treatment\nS01,1,T\n"), ("header",),
         "missing required column(s): value")
    find(problems_of(b"subject,period,treatment,value,colour\nS01,1,T,3,red\n"), ("header",),
         "unknown column(s) 'colour'")
    find(problems_of(b"subject,period,treatment,value,Value\nS01,1,T,3,3\n"), ("header",),
         "more than once: value")
    find(problems_of(b""), ("header",), "no header line")
    find(problems_of(b"subject,period,treatment,value\n"), ("records",), "no data lines")


def test_bad_utf8_named() -> None:
    """The failing byte offset agrees with Python's UTF-8 codec (RFC 3629)."""
    body = b"subject,period,treatment,value\nS\xe901,1,T,3\n"
    try:
        body.decode("utf-8")
    except UnicodeDecodeError as exc:
        offset = exc.start
    find(problems_of(body), ("body",), f"byte {offset}")


def test_query_problems() -> None:
    """Flat query names from the data contract; numbers in plain decimal notation, booleans as
    true/false/1/0 (common practice for URL query strings)."""
    body = to_csv(make_rows())
    query = {**QUERY, "replicate": "500", "seed": "12.5", "confidence_level": "ninety",
             "limit_upper": "inf", "stratify_by_sequence": "yes"}
    problems = problems_of(body, query)
    find(problems, ("query", "replicate"), "unknown query parameter")
    find(problems, ("query", "seed"), "whole number, got '12.5'")
    find(problems, ("query", "confidence_level"), "finite number, got 'ninety'")
    find(problems, ("query", "limit_upper"), "finite number, got 'inf'")
    find(problems, ("query", "stratify_by_sequence"), "true, false, 1 or 0")
    assert len(problems) == 5
    for text, flag in (("true", True), ("FALSE", False), ("1", True), ("0", False)):
        raw = parse_csv_body(body, {**QUERY, "stratify_by_sequence": text})
        assert raw["settings"]["stratify_by_sequence"] is flag


def test_table_problems_pass_through_normalization() -> None:
    """A CSV whose cells are fine but whose table breaks a crossover rule is refused by the same
    checks as JSON (data contract); here a treatment outside the design."""
    rows = make_rows()
    rows[2]["treatment"] = "X"
    with pytest.raises(InvalidRequest) as info:
        normalize_request(parse_csv_body(to_csv(rows), QUERY))
    find(info.value.problems, ("records", 2, "treatment"), "not in the design")


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=200) | st.text(alphabet="subjectpriodvalu,;\t\n\"1.2 STRB", max_size=120)
       .map(lambda t: t.encode()))
def test_arbitrary_bytes_raise_only_invalid_request(body: bytes) -> None:
    """Bad input gets a problem list, never another exception (RFC 9457 problem details)."""
    try:
        raw = parse_csv_body(body, QUERY)
        normalize_request(raw)
    except InvalidRequest as exc:
        assert exc.problems and all(p.msg for p in exc.problems)


@settings(max_examples=100, deadline=None)
@given(st.dictionaries(st.text(max_size=12), st.text(max_size=12), max_size=5))
def test_arbitrary_query_raises_only_invalid_request(query: dict[str, str]) -> None:
    """Bad query parameters get a problem list, never another exception (RFC 9457)."""
    try:
        normalize_request(parse_csv_body(to_csv(make_rows()), query))
    except InvalidRequest as exc:
        assert exc.problems
