"""What the host did to the run: the share of this machine's CPU time taken by the hypervisor
for other guests ("steal", /proc/stat, Linux), printed beside the figures.

On a shared virtual machine a core can be there on paper and busy elsewhere in fact. Two threads
then do no better than one, while a single-threaded reference run loses little, so a ratio
against it that counts on both cores reads worse than the code is. Above a few percent, read the
two-core figures of the run as a lower bound.

Used by the benchmark scripts (a helper, not a benchmark).
"""

from __future__ import annotations

from pathlib import Path

_STAT = Path("/proc/stat")
_STEAL = 7  # user nice system idle iowait irq softirq steal … (proc(5), the "cpu" line)


def _cpu_ticks() -> list[int] | None:
    try:
        first = _STAT.read_text(encoding="ascii").splitlines()[0].split()
    except (OSError, IndexError, UnicodeDecodeError):
        return None
    if first[:1] != ["cpu"] or len(first) <= _STEAL + 1:
        return None
    return [int(field) for field in first[1:]]


class StolenTime:
    """`with StolenTime() as stolen: ...`, then `stolen.describe()`."""

    def __init__(self) -> None:
        self.share: float | None = None
        self._start: list[int] | None = None

    def __enter__(self) -> StolenTime:
        self._start = _cpu_ticks()
        return self

    def __exit__(self, *_exc: object) -> None:
        end = _cpu_ticks()
        if self._start is None or end is None:
            return
        # guest and guest_nice (fields 9 and 10) are already counted in user and nice
        spent = [b - a for a, b in zip(self._start[:8], end[:8], strict=True)]
        total = sum(spent)
        self.share = spent[_STEAL] / total if total > 0 else None

    def describe(self) -> str:
        if self.share is None:
            return "CPU time taken by the host for other guests (steal): not reported here"
        note = ("" if self.share < 0.03 else
                " — the cores were shared with other guests: read the figures that count on "
                "two cores as a lower bound, and compare only runs made side by side")
        return f"CPU time taken by the host for other guests (steal): {self.share:.1%}{note}"
