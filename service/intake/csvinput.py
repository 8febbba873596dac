"""CSV uploads: records in the body, everything else as flat query parameters.

The result is the raw request dict that the equivalent JSON body would give, so both forms go
through the same normalization and end with the same inputs hash.
"""

from __future__ import annotations

import csv
import io
import re
from collections.abc import Mapping, Sequence
from typing import Any

from service.intake.problems import InvalidRequest, Problem, decode_utf8

COLUMNS = ("subject", "period", "sequence", "treatment", "metric", "value")
REQUIRED = ("subject", "period", "treatment", "value")

# Plain decimal notation only: float() would also take "nan", "inf" and "1_000".
_NUMBER = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?")
_INTEGER = re.compile(r"[+-]?\d+")

_TEXT_QUERY = {"title": "study", "analyte": "study", "unit": "study",
               "test": "design", "reference": "design", "baseline": "design",
               "interval": "settings", "incomplete_subjects": "settings"}
# scaling=widened_limits&scaling_metrics=cmax,auc_0_t → settings.scaling {approach, metrics}
_SCALING_QUERY = ("scaling", "scaling_metrics")
_INT_QUERY = ("replicates", "seed")
_FLOAT_QUERY = {"confidence_level": ("confidence_level",), "limit_lower": ("limits", "lower"),
                "limit_upper": ("limits", "upper")}
_BOOL_QUERY = ("stratify_by_sequence",)
QUERY_PARAMETERS = (*_TEXT_QUERY, *_INT_QUERY, *_FLOAT_QUERY, *_BOOL_QUERY, *_SCALING_QUERY)

# The flat settings that travel beside a CSV table (HTTP query, upload form, command-line options):
# name → (JSON-schema type, what it means).
SETTING_FIELDS: dict[str, tuple[str, str]] = {
    "title": ("string", "study title"),
    "analyte": ("string", "what was measured"),
    "unit": ("string", "unit of the values"),
    "test": ("string", "treatment label of the test arm"),
    "reference": ("string", "treatment label of the reference arm"),
    "baseline": ("string", "treatment label of the baseline/placebo arm, if any"),
    "replicates": ("integer", "bootstrap replicates"),
    "seed": ("integer", "seed of the resampling"),
    "confidence_level": ("number", "confidence level of the intervals, e.g. 0.9"),
    "interval": ("string", "percentile, basic, normal or bca"),
    "limit_lower": ("number", "lower acceptance limit of the ratio parameter"),
    "limit_upper": ("number", "upper acceptance limit of the ratio parameter"),
    "stratify_by_sequence": ("boolean", "resample within sequence groups"),
    "incomplete_subjects": ("string", "exclude or reject"),
    "scaling": ("string", "none, widened_limits or reference_scaled (fixed by the protocol)"),
    "scaling_metrics": ("string", "comma-separated metrics the scaling applies to"),
}


def _number(text: str, decimal_comma: bool) -> float | None:
    cell = text.strip()
    if decimal_comma and cell.count(",") == 1 and "." not in cell:
        cell = cell.replace(",", ".")
    if not _NUMBER.fullmatch(cell):
        return None
    value = float(cell)
    # "1e999" matches the pattern but overflows to infinity
    return value if abs(value) != float("inf") else None


def _integer(text: str) -> int | None:
    cell = text.strip()
    if not _INTEGER.fullmatch(cell) or len(cell) > 30:
        return None
    return int(cell)


def _parse_query(query: Mapping[str, str], raw: dict[str, Any], problems: list[Problem]) -> None:
    for name in query:
        text = query[name]
        if name in _TEXT_QUERY:
            raw.setdefault(_TEXT_QUERY[name], {})[name] = text
        elif name in _INT_QUERY:
            whole = _integer(text)
            if whole is None:
                problems.append(Problem(("query", name), f"must be a whole number, got {text!r}"))
            else:
                raw.setdefault("settings", {})[name] = whole
        elif name in _FLOAT_QUERY:
            number = _number(text, decimal_comma=False)
            if number is None:
                problems.append(Problem(("query", name), f"must be a finite number, got {text!r}"))
            else:
                path = _FLOAT_QUERY[name]
                target = raw.setdefault("settings", {})
                for part in path[:-1]:
                    target = target.setdefault(part, {})
                target[path[-1]] = number
        elif name == "scaling":
            raw.setdefault("settings", {}).setdefault("scaling", {})["approach"] = text
        elif name == "scaling_metrics":
            metrics = [part.strip() for part in text.split(",") if part.strip()]
            raw.setdefault("settings", {}).setdefault("scaling", {})["metrics"] = metrics
        elif name in _BOOL_QUERY:
            flag = {"true": True, "1": True, "false": False, "0": False}.get(text.strip().lower())
            if flag is None:
                problems.append(Problem(("query", name),
                                        f"must be true, false, 1 or 0, got {text!r}"))
            else:
                raw.setdefault("settings", {})[name] = flag
        else:
            problems.append(Problem(("query", name), "unknown query parameter; known: "
                                                     + ", ".join(QUERY_PARAMETERS)))


