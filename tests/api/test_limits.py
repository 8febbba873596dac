"""Resource limits: body size, rows, work and compute time, each refused with a clear problem."""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np
import pytest

from service.api.settings import ServiceSettings
from service.stats.deadlines import ComputeTimeExceeded
from service.stats.ratio import theta_of_means
from service.stats.resampling import bootstrap, leave_one_out_values
from tests.api.conftest import REPLICATES, ApiClient, json_request

MakeClient = Callable[..., ApiClient]


def test_body_size_cap(make_client: MakeClient) -> None:
    """A body above max_body_bytes is 413 Content Too Large (RFC 9110 §15.5.14)."""
    client = make_client(max_body_bytes=1000)
    response = client.post("/v1/analyses", json=json_request())
    assert response.status_code == 413
    assert "1000 bytes" in response.json()["detail"]


def test_row_cap(make_client: MakeClient) -> None:
    """More rows than max_records is a 422 naming the field (RFC 9110 §15.5.21)."""
    client = make_client(max_records=10)
    response = client.post("/v1/analyses", json=json_request())
    assert response.status_code == 422
    assert response.json()["errors"][0]["loc"] == ["records"]


def test_work_cap_boundary(make_client: MakeClient) -> None:
    """replicates × subjects × metrics = 200 × 12 × 1 is accepted at a cap of exactly that and
    refused one below, naming settings.replicates and the cap (arithmetic of the rule)."""
    work = REPLICATES * 12 * 1
    refused = make_client(max_work=work - 1).post("/v1/analyses", json=json_request())
    assert refused.status_code == 422
    body = refused.json()
    assert body["errors"][0]["loc"] == ["settings", "replicates"]
    assert f"= {work}" in body["detail"] and "max_work" in body["detail"]
    assert f"at most {(work - 1) // 12} replicates" in body["errors"][0]["msg"]
    accepted = make_client(max_work=work).post("/v1/analyses", json=json_request())
    assert accepted.status_code == 201


def test_compute_time_cap(make_client: MakeClient) -> None:
    """A passed deadline stops the analysis with a 422 naming max_compute_seconds, never a 500,
    and archives nothing (common practice: refuse, do not half-store). The cap covers every phase,
    reading the table included, so a deadline this short stops before the bootstrap and the
    problem names the phase (the bootstrap's own stop names settings.replicates: next test)."""
    client = make_client(max_compute_seconds=1e-9, raise_app_exceptions=False)
    response = client.post("/v1/analyses", json=json_request())
    assert response.status_code == 422, response.text
    assert "max_compute_seconds" in response.json()["detail"]
    assert response.json()["errors"][0]["loc"] == ["body"]
    assert "time ran out before" in response.json()["errors"][0]["msg"]
    assert client.get("/v1/analyses").json()["total"] == 0


def test_bootstrap_stops_between_chunks() -> None:
    """The loop checks time.monotonic() before each chunk: a slow statistic (time.sleep) with a
    short deadline stops long before all chunks ran; a far deadline changes no number
    (the results equal those without one, numpy.testing)."""
    rng = np.random.default_rng(3)
    data = rng.normal([10.0, 8.0, 5.0], 1.0, size=(12, 3))
    theta_hat = float(theta_of_means(data.mean(axis=0)))
    jack = leave_one_out_values(data, theta_of_means)
    calls: list[int] = []

    def slow(means: np.ndarray) -> np.ndarray:  # type: ignore[type-arg]
        calls.append(1)
        time.sleep(0.05)
        return theta_of_means(means)

    common = {"theta_hat": theta_hat, "jackknife_values": jack, "seed": 5,
              "confidence_level": 0.9, "chunk_size": 64}
    started = time.monotonic()
    with pytest.raises(ComputeTimeExceeded) as stopped:
        bootstrap(data, slow, replicates=64 * 200, deadline=started + 0.2, **common)  # type: ignore[arg-type]
    assert time.monotonic() - started < 2.0
    assert 0 < stopped.value.done < stopped.value.total == 64 * 200
    assert len(calls) < 200

    plain = bootstrap(data, theta_of_means, replicates=2000, **common)  # type: ignore[arg-type]
    capped = bootstrap(data, theta_of_means, replicates=2000, deadline=time.monotonic() + 600,
                       **common)  # type: ignore[arg-type]
    np.testing.assert_array_equal(plain.distribution, capped.distribution)
    assert plain.intervals == capped.intervals


def test_limits_from_environment() -> None:
    """BIOPARITY_* variables set every limit (twelve-factor configuration, common practice);
    a bad value names its variable."""
    settings = ServiceSettings.from_env({
        "BIOPARITY_MAX_WORK": "1000", "BIOPARITY_MAX_COMPUTE_SECONDS": "2.5",
        "BIOPARITY_REQUIRE_KEYS": "true", "BIOPARITY_MAX_BODY_BYTES": "5000",
        "BIOPARITY_MAX_RECORDS": "40",
    })
    assert (settings.max_work, settings.max_compute_seconds, settings.require_keys,
            settings.max_body_bytes, settings.max_records) == (1000, 2.5, True, 5000, 40)
    defaults = ServiceSettings()
    assert (defaults.max_work, defaults.max_compute_seconds, defaults.require_keys) == (
        200_000_000, 120.0, False)
    for name, value in (("MAX_COMPUTE_SECONDS", "soon"), ("REQUIRE_KEYS", "perhaps"),
                        ("MAX_WORK", "lots")):
        with pytest.raises(ValueError, match=f"BIOPARITY_{name}"):
            ServiceSettings.from_env({f"BIOPARITY_{name}": value})
    with pytest.raises(ValueError, match="max_compute_seconds"):
        ServiceSettings(max_compute_seconds=0)
