"""Every error answer is an RFC 9457 problem, and a failed request archives nothing."""

from __future__ import annotations

import json
from collections.abc import AsyncIterator, Callable
from typing import Any

import httpx
import pytest

from service.archive.store import Archive
from tests.api.conftest import ApiClient, json_request, table_rows

PROBLEM_FIELDS = {"type", "title", "status", "detail", "errors"}


def problem(response: httpx.Response, status: int) -> dict[str, Any]:
    """Check the RFC 9457 §3 shape and media type (§6.1), then return the body."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    assert response.headers["x-content-type-options"] == "nosniff"
    body: dict[str, Any] = response.json()
    assert PROBLEM_FIELDS <= set(body)
    assert body["status"] == status
    assert body["type"].startswith("urn:bioparity:problem:")
    for error in body["errors"]:
        assert set(error) == {"loc", "msg"}
        assert isinstance(error["loc"], list) and error["msg"]
    return body


def archived(client: ApiClient) -> int:
    total: int = client.get("/v1/analyses").json()["total"]
    return total


def test_malformed_json_is_400_with_position(client: ApiClient) -> None:
    """Malformed JSON → 400 naming line and column (RFC 9110 §15.5.1; positions as Python's
    json.JSONDecodeError reports them: 1-based line and column)."""
    body = b'{\n  "design": {"test": "T",,}\n}'
    try:
        json.loads(body)
    except json.JSONDecodeError as exc:
        position = f"line {exc.lineno} column {exc.colno}"
    response = client.post(
        "/v1/analyses", content=body, headers={"Content-Type": "application/json"}
    )
    details = problem(response, 400)
    assert details["errors"][0]["loc"] == ["body"]
    assert position in details["errors"][0]["msg"]
    assert archived(client) == 0


def test_unknown_id_and_route_are_404(client: ApiClient) -> None:
    """Unknown resources → 404 problem (RFC 9110 §15.5.5)."""
    for path in (
        "/v1/analyses/0123456789abcdef0123456789abcdef",
        "/v1/analyses/0123456789abcdef0123456789abcdef/report",
        "/v1/analyses/0123456789abcdef0123456789abcdef/bundle",
        "/v1/nothing-here",
    ):
        problem(client.get(path), 404)
    details = problem(client.get("/v1/analyses/not-an-id"), 404)
    assert details["errors"][0]["loc"] == ["path", "analysis_id"]


def test_wrong_method_is_405_with_allow(client: ApiClient) -> None:
    """A known path with an unsupported method → 405 and an Allow header (RFC 9110 §15.5.6)."""
    response = client.delete("/v1/analyses")
    problem(response, 405)
    assert "POST" in response.headers["allow"]


def test_body_over_cap_is_413(make_client: Callable[..., ApiClient]) -> None:
    """Bodies over the cap → 413 (RFC 9110 §15.5.14), by Content-Length and by bytes actually
    read from a chunked upload that declares no length (RFC 9112 §7.1)."""
    client = make_client(max_body_bytes=2048)
    big = json.dumps(json_request()).encode()
    assert len(big) > 2048
    response = client.post(
        "/v1/analyses", content=big, headers={"Content-Type": "application/json"}
    )
    problem(response, 413)

    async def chunks() -> AsyncIterator[bytes]:
        for start in range(0, len(big), 512):
            yield big[start : start + 512]

    streamed = client.post(
        "/v1/analyses", content=chunks(), headers={"Content-Type": "application/json"}
    )
    assert "content-length" not in streamed.request.headers
    problem(streamed, 413)
    assert archived(client) == 0


def test_unsupported_media_type_is_415(client: ApiClient) -> None:
    """Anything but JSON or CSV (a charset parameter aside) → 415 (RFC 9110 §15.5.16)."""
    body = json.dumps(json_request()).encode()
    for content_type in ("text/plain", "application/xml", "application/json; charset=latin-1"):
        response = client.post("/v1/analyses", content=body, headers={"Content-Type": content_type})
        details = problem(response, 415)
        assert details["errors"][0]["loc"] == ["header", "content-type"]
    missing = client.post("/v1/analyses", content=body)
    assert "content-type" not in missing.request.headers
    assert problem(missing, 415)["errors"][0]["msg"] == "missing"
    accepted = client.post(
        "/v1/analyses", content=body, headers={"Content-Type": "application/json; charset=UTF-8"}
    )
    assert accepted.status_code == 201
    assert archived(client) == 1


def test_invalid_content_is_422_with_every_problem(client: ApiClient) -> None:
    """Several faults → one 422 listing each with its location (RFC 9457 §3 extension member
    `errors`; RFC 9110 §15.5.21)."""
    request = json_request()
    request["records"][0]["value"] = "high"
    request["records"][4]["treatment"] = "X"
    request["settings"]["replicates"] = 5
    request["records"][7]["period"] = 0
    response = client.post("/v1/analyses", json=request)
    details = problem(response, 422)
    locations = [error["loc"] for error in details["errors"]]
    assert len(locations) >= 4
    assert ["records", 0, "value"] in locations
    assert ["settings", "replicates"] in locations
    assert ["records", 7, "period"] in locations
    assert ["records", 4, "treatment"] in locations
    assert archived(client) == 0


def test_csv_problems_name_lines(client: ApiClient) -> None:
    """A faulty CSV cell is reported by physical line (header = line 1, RFC 4180 §2)."""
    body = b"subject,period,treatment,value\nS01,1,T,abc\nS01,2,R,1.0\n"
    response = client.post(
        "/v1/analyses",
        content=body,
        params={"test": "T", "reference": "R", "replicates": "nope"},
        headers={"Content-Type": "text/csv"},
    )
    details = problem(response, 422)
    locations = [error["loc"] for error in details["errors"]]
    assert ["line", 2, "value"] in locations
    assert ["query", "replicates"] in locations


def test_csv_table_problems_name_lines(client: ApiClient) -> None:
    """Problems found after parsing (an unknown treatment, a duplicate period) still name the CSV
    line, skipping the blank line (header = line 1, RFC 4180 §2)."""
    body = (
        b"subject,period,treatment,value\n"
        b"S01,1,T,1.0\n"
        b"\n"
        b"S01,2,X,2.0\n"
        b"S01,1,R,3.0\n"
    )
    response = client.post(
        "/v1/analyses",
        content=body,
        params={"test": "T", "reference": "R"},
        headers={"Content-Type": "text/csv"},
    )
    details = problem(response, 422)
    locations = [error["loc"] for error in details["errors"]]
    assert ["line", 4, "treatment"] in locations, locations
    assert ["line", 5, "period"] in locations, locations


def test_query_with_json_body_is_422(client: ApiClient) -> None:
    """Settings in the query are read only for CSV; with JSON they are refused, not ignored
    (a silently dropped seed would break reproducibility, common practice)."""
    response = client.post("/v1/analyses", json=json_request(), params={"seed": 1})
    details = problem(response, 422)
    assert details["errors"][0]["loc"] == ["query", "seed"]


def test_bad_query_parameters_are_422(client: ApiClient) -> None:
    """FastAPI's own query validation is mapped to the same problem shape (RFC 9457 §3)."""
    details = problem(client.get("/v1/analyses", params={"limit": 0, "offset": -1}), 422)
    locations = [error["loc"] for error in details["errors"]]
    assert ["query", "limit"] in locations and ["query", "offset"] in locations
    problem(client.get("/v1/analyses", params={"limit": 501}), 422)
    problem(client.get("/v1/analyses", params={"inputs_sha256": "xyz"}), 422)


