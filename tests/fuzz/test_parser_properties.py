"""Property tests of the request readers: near-valid JSON requests and CSV files in many dialects.

For every generated input the outcome is one of two: normalized inputs that are plain JSON
(RFC 8259 has no NaN or Infinity, so json.dumps(allow_nan=False) must succeed) and can be hashed
(RFC 8785), or InvalidRequest whose problems each name a location and say what is wrong (RFC 9457
problem details, as the data contract requires). Where a mutation is known to break the request,
the test also checks that the problem names the mutated field.
"""

from __future__ import annotations

import codecs
import copy
import csv
import io
import json
import math
from typing import Any

import numpy as np
import rfc8785
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.intake.tables import InvalidRequest, normalize_request, parse_csv_body, parse_json_body
from service.records.building import build_record
from service.records.hashing import canonical_json, load_canonical

ORDERS = {"TRB": ("T", "R", "B"), "RBT": ("R", "B", "T"), "BTR": ("B", "T", "R")}
COLUMNS = ("subject", "period", "sequence", "treatment", "metric", "value")
QUICK = settings(max_examples=80, deadline=None, database=None,
                 suppress_health_check=[HealthCheck.too_slow])

# Labels people really type: letters of any script, digits, punctuation, symbols and inner spaces,
# but no control characters and never blank (a blank label is an error, tested apart).
label_text = st.text(
    alphabet=st.characters(codec="utf-8", exclude_categories=("Cc", "Cs", "Zl", "Zp")),
    min_size=1, max_size=12,
).filter(lambda text: text.strip() != "")


def valid_request(subjects: int = 6, seed: int = 3) -> dict[str, Any]:
    """A constructed three-period crossover with seeded lognormal values."""
    rng = np.random.default_rng(seed)
    records = []
    for i in range(subjects):
        label = list(ORDERS)[i % 3]
        for period, treatment in enumerate(ORDERS[label], start=1):
            records.append({"subject": f"S{i + 1:02d}", "period": period, "sequence": label,
                            "treatment": treatment, "metric": "AUC",
                            "value": float(np.round(rng.lognormal(3.0, 0.4), 3))})
    return {"study": {"title": "fuzz"}, "design": {"test": "T", "reference": "R", "baseline": "B"},
            "records": records, "settings": {"seed": 99, "replicates": 100}}


def assert_outcome_is_clean(raw: Any) -> dict[str, Any] | None:
    """Normalize; return the inputs (checked to be plain JSON) or None after checking the problems."""
    try:
        inputs = normalize_request(raw)
    except InvalidRequest as exc:
        assert exc.problems
        for problem in exc.problems:
            assert len(problem.loc) > 0, problem
            assert all(isinstance(part, str | int) for part in problem.loc), problem
            assert isinstance(problem.msg, str) and problem.msg.strip(), problem
        return None
    json.dumps(inputs, allow_nan=False)  # RFC 8259: no NaN/Infinity
    rfc8785.dumps(inputs)  # RFC 8785: the inputs can be hashed
    return inputs


def problem_locs(raw: Any) -> list[tuple[str | int, ...]]:
    try:
        normalize_request(raw)
    except InvalidRequest as exc:
        return [tuple(p.loc) for p in exc.problems]
    raise AssertionError("the request was accepted, but a problem was expected")


# --- JSON: structured near-valid requests ---

hostile_numbers = st.sampled_from([
    math.nan, math.inf, -math.inf, 1e308, -1e308, 1e101, 10**20, 10**400, -(10**30), 2**53, -1,
    0, 5e-324, True, False,
])
wrong_types = st.one_of(st.none(), st.booleans(), st.text(max_size=5), st.lists(st.integers(), max_size=2),
                        st.dictionaries(st.text(max_size=3), st.integers(), max_size=2), hostile_numbers)


@QUICK
@given(index=st.integers(0, 17), field=st.sampled_from(("subject", "period", "treatment", "value")))
def test_dropped_required_record_field_is_named(index: int, field: str) -> None:
    """A record without a required field is refused at records[i].field (data contract: subject,
    period, treatment and value are required; RFC 9457 problem details)."""
    raw = valid_request()
    del raw["records"][index][field]
    assert ("records", index, field) in problem_locs(raw)


