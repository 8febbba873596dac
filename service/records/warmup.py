"""The service draws its bootstraps with the compiled loops, loaded before it reports ready, so no
request pays for loading them."""

from __future__ import annotations

from typing import Any

from service.intake.tables import normalize_request
from service.records.building import compute_result
from service.stats import kernels
from service.stats.waves import MIN_BLOCK_DRAWS


def _request(subjects: int, stratified: bool, replicates: int = 200) -> dict[str, Any]:
    # Constructed, not measured: a three-arm table whose numbers only exercise the code paths
    # (≤ 64 subjects use presence bitsets, more use byte arrays; strata take their own path).
    records = []
    for i in range(subjects):
        sequence = ("BRT", "TBR", "RTB")[i % 3]
        for period, treatment in enumerate(sequence, start=1):
            value = 10.0 + (i % 7) + {"B": 0.0, "R": 5.0, "T": 5.5}[treatment] + 0.1 * period
            records.append({"subject": f"W{i:03d}", "period": period, "sequence": sequence,
                            "treatment": treatment, "metric": "warm-up", "value": value})
    # Normalized like any request, so the warm-up never drifts from the settings' defaults.
    return normalize_request({
        "design": {"test": "T", "reference": "R", "baseline": "B"}, "records": records,
        "settings": {"replicates": replicates, "seed": 1, "stratify_by_sequence": stratified},
    })


def prefer_compiled_loops() -> None:
    """From here on every bootstrap in this process draws with the compiled loops (kernels.py):
    a service runs many, so it skips the plain-numpy start that suits one short command."""
    kernels.load_compiled()


def warm_up() -> None:
    """Runs each compiled loop once (numba compiles it, or reads it from its cache), the ones
    that let threads share a bootstrap too (streams.py: about 45 ms for the first request big
    enough to use them, were they left to it)."""
    prefer_compiled_loops()
    for subjects, stratified in ((12, False), (12, True), (70, False), (70, True)):
        compute_result(_request(subjects, stratified))
    # Two blocks of waves.MIN_BLOCK_DRAWS draws, so two threads share it (asked for, so also on
    # one core); a few milliseconds of drawing.
    subjects = 70
    compute_result(_request(subjects, False, replicates=-(-2 * MIN_BLOCK_DRAWS // subjects)),
                   threads=2)
