"""Schema-driven fuzzing of the HTTP API against the service's own OpenAPI document.

schemathesis (4.x) reads /openapi.json from the in-process ASGI app and generates requests for every
operation, both fitting the schema (positive) and breaking it (negative); each response is checked
by schemathesis' built-in OpenAPI checks: no 5xx, a declared status code, a declared content type,
declared headers, and a body valid against the declared response schema (OpenAPI 3.1).

The schemathesis pytest plugin is not used for collection: its fixture-based loader does not run
under the installed pytest, and an eagerly loaded schema would need an app (and a database) at
import time. Cases are drawn instead from each operation's Hypothesis strategy
(`APIOperation.as_strategy`), the documented way to use schemathesis inside ordinary tests.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import anyio
import httpx
import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    negative_data_rejection,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from service.api.app import create_app
from service.api.settings import ServiceSettings
from service.archive.keys import create_key
from tests.api.conftest import csv_body, json_request, table_rows

OPERATIONS = (
    ("POST", "/v1/analyses"),
    ("GET", "/v1/analyses"),
    ("GET", "/v1/analyses/{analysis_id}"),
    ("GET", "/v1/analyses/{analysis_id}/report"),
    ("GET", "/v1/analyses/{analysis_id}/bundle"),
    ("POST", "/v1/analyses/{analysis_id}/reproduction"),
    ("GET", "/v1/archive/verification"),
    ("GET", "/healthz"),
    ("POST", "/v1/planning"),
    ("POST", "/v1/analyses/{analysis_id}/planning"),
    ("POST", "/v1/analyses/{analysis_id}/signatures"),
    ("GET", "/v1/analyses/{analysis_id}/signatures"),
    ("GET", "/v1/analyses/{analysis_id}/signatures/{signature_id}"),
    ("POST", "/v1/analyses/{analysis_id}/share"),
)
# Inputs the schema constrains, so that a request can break it: GET /healthz takes none, and the
# analysis id in a path is any string (an unknown one is a 404, fuzzed in the positive run).
WITH_INPUT = (("POST", "/v1/analyses"), ("GET", "/v1/analyses"), ("POST", "/v1/planning"),
              ("POST", "/v1/analyses/{analysis_id}/signatures"),
              ("POST", "/v1/analyses/{analysis_id}/share"))
# The request model allows up to 1 000 000 replicates; the fuzzer would pick such values, and one
# analysis then takes seconds. The cap changes run time only, not which code paths are reached.
MAX_FUZZ_REPLICATES = 300
# Likewise the planning model allows a million simulated studies; fewer reach the same code.
MAX_FUZZ_SIMULATIONS = 2000
RESPONSE_CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
]
FUZZ_SETTINGS = settings(
    max_examples=30,
    deadline=None,
    derandomize=True,  # the same examples in every CI run
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much,
                           HealthCheck.data_too_large, HealthCheck.function_scoped_fixture],
)


class FuzzTarget:
    def __init__(self, schema: Any, analysis_id: str, key: str) -> None:
        self.schema = schema
        self.analysis_id = analysis_id
        self.key = key


@pytest.fixture(scope="module")
def target(tmp_path_factory: pytest.TempPathFactory) -> Iterator[FuzzTarget]:
    folder: Path = tmp_path_factory.mktemp("fuzz")
    app = create_app(ServiceSettings(database_url=f"sqlite:///{folder / 'archive.sqlite3'}"))
    # The schema declares Bearer keys on every /v1 operation: run the service the way it is
    # documented, with a key in the archive, and let schemathesis send it (an admin key may call
    # every operation, so a 403 would be a fault too).
    key = create_key(app.state.archive, label="fuzzer", role="admin")
    config = schemathesis.Config.from_dict(
        {"auth": {"openapi": {"bearer": {"bearer": key}}, "auto-signup": False}}
    )
    schema = schemathesis.openapi.from_asgi("/openapi.json", app, config=config)
    # One archived analysis, so that the GET operations also answer 200 with real bodies.
    transport = httpx.ASGITransport(app=app)

    async def seed_one() -> str:
        async with httpx.AsyncClient(transport=transport, base_url="http://testserver") as client:
            response = await client.post("/v1/analyses", json=json_request(),
                                         headers={"Authorization": f"Bearer {key}"})
            assert response.status_code == 201, response.text
            return str(response.json()["id"])

    analysis_id = anyio.run(seed_one)
    yield FuzzTarget(schema, analysis_id, key)
    app.state.archive.close()


def _cap_replicates(case: Any) -> None:
    body = case.body
    if isinstance(body, dict) and "design" in body and "records" not in body:  # a planning body
        simulations = body.get("simulations", MAX_FUZZ_SIMULATIONS)
        if type(simulations) is int:
            body["simulations"] = min(simulations, MAX_FUZZ_SIMULATIONS)
    if isinstance(body, dict) and isinstance(body.get("settings"), dict):
        replicates = body["settings"].get("replicates")
        if isinstance(replicates, int) and not isinstance(replicates, bool):
            body["settings"]["replicates"] = min(replicates, MAX_FUZZ_REPLICATES)
    query = case.query
    if isinstance(query, dict):
        replicates = query.get("replicates")
        if isinstance(replicates, int) and not isinstance(replicates, bool):
            query["replicates"] = min(replicates, MAX_FUZZ_REPLICATES)


def _strategy(target: FuzzTarget, method: str, path: str, mode: GenerationMode) -> Any:
    operation = target.schema[path][method]
    generated = operation.as_strategy(generation_mode=mode)
    if "{analysis_id}" in path and mode is GenerationMode.POSITIVE:
        known = operation.as_strategy(generation_mode=mode,
                                      path_parameters={"analysis_id": target.analysis_id})
        return st.one_of(generated, known)
    if (method, path) == ("POST", "/v1/analyses") and mode is GenerationMode.POSITIVE:
        # A generated table almost never forms a valid crossover, so every POST would end in 422;
        # a fixed valid CSV with fuzzed settings in the query also reaches 201 and its body.
        table = operation.as_strategy(generation_mode=mode, media_type="text/csv",
                                      body=csv_body(table_rows()).decode(),
                                      query={"test": "T", "reference": "R", "baseline": "B"})
        return st.one_of(generated, table)
    return generated


def test_operations_cover_the_schema(target: FuzzTarget) -> None:
    """Every operation in the published OpenAPI document is fuzzed below (OpenAPI 3.1 paths
    object); a new route without a fuzz case fails here."""
    published = {
        (result.ok().method.upper(), result.ok().path)
        for result in target.schema.get_all_operations()
    }
    assert published == set(OPERATIONS)


@pytest.mark.parametrize(("method", "path"), OPERATIONS, ids=[f"{m} {p}" for m, p in OPERATIONS])
def test_positive_requests_conform(target: FuzzTarget, method: str, path: str) -> None:
    """Requests that fit the schema get declared statuses, media types and bodies, never 5xx
    (schemathesis OpenAPI conformance checks; RFC 9457 for the problem bodies)."""

    @FUZZ_SETTINGS
    @given(data=st.data())
    def run(data: st.DataObject) -> None:
        case = data.draw(_strategy(target, method, path, GenerationMode.POSITIVE))
        _cap_replicates(case)
        case.call_and_validate(checks=RESPONSE_CHECKS)

    run()


@pytest.mark.parametrize(("method", "path"), WITH_INPUT, ids=[f"{m} {p}" for m, p in WITH_INPUT])
def test_negative_requests_are_rejected_cleanly(target: FuzzTarget, method: str, path: str) -> None:
    """Requests that break the schema are answered with a declared 4xx problem, never 5xx and
    never accepted (schemathesis negative_data_rejection and conformance checks; RFC 9457)."""
    @FUZZ_SETTINGS
    @given(data=st.data())
    def run(data: st.DataObject) -> None:
        case = data.draw(_strategy(target, method, path, GenerationMode.NEGATIVE))
        _cap_replicates(case)
        case.call_and_validate(checks=[*RESPONSE_CHECKS, negative_data_rejection])

    run()


# Findings of the fuzzer, kept as fixed examples so that they are checked on every run.

def _client_call(target: FuzzTarget, method: str, path: str, **kwargs: Any) -> Any:
    operation = target.schema[path][method]
    case = operation.Case(headers={"Authorization": f"Bearer {target.key}"}, **kwargs)
    response = case.call_and_validate(checks=RESPONSE_CHECKS)
    assert response.status_code not in (401, 403), response.text
    return response


def test_offset_beyond_64_bits_is_not_a_server_error(target: FuzzTarget) -> None:
    """GET /v1/analyses?offset=2**63 fits the schema (integer, minimum 0) and must be answered
    without a 5xx (schemathesis not_a_server_error; found by the fuzzer above: SQLite integers
    are 64-bit, sqlite3 raises OverflowError)."""
    _client_call(target, "GET", "/v1/analyses", query={"offset": 2**63})


def test_large_integral_values_are_archived(target: FuzzTarget) -> None:
    """Values such as 1e20 are plain digits in RFC 8785 canonical JSON (section 3.2.2.3), read back
    as integers; the archive must still hash them, so the POST answers 201 (found by the fuzzer
    with limit_upper=9007199254740992.0)."""
    request = json_request()
    request["records"][0]["value"] = 1e20
    request["settings"]["limits"] = {"lower": -0.2, "upper": 9007199254740992.0}
    response = _client_call(target, "POST", "/v1/analyses", body=request,
                            media_type="application/json")
    assert response.status_code == 201
