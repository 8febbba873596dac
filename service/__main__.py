"""Command line: `python -m service analyze|serve|...`."""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from pathlib import Path
from typing import Any

EXIT_INVALID = 2


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m service", description=__doc__)
    commands = parser.add_subparsers(dest="command", required=True)

    analyze = commands.add_parser("analyze", help="analyse a request file and write record.json")
    analyze.add_argument("request", help="path to the request JSON (or - for standard input)")
    analyze.add_argument("--out", required=True, help="directory for record.json and report.html")

    serve = commands.add_parser("serve", help="start the REST service")
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=int, default=8000)
    serve.add_argument(
        "--db", default=None, help="SQLAlchemy URL or SQLite file path (default ./var/bioparity.sqlite3)"
    )
    serve.add_argument("--workers", type=int, default=1)

    from service.admin_cli import add_commands, run_archive, run_keys

    add_commands(commands)

    args = parser.parse_args(argv)
    if args.command == "analyze":
        return run_analyze(args.request, Path(args.out))
    if args.command == "serve":
        return run_serve(args.host, args.port, args.db, args.workers)
    if args.command == "keys":
        return run_keys(args)
    if args.command == "archive":
        return run_archive(args)
    parser.error(f"unknown command {args.command}")
    return EXIT_INVALID


def run_analyze(request: str, out: Path) -> int:
    from service.records import build_record
    from service.reports import render_report
    from service.tables import InvalidRequest, format_loc, normalize_request, parse_json_body

    try:
        body = sys.stdin.buffer.read() if request == "-" else Path(request).read_bytes()
    except OSError as exc:
        print(f"error: cannot read {request}: {exc.strerror}", file=sys.stderr)
        return EXIT_INVALID
    try:
        inputs = normalize_request(parse_json_body(body))
        record = build_record(inputs)
    except InvalidRequest as exc:
        print(f"error: the request is invalid ({len(exc.problems)} problem(s)):", file=sys.stderr)
        for problem in exc.problems:
            print(f"  {format_loc(problem.loc)}: {problem.msg}", file=sys.stderr)
        return EXIT_INVALID
    report = render_report(record)
    out.mkdir(parents=True, exist_ok=True)
    _write_atomically(out / "record.json", _pretty_json(record))
    _write_atomically(out / "report.html", report)
    print(f"wrote {out / 'record.json'} and {out / 'report.html'}")
    return 0


def run_serve(host: str, port: int, db: str | None, workers: int) -> int:
    from dataclasses import replace

    from service.access import is_loopback
    from service.admin_cli import access_at_start
    from service.archive import ArchiveError
    from service.config import ServiceSettings

    settings = ServiceSettings.from_cli(db)
    from sqlalchemy.engine import make_url

    shown = make_url(settings.database_url).render_as_string(hide_password=True)
    print(f"bioparity: archive {shown}", flush=True)
    # Decided before uvicorn is even imported, so a refusal never binds the port.
    try:
        may_start, message = access_at_start(host, settings.database_url)
    except ArchiveError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INVALID
    print(message, file=sys.stdout if may_start else sys.stderr, flush=True)
    if not may_start:
        return EXIT_INVALID
    if not is_loopback(host):
        # Revoking the last key later must not open a reachable service.
        settings = replace(settings, require_keys=True)
        os.environ["BIOPARITY_REQUIRE_KEYS"] = "true"

    import uvicorn

    print(f"bioparity: listening on http://{host}:{port}  (try http://{host}:{port}/docs)", flush=True)
    if workers > 1:
        os.environ["BIOPARITY_DATABASE_URL"] = settings.database_url
        uvicorn.run("service.app:create_app", factory=True, host=host, port=port, workers=workers)
    else:
        from service.app import create_app

        uvicorn.run(create_app(settings), host=host, port=port)
    return 0


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


if __name__ == "__main__":
    sys.exit(main())
