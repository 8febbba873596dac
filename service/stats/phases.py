"""Deadline checks between the phases of a closed-form analysis (fits without a replicate loop)."""

from __future__ import annotations

import time

from service.stats.deadlines import ComputeTimeExceeded


class PhaseTimeExceeded(ComputeTimeExceeded):
    """The deadline passed between two phases of a fit; ``done`` and ``total`` count phases."""

    def __init__(self, phase: str, done: int, total: int) -> None:
        super().__init__(done, total)
        # The parent's message speaks of bootstrap replicates; a fit has phases.
        self.args = (f"stopped before {phase} (after {done} of {total} steps): time is up",)
        self.phase = phase


def check_deadline(deadline: float | None, phase: str, done: int, total: int) -> None:
    """Raise PhaseTimeExceeded when ``deadline`` (a time.monotonic() value) has passed."""
    if deadline is not None and time.monotonic() > deadline:
        raise PhaseTimeExceeded(phase, done, total)
