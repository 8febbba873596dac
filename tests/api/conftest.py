"""Shared pieces of the HTTP tests: a seeded 12-subject three-period table and app factories.

Requests go through httpx's ASGITransport (real HTTP request/response objects, no socket),
driven from synchronous tests by an anyio blocking portal.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from concurrent.futures import Future
from contextlib import AbstractContextManager
from functools import partial
from typing import Any

import anyio.from_thread
import httpx
import numpy as np
import pytest
from fastapi import FastAPI

from service.api.app import create_app
from service.api.settings import ServiceSettings

SEQUENCES = {"TRB": ("T", "R", "B"), "RBT": ("R", "B", "T"), "BTR": ("B", "T", "R")}
MEANS = {"B": 50.0, "R": 80.0, "T": 81.5}
SEED = 424242
REPLICATES = 200


def table_rows(subjects: int = 12, seed: int = 7) -> list[dict[str, Any]]:
    """A constructed crossover: subjects cycle through three sequences; seeded normal values."""
    rng = np.random.default_rng(seed)
    rows: list[dict[str, Any]] = []
    labels = list(SEQUENCES)
    for i in range(subjects):
        subject = f"S{i + 1:02d}"
        sequence = labels[i % len(labels)]
        level = float(rng.normal(0.0, 6.0))
        for period, treatment in enumerate(SEQUENCES[sequence], start=1):
            value = round(MEANS[treatment] + level + float(rng.normal(0.0, 2.0)), 3)
            rows.append(
                {
                    "subject": subject,
                    "period": period,
                    "sequence": sequence,
                    "treatment": treatment,
                    "metric": "AUC",
                    "value": value,
                }
            )
    return rows


def json_request(rows: list[dict[str, Any]] | None = None) -> dict[str, Any]:
    return {
        "design": {"test": "T", "reference": "R", "baseline": "B"},
        "records": table_rows() if rows is None else rows,
        "settings": {"replicates": REPLICATES, "seed": SEED},
    }


CSV_QUERY = {"test": "T", "reference": "R", "baseline": "B", "replicates": REPLICATES, "seed": SEED}


def csv_body(rows: list[dict[str, Any]], delimiter: str = ",", decimal: str = ".") -> bytes:
    columns = ("subject", "period", "sequence", "treatment", "metric", "value")
    lines = [delimiter.join(columns)]
    for row in rows:
        cells = [str(row[c]) for c in columns]
        cells[-1] = repr(row["value"]).replace(".", decimal)
        lines.append(delimiter.join(cells))
    return ("\n".join(lines) + "\n").encode("utf-8")


class ApiClient:
    """A synchronous face over httpx.AsyncClient + ASGITransport for one app."""

    def __init__(self, app: FastAPI, raise_app_exceptions: bool = True) -> None:
        self.app = app
        self._portal_context: AbstractContextManager[anyio.from_thread.BlockingPortal] = (
            anyio.from_thread.start_blocking_portal()
        )
        self._portal = self._portal_context.__enter__()
        transport = httpx.ASGITransport(app=app, raise_app_exceptions=raise_app_exceptions)
        self._client = httpx.AsyncClient(transport=transport, base_url="http://testserver")
        self._closed = False

    def request(self, method: str, url: str, **kwargs: Any) -> httpx.Response:
        return self._portal.call(partial(self._client.request, method, url, **kwargs))

    def submit(self, method: str, url: str, **kwargs: Any) -> Future[httpx.Response]:
        """Start a request without waiting for it (to overlap it with others)."""
        return self._portal.start_task_soon(partial(self._client.request, method, url, **kwargs))

    def get(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("GET", url, **kwargs)

    def post(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("POST", url, **kwargs)

    def delete(self, url: str, **kwargs: Any) -> httpx.Response:
        return self.request("DELETE", url, **kwargs)

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        self._portal.call(self._client.aclose)
        self._portal_context.__exit__(None, None, None)
        self.app.state.archive.close()


@pytest.fixture
def make_client(database_url: str) -> Iterator[Callable[..., ApiClient]]:
    """Build a client over a fresh app on the test's archive (settings overridable).

    `database_url` comes from tests/conftest.py: SQLite, and PostgreSQL when configured.
    """
    opened: list[ApiClient] = []

    def make(raise_app_exceptions: bool = True, **overrides: Any) -> ApiClient:
        settings = ServiceSettings(database_url=database_url, **overrides)
        client = ApiClient(create_app(settings), raise_app_exceptions=raise_app_exceptions)
        opened.append(client)
        return client

    yield make
    for client in opened:
        client.close()


@pytest.fixture
def client(make_client: Callable[..., ApiClient]) -> ApiClient:
    return make_client()