@QUICK
@given(part=st.sampled_from(("design", ("design", "test"), ("design", "reference"), "records")))
def test_dropped_required_part_is_named(part: str | tuple[str, str]) -> None:
    """A request without its design, a design arm or any record is refused there (data contract)."""
    raw = valid_request()
    if isinstance(part, tuple):
        del raw[part[0]][part[1]]
        assert part in problem_locs(raw)
    else:
        del raw[part]
        assert (part,) in problem_locs(raw)


@QUICK
@given(index=st.integers(0, 17), value=hostile_numbers)
def test_hostile_values(index: int, value: Any) -> None:
    """NaN, infinities, booleans and magnitudes beyond double range or the 1e100 cap are refused at
    records[i].value; other numbers are kept as finite floats (RFC 8259 numbers, IEEE 754 doubles)."""
    raw = valid_request()
    raw["records"][index]["value"] = value
    if isinstance(value, bool):
        refused = True
    elif isinstance(value, int):
        refused = abs(value) > 1e100  # int vs float compares exactly, no overflow
    else:
        refused = not math.isfinite(value) or abs(value) > 1e100
    if refused:
        assert ("records", index, "value") in problem_locs(raw)
    else:
        inputs = assert_outcome_is_clean(raw)
        assert inputs is not None
        kept = [r["value"] for r in inputs["records"]]
        assert float(value) in kept and all(type(v) is float for v in kept)


@QUICK
@given(index=st.integers(0, 17), field=st.sampled_from(COLUMNS), value=wrong_types)
def test_wrong_types_in_a_record(index: int, field: str, value: Any) -> None:
    """Any JSON value in any record field gives clean inputs or located problems (RFC 9457)."""
    raw = valid_request()
    raw["records"][index][field] = value
    assert_outcome_is_clean(raw)


@QUICK
@given(path=st.sampled_from([("settings", "replicates"), ("settings", "seed"),
                             ("settings", "confidence_level"), ("settings", "interval"),
                             ("settings", "limits"), ("settings", "stratify_by_sequence"),
                             ("study", "title"), ("design", "baseline"), ("settings",), ("study",)]),
       value=wrong_types)
def test_wrong_types_in_settings_study_design(path: tuple[str, ...], value: Any) -> None:
    """Any JSON value in a setting, study field or design arm gives clean inputs or problems located
    under that part (RFC 9457 problem details)."""
    raw = valid_request()
    target = raw
    for part in path[:-1]:
        target = target[part]
    target[path[-1]] = value
    try:
        normalize_request(raw)
    except InvalidRequest as exc:
        assert all(p.loc and p.msg for p in exc.problems)
        assert any(tuple(p.loc[: len(path)]) == path or p.loc[0] == "records" for p in exc.problems)
    else:
        assert_outcome_is_clean(raw)


@QUICK
@given(subject=st.integers(0, 5), label=label_text, arm=label_text)
def test_unicode_labels_kept_exactly(subject: int, label: str, arm: str) -> None:
    """Subject and treatment labels in any script survive normalization unchanged (data contract:
    labels are kept exactly as given, because the hash must reflect the real input)."""
    raw = valid_request()
    old = f"S{subject + 1:02d}"
    if arm in ("R", "B"):
        arm = arm + "\u00e9"
    raw["design"]["test"] = arm
    for record in raw["records"]:
        if record["subject"] == old:
            record["subject"] = label
        if record["treatment"] == "T":
            record["treatment"] = arm
    inputs = assert_outcome_is_clean(raw)
    if label in {f"S{i:02d}" for i in range(1, 7)} - {old}:
        assert inputs is None  # the new label merges two subjects: duplicate periods
        return
    assert inputs is not None
    assert label in {r["subject"] for r in inputs["records"]}
    assert inputs["design"]["test"] == arm
    assert {r["treatment"] for r in inputs["records"]} == {arm, "R", "B"}


@QUICK
@given(index=st.integers(0, 17), copies=st.integers(1, 3))
def test_duplicated_rows_are_refused(index: int, copies: int) -> None:
    """A measurement given twice for the same subject, metric and period is an error at the later
    copy (common practice: one value per subject, period and metric in a crossover table)."""
    raw = valid_request()
    for _ in range(copies):
        raw["records"].append(copy.deepcopy(raw["records"][index]))
    locs = problem_locs(raw)
    assert all(("records", 18 + k, "period") in locs for k in range(copies))


