"""`bioparity serve`: the access check, then uvicorn with the app factory."""

from __future__ import annotations

import os
import sys
from dataclasses import replace

from service.api.settings import ServiceSettings
from service.archive.roles import is_loopback
from service.archive.store import ArchiveError
from service.cli.admin import access_at_start

EXIT_INVALID = 2


def run_serve(host: str, port: int, db: str | None, workers: int) -> int:
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
        uvicorn.run("service.api.app:create_app", factory=True, host=host, port=port, workers=workers)
    else:
        from service.api.app import create_app

        uvicorn.run(create_app(settings), host=host, port=port)
    return 0
