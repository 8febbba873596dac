"""Benchmark: what one POST of the demo study costs outside the statistics.

1. canonical_json of the demo record against rfc8785.dumps (the reference package) on the same
   object, runs alternating, best of REPEATS; the bytes must be identical.
2. The record path of POST /v1/analyses — reading the body (parse and validate) → build_record →
   Archive.insert (SQLite in a temporary folder) → the response body — less the time spent inside
   the statistics (every service.stats function the record modules call, except the *_to_json
   converters, which are record assembly), as wall time and as CPU time, against the 2 ms budget.

Run: .venv/bin/python benchmarks/canonical.py   (a script, not a test)
"""

from __future__ import annotations

import functools
import statistics
import sys
import tempfile
import time
import types
from collections.abc import Callable
from pathlib import Path
from typing import Any

import rfc8785
from starlette.responses import JSONResponse

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from service.api.analyses import created_response  # noqa: E402
from service.archive.store import Archive  # noqa: E402
from service.intake.reading import read_for_record, read_request  # noqa: E402
from service.records import building  # noqa: E402
from service.records.hashing import canonical_json  # noqa: E402
from service.records.warmup import prefer_compiled_loops  # noqa: E402

DEMO_REQUEST = ROOT / "sample_requests" / "vitamin_d3_softgel.json"
REPEATS = 41
PATH_RUNS = 41
TARGET_MS = 2.0  # the per-request budget outside the statistics (issue 12)
# The same budget side by side with a reference run: where it was set, rfc8785.dumps of the record
# took about 6 ms (the issue's own figure), so the path may cost a third of that run's time.
REFERENCE_MS_WHERE_SET = 6.0


def best_pair(first: Callable[[], object], second: Callable[[], object]) -> tuple[float, float]:
    """Best of REPEATS for each, the two alternating, so a slow spell of the shared machine falls
    on both."""
    best = [float("inf"), float("inf")]
    for _ in range(REPEATS):
        for slot, run in enumerate((first, second)):
            start = time.perf_counter()
            run()
            best[slot] = min(best[slot], time.perf_counter() - start)
    return best[0], best[1]


class StatisticsClock:
    """Wraps the service.stats functions that the record modules call and adds up their time."""

    def __init__(self) -> None:
        self.seconds = 0.0
        self.cpu_seconds = 0.0
        self._depth = 0
        self.wrapped: list[str] = []

    def install(self) -> None:
        for name, module in list(sys.modules.items()):
            if not name.startswith("service.records.") or not isinstance(module, types.ModuleType):
                continue
            for attribute, value in list(vars(module).items()):
                if (
                    isinstance(value, types.FunctionType)
                    and value.__module__.startswith("service.stats.")
                    and not attribute.endswith("_to_json")
                ):
                    setattr(module, attribute, self._timed(value))
                    self.wrapped.append(f"{value.__module__}.{attribute}")

    def _timed(self, function: Callable[..., Any]) -> Callable[..., Any]:
        @functools.wraps(function)
        def timed(*args: Any, **kwargs: Any) -> Any:
            self._depth += 1
            start, cpu_start = time.perf_counter(), time.process_time()
            try:
                return function(*args, **kwargs)
            finally:
                self._depth -= 1
                if self._depth == 0:
                    self.seconds += time.perf_counter() - start
                    self.cpu_seconds += time.process_time() - cpu_start

        return timed


def main() -> int:
    prefer_compiled_loops()  # as the service does (create_app)
    body_bytes = DEMO_REQUEST.read_bytes()
    inputs = read_request("json", body_bytes, {})
    record = building.build_record(inputs)
    subjects = len({row["subject"] for row in inputs["records"]})
    print(f"demo study: {subjects} subjects, B = {inputs['settings']['replicates']}, canonical "
          f"record {len(canonical_json(record)):,} bytes")

    failures = 0
    print(f"\n{'canonical JSON of':<22}{'ours ms':>9}{'rfc8785 ms':>12}{'ratio':>8}  same bytes")
    for label, value in (("the record", record), ("its inputs", record["inputs"]),
                         ("its result", record["result"])):
        same = canonical_json(value) == rfc8785.dumps(value)
        failures += not same
        ours, reference = best_pair(functools.partial(canonical_json, value),
                                    functools.partial(rfc8785.dumps, value))
        print(f"{label:<22}{ours * 1e3:>9.3f}{reference * 1e3:>12.3f}{ours / reference:>8.2f}  "
              f"{'yes' if same else 'NO'}")

    clock = StatisticsClock()
    clock.install()
    with tempfile.TemporaryDirectory(prefix="bioparity-canonical-") as folder:
        archive = Archive.create(f"sqlite:///{folder}/archive.sqlite3")
        try:
            totals: list[float] = []
            outside: list[float] = []
            outside_cpu: list[float] = []
            reference_cpu: list[float] = []
            for _ in range(PATH_RUNS):
                # The reference run, alternating with the path, so both see the same machine.
                cpu_start = time.process_time()
                rfc8785.dumps(record)
                reference_cpu.append(time.process_time() - cpu_start)
                clock.seconds = clock.cpu_seconds = 0.0
                start, cpu_start = time.perf_counter(), time.process_time()
                inputs, tables, plain = read_for_record("json", body_bytes, {})
                record, texts = building.build_record_and_texts(inputs, tables=tables,
                                                                plain_records=plain)
                # As POST /v1/analyses does it (service.api.submissions).
                stored = archive.insert(record, texts=texts, read_back=False)
                body = created_response(stored, replayed=False).body
                elapsed = time.perf_counter() - start
                totals.append(elapsed)
                outside.append(elapsed - clock.seconds)
                outside_cpu.append(time.process_time() - cpu_start - clock.cpu_seconds)
            read_later = archive.get(stored["id"])
            same_response = body == JSONResponse(read_later, status_code=201).body
        finally:
            archive.close()
    print(f"\nrecord path read body → build_record → insert → response body, {PATH_RUNS} runs "
          f"({len(clock.wrapped)} statistics functions timed apart)")
    print(f"  whole path        median {statistics.median(totals) * 1e3:7.2f} ms   "
          f"best {min(totals) * 1e3:7.2f} ms")
    print(f"  less statistics   median {statistics.median(outside) * 1e3:7.2f} ms   "
          f"best {min(outside) * 1e3:7.2f} ms   (wall; includes the commit's fsync)")
    print(f"  less statistics   median {statistics.median(outside_cpu) * 1e3:7.2f} ms   "
          f"best {min(outside_cpu) * 1e3:7.2f} ms   (CPU of this process, every thread)")
    cpu = statistics.median(outside_cpu)
    print(f"  target ≤ {TARGET_MS:g} ms outside the statistics: median CPU is "
          f"{cpu * 1e3 / TARGET_MS:.2f}× the target ({'met' if cpu * 1e3 <= TARGET_MS else 'not met'}; "
          f"the HTTP layer comes on top, see benchmarks/service.py)")
    reference = statistics.median(reference_cpu)
    share, allowed = cpu / reference, TARGET_MS / REFERENCE_MS_WHERE_SET
    print(f"  side by side: rfc8785.dumps(record) median {reference * 1e3:.2f} ms CPU in the same "
          f"runs; the path costs {share:.2f}× it, the budget {allowed:.2f}× "
          f"({TARGET_MS:g} ms where it took ~{REFERENCE_MS_WHERE_SET:g} ms): "
          f"{share / allowed:.2f}× the budget ({'met' if share <= allowed else 'not met'})")
    print(f"  response body byte-identical to JSONResponse(the record read back later): "
          f"{'yes' if same_response else 'NO'}")
    failures += not same_response
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