@QUICK
@given(order=st.permutations(list(range(18))))
def test_row_order_never_changes_the_inputs(order: list[int]) -> None:
    """Normalization sorts records, so any row order gives the same RFC 8785 canonical inputs
    (data contract: row order never changes the hash)."""
    raw = valid_request()
    shuffled = copy.deepcopy(raw)
    shuffled["records"] = [raw["records"][i] for i in order]
    assert rfc8785.dumps(normalize_request(shuffled)) == rfc8785.dumps(normalize_request(raw))


@QUICK
@given(data=st.data())
def test_json_text_mutations(data: st.DataObject) -> None:
    """Bytes of a valid request with random edits (delete, insert, replace a span) are either read
    as a request or refused with located problems; never another exception (RFC 9457)."""
    text = json.dumps(valid_request(subjects=3))
    for _ in range(data.draw(st.integers(1, 4))):
        start = data.draw(st.integers(0, len(text)))
        end = data.draw(st.integers(start, min(len(text), start + 6)))
        insert = data.draw(st.sampled_from(["", "NaN", "Infinity", "1e999", '"', "{", "]", ",",
                                            "\ufeff", "\\ud800", "null", "-0", "9" * 40]))
        text = text[:start] + insert + text[end:]
    body = data.draw(st.sampled_from([text.encode(), codecs.BOM_UTF8 + text.encode(),
                                      text.encode("utf-16")]))
    try:
        raw = parse_json_body(body)
    except InvalidRequest as exc:
        assert all(p.loc == ("body",) and p.msg for p in exc.problems)
        return
    assert_outcome_is_clean(raw)


# --- CSV in many dialects ---

def render_csv(rows: list[dict[str, Any]], delimiter: str, quoting: int, bom: bool, newline: str,
               decimal_comma: bool, header_case: str) -> bytes:
    out = io.StringIO()
    writer = csv.writer(out, delimiter=delimiter, quoting=quoting, lineterminator=newline)
    names = [getattr(name, header_case)() for name in COLUMNS]
    writer.writerow(names)
    for row in rows:
        cells = [str(row[c]) for c in COLUMNS]
        value = repr(row["value"])
        cells[-1] = value.replace(".", ",") if decimal_comma else value
        writer.writerow(cells)
    data = out.getvalue().encode("utf-8")
    return codecs.BOM_UTF8 + data if bom else data


dialects = st.fixed_dictionaries({
    "delimiter": st.sampled_from([",", ";", "\t"]),
    "quoting": st.sampled_from([csv.QUOTE_MINIMAL, csv.QUOTE_ALL, csv.QUOTE_NONNUMERIC]),
    "bom": st.booleans(),
    "newline": st.sampled_from(["\n", "\r\n"]),
    "header_case": st.sampled_from(["lower", "upper", "title"]),
})
QUERY = {"test": "T", "reference": "R", "baseline": "B", "seed": "99", "replicates": "100"}


@QUICK
@given(dialect=dialects, subject_label=label_text)
def test_csv_dialects_read_back_the_rows(dialect: dict[str, Any], subject_label: str) -> None:
    """A table written by Python's csv module (RFC 4180 quoting, any of the accepted delimiters,
    BOM or not, CRLF or LF, decimal comma with ';' and tab) reads back to exactly the rows written,
    and normalizes to the inputs of the equivalent JSON request (data contract: CSV and JSON give
    the same inputs_sha256)."""
    raw_json = valid_request()
    raw_json["records"] = [{**r, "subject": subject_label} if r["subject"] == "S01" else r
                           for r in raw_json["records"]]
    rows = raw_json["records"]
    decimal_comma = dialect["delimiter"] != ","
    body = render_csv(rows, decimal_comma=decimal_comma, **dialect)
    query = {**QUERY, "title": "fuzz"}
    raw = parse_csv_body(body, query)
    assert raw["records"] == [{**r, "period": int(r["period"])} for r in rows]
    if subject_label in {f"S{i:02d}" for i in range(2, 7)}:
        return  # two subjects merged: refused the same way as the JSON request, tested above
    assert rfc8785.dumps(normalize_request(raw)) == rfc8785.dumps(normalize_request(raw_json))


