"""A `start_server` fixture whose servers are always killed at teardown."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from tests.system.servers import Server, start_server


@pytest.fixture
def serve(tmp_path: Path) -> Iterator[Callable[..., Server]]:
    started: list[Server] = []

    def start(database_url: str, *, workers: int = 1) -> Server:
        server = start_server(database_url, tmp_path / f"server-{len(started)}.log", workers=workers)
        started.append(server)
        return server

    try:
        yield start
    finally:
        for server in started:
            server.kill()