def _sniff_delimiter(header_line: str) -> str:
    counts = {d: header_line.count(d) for d in (",", ";", "\t")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] > 0 else ","


def _read_header(cells: list[str], problems: list[Problem]) -> list[str] | None:
    names = [cell.strip().lower() for cell in cells]
    bad = len(problems)
    unknown = [cells[i] for i, name in enumerate(names) if name not in COLUMNS]
    if unknown:
        problems.append(Problem(("header",), "unknown column(s) " + ", ".join(map(repr, unknown))
                                + "; known columns: " + ", ".join(COLUMNS)))
    repeated = sorted({name for name in names if names.count(name) > 1 and name in COLUMNS})
    if repeated:
        problems.append(Problem(("header",), "column(s) given more than once: "
                                + ", ".join(repeated)))
    missing = [name for name in REQUIRED if name not in names]
    if missing:
        problems.append(Problem(("header",), "missing required column(s): " + ", ".join(missing)))
    return names if len(problems) == bad else None


def _read_row(
    line: int, names: list[str], cells: list[str], decimal_comma: bool, problems: list[Problem]
) -> dict[str, Any]:
    record: dict[str, Any] = {}
    for name, cell in zip(names, cells, strict=True):
        if cell.strip() == "":
            if name in REQUIRED:
                problems.append(Problem(("line", line, name), "is empty; a value is required"))
            continue  # an empty optional cell means the field is absent
        if name == "value":
            number = _number(cell, decimal_comma)
            if number is None:
                problems.append(Problem(("line", line, name),
                                        f"must be a finite number, got {cell!r}"))
            else:
                record[name] = number
        elif name == "period":
            whole = _integer(cell)
            if whole is None:
                problems.append(Problem(("line", line, name),
                                        f"must be a whole number, got {cell!r}"))
            else:
                record[name] = whole
        else:
            # labels are kept exactly as given: the hash must reflect the real input
            record[name] = cell
    return record


def parse_csv_body(body: bytes, query: Mapping[str, str]) -> dict[str, Any]:
    return parse_csv_with_lines(body, query)[0]


def relocate_to_lines(problems: Sequence[Problem], lines: Sequence[int]) -> list[Problem]:
    """Name CSV lines instead of record positions in problems found after parsing."""
    moved = []
    for problem in problems:
        loc = problem.loc
        if len(loc) >= 2 and loc[0] == "records" and isinstance(loc[1], int) and loc[1] < len(lines):
            loc = ("line", lines[loc[1]], *loc[2:])
        moved.append(Problem(loc, problem.msg))
    return moved


def parse_csv_with_lines(body: bytes, query: Mapping[str, str]) -> tuple[dict[str, Any], list[int]]:
    """The raw request and, per record, the physical line (1-based, header = 1) it came from."""
    problems: list[Problem] = []
    raw: dict[str, Any] = {"design": {}}
    _parse_query(query, raw, problems)
    text = decode_utf8(body, ("body",))
    header_line = text.splitlines()[0] if text.strip() else ""
    if not header_line.strip():
        problems.append(Problem(("header",), "the CSV body has no header line; expected columns "
                                + ", ".join(COLUMNS)))
        raise InvalidRequest(problems)
    delimiter = _sniff_delimiter(header_line)
    decimal_comma = delimiter in (";", "\t")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    records: list[dict[str, Any]] = []
    lines: list[int] = []
    names: list[str] | None = None
    last_line = 0
    try:
        for cells in reader:
            line = last_line + 1  # a quoted cell may span lines: report where the row starts
            last_line = reader.line_num
            if names is None:
                names = _read_header(cells, problems)
                if names is None:
                    raise InvalidRequest(problems)
                continue
            if not cells or all(cell.strip() == "" for cell in cells):
                continue  # blank lines carry nothing
            if len(cells) != len(names):
                problems.append(Problem(("line", line), f"has {len(cells)} cells but the header "
                                                        f"has {len(names)} columns"))
                continue
            records.append(_read_row(line, names, cells, decimal_comma, problems))
            lines.append(line)
    except csv.Error as exc:
        problems.append(Problem(("line", reader.line_num), f"cannot be read as CSV: {exc}"))
    if not records and not problems:
        problems.append(Problem(("records",), "at least one record is required; the CSV body "
                                              "has a header but no data lines"))
    if problems:
        raise InvalidRequest(problems)
    raw["records"] = records
    return raw, lines