@QUICK
@given(dialect=dialects, data=st.data())
def test_csv_byte_mutations(dialect: dict[str, Any], data: st.DataObject) -> None:
    """A CSV file with random edits (stray quotes, delimiters, NUL, line breaks, bad UTF-8, decimal
    commas in a comma file, 'nan', huge numbers) is read or refused with located problems (RFC 9457);
    an accepted file normalizes to plain JSON (RFC 8259)."""
    body = render_csv(valid_request(subjects=3)["records"], decimal_comma=False, **dialect)
    for _ in range(data.draw(st.integers(1, 4))):
        start = data.draw(st.integers(0, len(body)))
        end = data.draw(st.integers(start, min(len(body), start + 5)))
        insert = data.draw(st.sampled_from([b"", b'"', b",", b";", b"\t", b"\x00", b"\n", b"\r",
                                            b"\xff", b"\xc3", b"nan", b"1e999", b"1,5", b"\xef\xbb\xbf",
                                            "\u202e".encode(), b"9" * 40]))
        body = body[:start] + insert + body[end:]
    try:
        raw = parse_csv_body(body, QUERY)
    except InvalidRequest as exc:
        assert exc.problems and all(p.loc and p.msg.strip() for p in exc.problems)
        return
    json.dumps(raw, allow_nan=False)
    assert_outcome_is_clean(raw)


# --- accepted requests run through the whole pipeline ---

@st.composite
def accepted_requests(draw: st.DrawFn) -> dict[str, Any]:
    """Small valid crossovers, including degenerate ones (ties, zero differences, equal arms)."""
    arms = draw(st.sampled_from([("T", "R", "B"), ("T", "R")]))
    subjects = draw(st.integers(3, 7))
    kind = draw(st.sampled_from(["random", "constant", "equal_reference_baseline", "tiny", "large",
                                 "huge"]))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    records = []
    for i in range(subjects):
        order = arms[i % len(arms):] + arms[: i % len(arms)]
        for period, treatment in enumerate(order, start=1):
            if kind == "constant":
                value = 10.0
            elif kind == "equal_reference_baseline":
                value = 20.0 if treatment == "T" else 10.0
            elif kind == "tiny":
                value = float(rng.uniform(1e-12, 2e-12))
            elif kind == "large":  # integral doubles that RFC 8785 prints as plain digits
                value = float(round(rng.uniform(1e16, 1e20)))
            elif kind == "huge":
                value = float(rng.uniform(1e90, 2e90))
            else:
                value = float(np.round(rng.normal(50.0, 15.0), 3))
            records.append({"subject": f"P{i}", "period": period, "treatment": treatment,
                            "value": value})
    design = {"test": "T", "reference": "R"} | ({"baseline": "B"} if len(arms) == 3 else {})
    request_settings = {
        "replicates": draw(st.sampled_from([100, 150])),
        "seed": draw(st.integers(0, 2**53 - 1)),
        "interval": draw(st.sampled_from(["percentile", "basic", "normal", "bca"])),
        "confidence_level": draw(st.sampled_from([0.8, 0.9, 0.95])),
        "stratify_by_sequence": draw(st.booleans()),
    }
    return {"design": design, "records": records, "settings": request_settings}


@settings(max_examples=30, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(raw=accepted_requests())
def test_accepted_requests_build_a_nan_free_record(raw: dict[str, Any]) -> None:
    """Any accepted request yields a record whose JSON holds no NaN or Infinity (RFC 8259; data
    contract: a figure that cannot be computed is null with a warning code), whose warnings each
    carry a code, and whose canonical JSON read back canonicalizes to the same bytes (RFC 8785:
    the archive re-hashes what it stored)."""
    inputs = normalize_request(raw)
    record = build_record(inputs)
    text = json.dumps(record, allow_nan=False)
    assert json.loads(text)["inputs_sha256"] == record["inputs_sha256"]
    canonical = canonical_json(record)
    assert canonical_json(load_canonical(canonical)) == canonical
    for warning in record["result"]["warnings"]:
        assert isinstance(warning.get("code"), str) and warning["code"]
