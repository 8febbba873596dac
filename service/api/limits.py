"""Per-request caps (work, compute time) and the Idempotency-Key header of POST requests."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from starlette.requests import Request

from service.api.problems import ProblemError
from service.records.hashing import canonical_json, sha256_hex
from service.stats.deadlines import ComputeTimeExceeded
from service.stats.phases import PhaseTimeExceeded

MAX_IDEMPOTENCY_KEY_LENGTH = 200
# Metrics one profile upload adds to the analysis: auc_0_t, auc_0_inf and cmax (tmax is only
# summarised, it costs no bootstrap).
PROFILE_METRICS = 3


def analysis_work(inputs: Mapping[str, Any]) -> tuple[int, int, int]:
    """(replicates, subjects, metrics) of normalized inputs; subjects and metrics are upper
    bounds (every subject counted for every metric)."""
    records = inputs.get("records") or []
    profiles = inputs.get("profiles") or []
    subjects = {str(r["subject"]) for r in records} | {str(p["subject"]) for p in profiles}
    metrics = len({str(r.get("metric", "response")) for r in records})
    metrics += PROFILE_METRICS if profiles else 0
    return int(inputs["settings"]["replicates"]), len(subjects), metrics


def check_work(inputs: Mapping[str, Any], max_work: int) -> None:
    replicates, subjects, metrics = analysis_work(inputs)
    work = replicates * subjects * metrics
    if work > max_work:
        most = max(max_work // max(subjects * metrics, 1), 0)
        raise ProblemError(
            422,
            f"the analysis is larger than this service computes: replicates × subjects × metrics "
            f"= {replicates} × {subjects} × {metrics} = {work}, above the cap of {max_work} "
            "(setting max_work, BIOPARITY_MAX_WORK)",
            [(["settings", "replicates"],
              f"at most {most} replicates for {subjects} subjects and {metrics} metric(s)")],
        )


def time_exceeded(exc: ComputeTimeExceeded, max_seconds: float) -> ProblemError:
    if isinstance(exc, PhaseTimeExceeded):
        return ProblemError(
            422,
            f"the analysis did not finish within this service's compute-time cap of "
            f"{max_seconds:g} s (setting max_compute_seconds, BIOPARITY_MAX_COMPUTE_SECONDS); it "
            f"{exc}. Send a smaller table or split it by metric; nothing was archived",
            [(["body"], f"time ran out before {exc.phase}")],
        )
    return ProblemError(
        422,
        f"the analysis did not finish within this service's compute-time cap of {max_seconds:g} s "
        f"(setting max_compute_seconds, BIOPARITY_MAX_COMPUTE_SECONDS); {exc}. Ask for fewer "
        "replicates; nothing was archived",
        [(["settings", "replicates"], f"stopped after {exc.done} of {exc.total} replicates")],
    )


def idempotency_key(request: Request) -> str | None:
    """The Idempotency-Key header: 1–200 printable ASCII characters, or a 422 problem."""
    value = request.headers.get("idempotency-key")
    if value is None:
        return None
    if not 1 <= len(value) <= MAX_IDEMPOTENCY_KEY_LENGTH or not all(
        " " <= ch <= "~" for ch in value
    ):
        raise ProblemError(
            422,
            "the Idempotency-Key header must hold 1 to 200 printable ASCII characters",
            [(["header", "idempotency-key"],
              f"{len(value)} characters" if value.isascii() and value.isprintable()
              else "holds a character outside printable ASCII")],
        )
    return value


def request_fingerprint(body: bytes, content_type: str | None, query: list[tuple[str, str]]) -> str:
    """SHA-256 that tells a retried request from a different one under the same key: the raw
    body, the Content-Type header and the query parameters, all as sent."""
    return sha256_hex(canonical_json({
        "body_sha256": sha256_hex(body),
        "content_type": content_type or "",
        "query": [list(item) for item in query],
    }))
