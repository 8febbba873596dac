"""One way in for every caller: a request body (JSON, or CSV plus flat settings) to normalized inputs.

The HTTP API, the upload page and the command line all read through `read_request`, so the same
study gives the same inputs, and so the same inputs hash, whichever door it came through.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, Literal

from service.intake.csvinput import parse_csv_with_lines, relocate_to_lines
from service.intake.problems import InvalidRequest, Problem, parse_json_body
from service.intake.tables import MetricTable, Normalized, normalize_for_record

BodyKind = Literal["json", "csv"]


def read_request(
    kind: BodyKind, body: bytes, settings: Mapping[str, str], *, max_records: int | None = None
) -> dict[str, Any]:
    """Normalized inputs of a JSON body, or of a CSV body with its settings as flat text values
    (read_request_and_tables without the tables)."""
    return read_request_and_tables(kind, body, settings, max_records=max_records)[0]


def read_request_and_tables(
    kind: BodyKind, body: bytes, settings: Mapping[str, str], *, max_records: int | None = None
) -> tuple[dict[str, Any], list[MetricTable] | None]:
    """read_for_record without the plain-records flag."""
    inputs, tables, _ = read_for_record(kind, body, settings, max_records=max_records)
    return inputs, tables


def read_for_record(
    kind: BodyKind, body: bytes, settings: Mapping[str, str], *, max_records: int | None = None
) -> Normalized:
    """Normalized inputs of a JSON body, or of a CSV body with its settings as flat text values.

    Every problem is raised at once as InvalidRequest; problems found after CSV parsing name the
    CSV line (and column) they come from. `settings` must be empty for JSON bodies, which carry
    their settings inside. The tables are the ones the checks built (see
    normalize_request_and_tables), for build_record_and_texts(inputs, tables=...), and whether
    the plain lane read the records (for its plain_records=...).
    """
    lines: list[int] | None = None
    if kind == "csv":
        raw, lines = parse_csv_with_lines(body, settings)
    else:
        if settings:
            raise InvalidRequest(
                [
                    Problem(("query", name), "query parameters are read only with text/csv "
                            "uploads; put settings in the JSON body")
                    for name in sorted(settings)
                ]
            )
        raw = parse_json_body(body)
    if max_records is not None:
        check_row_count(raw, max_records)
    try:
        return normalize_for_record(raw)
    except InvalidRequest as exc:
        if lines is None:
            raise
        raise InvalidRequest(relocate_to_lines(exc.problems, lines)) from None


def check_row_count(raw: Any, max_records: int) -> None:
    if not isinstance(raw, dict):
        return  # normalize_request reports the wrong type
    problems = [
        Problem((field,), f"has {len(rows)} rows; this service accepts at most {max_records}")
        for field in ("records", "profiles")
        if isinstance(rows := raw.get(field), list) and len(rows) > max_records
    ]
    if problems:
        raise InvalidRequest(problems)
