"""`bioparity analyze`: a JSON request or a CSV table in, record.json and report.html out."""

from __future__ import annotations

import json
import os
import sys
import tempfile
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from service.intake.problems import InvalidRequest, format_loc
from service.intake.reading import BodyKind, read_for_record
from service.records.building import build_record_and_texts
from service.report.rendering import render_report

EXIT_INVALID = 2


def run_analyze(request: str, out: str | Path, settings: Mapping[str, str], form: str = "auto") -> int:
    try:
        body = sys.stdin.buffer.read() if request == "-" else Path(request).read_bytes()
    except OSError as exc:
        print(f"error: cannot read {request}: {exc.strerror}", file=sys.stderr)
        return EXIT_INVALID
    kind = _kind_of(request, body, form)
    if kind == "json" and settings:
        given = ", ".join("--" + name.replace("_", "-") for name in sorted(settings))
        print(f"error: {given} apply to CSV tables only; a JSON request carries its settings "
              "inside", file=sys.stderr)
        return EXIT_INVALID
    try:
        normalized = read_for_record(kind, body, settings)
        # As POST /v1/analyses builds it: the plain lane's records are written to canonical
        # JSON (for the inputs hash) from orjson's text, not value by value; the same bytes.
        record, _ = build_record_and_texts(normalized.inputs, tables=normalized.tables,
                                           plain_records=normalized.plain_records)
    except InvalidRequest as exc:
        what = "table" if kind == "csv" else "request"
        print(f"error: the {what} is invalid ({len(exc.problems)} problem(s)):", file=sys.stderr)
        for problem in exc.problems:
            print(f"  {_where(problem.loc)}: {problem.msg}", file=sys.stderr)
        return EXIT_INVALID
    report = render_report(record)
    folder = Path(out)
    folder.mkdir(parents=True, exist_ok=True)
    _write_atomically(folder / "record.json", _pretty_json(record))
    _write_atomically(folder / "report.html", report)
    print(f"wrote {folder / 'record.json'} and {folder / 'report.html'}")
    return 0


def _where(loc: tuple[str | int, ...]) -> str:
    # Settings of a CSV table arrive as options here, not as query parameters.
    if len(loc) == 2 and loc[0] == "query" and isinstance(loc[1], str):
        return "--" + loc[1].replace("_", "-")
    return format_loc(loc)


def _kind_of(request: str, body: bytes, form: str) -> BodyKind:
    if form in ("json", "csv"):
        return "json" if form == "json" else "csv"
    suffix = Path(request).suffix.lower()
    if suffix == ".json":
        return "json"
    if suffix in (".csv", ".tsv", ".txt"):
        return "csv"
    return "json" if body.lstrip(b"\xef\xbb\xbf \t\r\n")[:1] in (b"{", b"[") else "csv"


def _pretty_json(obj: Any) -> bytes:
    text = json.dumps(obj, indent=2, sort_keys=True, ensure_ascii=False, allow_nan=False)
    return (text + "\n").encode("utf-8")


def _write_atomically(path: Path, data: bytes) -> None:
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
