"""Command line: `bioparity analyze|serve|keys|archive` (also `python -m service ...`).

Building the parser imports nothing heavy: each command imports what it needs when it runs, so
`analyze` never loads the web stack or the database layer.
"""

from __future__ import annotations

import argparse

from service import __version__
from service.archive.roles import ROLES
from service.cli.plan import add_plan_command
from service.intake.csvinput import SETTING_FIELDS

EXIT_INVALID = 2

_ANALYZE_EPILOG = (
    "TABLE may be a JSON request or a CSV table (comma; semicolon with decimal comma; or tab "
    "delimited). With a CSV table, the study, design and settings come from the options below, "
    "named like the query parameters of a CSV upload over HTTP; the same study as JSON and as "
    "CSV gives the same inputs_sha256. The acceptance limits, confidence level and interval "
    "method are the protocol's choice: fix them in advance."
)


def build_parser(prog: str = "bioparity") -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog=prog,
        description="bioparity: checks crossover tables, estimates the ratio of mean "
        "differences and average bioequivalence, and archives audited records.",
    )
    parser.add_argument("--version", action="version", version=f"bioparity {__version__}")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    analyze = commands.add_parser(
        "analyze", help="analyse a request (JSON or CSV) and write record.json and report.html",
        epilog=_ANALYZE_EPILOG,
    )
    analyze.add_argument("request", metavar="TABLE",
                         help="path to the request JSON or the CSV table (or - for standard input)")
    analyze.add_argument("--out", required=True, help="directory for record.json and report.html")
    analyze.add_argument("--format", choices=("auto", "json", "csv"), default="auto",
                         help="how to read TABLE (default: by its name ending, else by content)")
    table = analyze.add_argument_group("settings of a CSV table")
    for name, (kind, text) in SETTING_FIELDS.items():
        option = "--" + name.replace("_", "-")
        if kind == "boolean":
            table.add_argument(option, dest=f"setting_{name}", nargs="?", const="true",
                               metavar="true|false", help=text)
        else:
            table.add_argument(option, dest=f"setting_{name}", metavar=kind.upper(), help=text)

    serve = commands.add_parser("serve", help="start the REST service and the browser pages")
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=int, default=8000)
    serve.add_argument(
        "--db", default=None, help="SQLAlchemy URL or SQLite file path (default ./var/bioparity.sqlite3)"
    )
    serve.add_argument("--workers", type=int, default=1)

    add_plan_command(commands)

    keys = commands.add_parser("keys", help="create, list and revoke API keys")
    actions = keys.add_subparsers(dest="keys_command", required=True)
    create = actions.add_parser("create", help="make a key; it is printed once, on the last line")
    create.add_argument("--db", required=True, help="SQLAlchemy URL or SQLite file path")
    create.add_argument("--role", required=True, choices=ROLES)
    create.add_argument("--label", required=True, help="unique name, archived as the submitter")
    create.add_argument("--name", dest="printed_name", metavar="PRINTED_NAME",
                        help="printed name of the person who holds the key, shown in every "
                        "signature they give (required for review and admin)")
    listing = actions.add_parser("list", help="labels, roles and dates (never the keys)")
    listing.add_argument("--db", required=True)
    revoke = actions.add_parser("revoke", help="revoke the key with this label, at once")
    revoke.add_argument("label")
    revoke.add_argument("--db", required=True)

    archive = commands.add_parser("archive", help="check the archive")
    archive_actions = archive.add_subparsers(dest="archive_command", required=True)
    verify = archive_actions.add_parser(
        "verify", help="walk the hash chain; exit 0 when intact, 1 when broken"
    )
    verify.add_argument("--db", required=True)
    return parser


def main(argv: list[str] | None = None, prog: str = "bioparity") -> int:
    args = build_parser(prog).parse_args(argv)
    if args.command == "analyze":
        from service.cli.analyze import run_analyze

        settings = {
            name: value for name in SETTING_FIELDS
            if (value := getattr(args, f"setting_{name}")) is not None
        }
        return run_analyze(args.request, args.out, settings, args.format)
    if args.command == "serve":
        from service.cli.serve import run_serve

        return run_serve(args.host, args.port, args.db, args.workers)
    if args.command == "plan":
        from service.cli.plan import run_plan

        return run_plan(args)
    from service.cli.admin import run_archive, run_keys

    if args.command == "keys":
        return run_keys(args)
    return run_archive(args)
