"""A compute-time cap the caller can hand to long loops (a time.monotonic() deadline)."""

from __future__ import annotations


class ComputeTimeExceeded(Exception):
    """The deadline passed before the work finished; nothing partial is returned."""

    def __init__(self, done: int, total: int) -> None:
        super().__init__(f"stopped after {done} of {total} bootstrap replicates: time is up")
        self.done = done
        self.total = total
