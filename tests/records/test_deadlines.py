"""The compute-time cap holds in every phase, not only in the bootstrap loop."""

from __future__ import annotations

import time

import pytest

from service.intake.tables import normalize_request
from service.records.building import build_record
from service.stats.deadlines import ComputeTimeExceeded
from service.stats.phases import PhaseTimeExceeded
from tests.records.test_designs import _replicate_request


def test_a_deadline_that_has_passed_stops_before_the_first_phase() -> None:
    """A time.monotonic() deadline in the past: the record is not built and the exception names
    the phase it stopped before (the caller answers 422 and archives nothing)."""
    inputs = normalize_request(_replicate_request())
    with pytest.raises(PhaseTimeExceeded) as caught:
        build_record(inputs, deadline=time.monotonic() - 1.0)
    assert isinstance(caught.value, ComputeTimeExceeded)
    assert "profiles" in caught.value.phase


def test_a_generous_deadline_changes_no_number() -> None:
    """The checks only read the clock: with time to spare the record equals the one built
    without a deadline."""
    inputs = normalize_request(_replicate_request())
    assert build_record(inputs, deadline=time.monotonic() + 600) == build_record(inputs)