def test_row_cap_is_422(make_client: Callable[..., ApiClient]) -> None:
    """More rows than max_records → 422 at loc ["records"] naming the cap (a content limit, not
    a size limit: RFC 9110 §15.5.21 rather than §15.5.14)."""
    client = make_client(max_records=30)
    details = problem(client.post("/v1/analyses", json=json_request()), 422)
    assert details["errors"] == [
        {"loc": ["records"], "msg": "has 36 rows; this service accepts at most 30"}
    ]
    assert archived(client) == 0


def test_too_few_subjects_is_422(client: ApiClient) -> None:
    """An analysis that needs more subjects than given is bad input, never a 500 (three are
    the fewest the contract accepts; a jackknife needs n > 1, Quenouille 1956)."""
    response = client.post("/v1/analyses", json=json_request(table_rows(subjects=2)))
    problem(response, 422)
    assert archived(client) == 0


def test_unexpected_failure_is_500_without_trace(
    make_client: Callable[..., ApiClient], monkeypatch: pytest.MonkeyPatch
) -> None:
    """An internal fault → a 500 problem that leaks no exception text (RFC 9457 §5: problem
    details must not expose implementation internals) and archives nothing."""
    client = make_client(raise_app_exceptions=False)

    def broken(*_args: Any, **_kwargs: Any) -> dict[str, Any]:
        raise RuntimeError("secret-internal-detail /var/lib/x")

    monkeypatch.setattr(Archive, "insert", broken)
    response = client.post("/v1/analyses", json=json_request())
    details = problem(response, 500)
    assert "secret" not in response.text and "Traceback" not in response.text
    assert details["errors"] == []
    assert archived(client) == 0


def test_openapi_declares_models_and_statuses(client: ApiClient) -> None:
    """The OpenAPI 3.1 document names the record, page, problem and request models and the
    declared statuses of POST /v1/analyses (OpenAPI Specification 3.1 §4.8.16)."""
    document = client.get("/openapi.json").json()
    schemas = document["components"]["schemas"]
    for name in ("AnalysisRecord", "AnalysisPage", "ProblemDetails", "AnalysisRequest", "Health"):
        assert name in schemas
    post = document["paths"]["/v1/analyses"]["post"]
    assert {"201", "400", "413", "415", "422"} <= set(post["responses"])
    assert set(post["requestBody"]["content"]) == {"application/json", "text/csv"}
    assert set(post["responses"]["422"]["content"]) == {"application/problem+json"}
    assert "application/json" in post["responses"]["201"]["content"]
    for path in ("/v1/analyses/{analysis_id}", "/v1/analyses/{analysis_id}/report"):
        assert "404" in document["paths"][path]["get"]["responses"]
