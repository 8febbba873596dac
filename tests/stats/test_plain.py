"""The plain-numpy bootstrap loops (plain.py) give the compiled loops' numbers to the last bit, and a
command-line analysis does not load the compiled ones.

Common practice (floating-point results depend on the order of the additions, so "the same
numbers" means bit for bit, numpy.testing.assert_array_equal); the generator itself is checked
against the published algorithm in test_kernels.py, for both sets of loops.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from service.stats import compiled, kernels, plain, streams

ROOT = Path(__file__).resolve().parents[2]


def _both(
    states: np.ndarray, draws: kernels.SubjectDraws, replicates: int, keep: bool
) -> list[tuple[np.ndarray, ...]]:
    """Each set of loops drawn from copies of the same states: (means, presence, draws, misses,
    states after)."""
    results = []
    for loops in (plain.draw_subjects, compiled.draw_subjects):
        here = states.copy()
        means, present, index = draws.buffers(replicates, keep_index=keep)
        misses = np.full(here.shape[0], -1, dtype=np.int64)
        loops(here, draws._members, draws._bounds, draws._thresholds, draws._columns,
              means, present, index, misses)
        results.append((means, present, index, misses, here))
    return results


def _assert_same(one: tuple[np.ndarray, ...], other: tuple[np.ndarray, ...]) -> None:
    for left, right in zip(one, other, strict=True):
        assert left.dtype == right.dtype
        np.testing.assert_array_equal(left, right)


@pytest.mark.parametrize(("n", "k", "replicates", "strata"), [
    (1, 1, 5, 0), (2, 3, 1, 0), (7, 2, 13, 0), (24, 3, 50, 0), (25, 3, 51, 2), (40, 5, 7, 0),
    (64, 3, 100, 3), (65, 3, 100, 0), (130, 4, 33, 5), (200, 3, 400, 0), (11, 6, 90, 3),
])
def test_chains_of_chunks_are_identical(n: int, k: int, replicates: int, strata: int) -> None:
    """Three chunks in a row, each from where the last one left the streams (spare half used or
    not), with and without the draws kept, bitsets (≤ 64 subjects) and bytes, strata or none."""
    data = np.random.default_rng(n * 100 + k).normal(20.0, 5.0, size=(n, k))
    codes = None if strata == 0 else np.arange(n, dtype=np.int64) % strata
    draws = kernels.SubjectDraws(n + 3, data, codes, compiled=False)
    states = draws.position()
    for chunk, keep in ((replicates, True), (replicates // 2 + 1, False), (3, True)):
        mine, theirs = _both(states, draws, chunk, keep)
        _assert_same(mine, theirs)
        states = theirs[4]


@pytest.mark.parametrize("lanes", [0, 1, 2, 3, 63, 64, 255, 256, 257, 1001])
def test_draws_from_any_lane_are_identical(lanes: int) -> None:
    """From a state part-way into a stream (streams.at_lane: an odd lane leaves a spare half
    waiting), both loops draw the same subjects and leave the same state."""
    data = np.random.default_rng(lanes).normal(size=(9, 3))
    draws = kernels.SubjectDraws(31, data, compiled=True)
    start = draws.position()
    states = np.empty_like(start)
    streams.at_lane(streams.jump_table(), start[0], lanes, states[0])
    for replicates in (1, 2, 17):
        mine, theirs = _both(states, draws, replicates, True)
        _assert_same(mine, theirs)


def test_rejected_lanes_are_identical() -> None:
    """Lemire 2019 (ACM TOMACS 29:3): with n = 2¹⁷ − 1 subjects, 2³² mod n = 2¹⁵ and about one lane
    in 131,000 is rejected; the plain loops skip the same lanes and count them the same way."""
    n = 131_071
    data = np.random.default_rng(3).normal(size=(n, 3))
    draws = kernels.SubjectDraws(12, data, compiled=False)
    mine, theirs = _both(draws.position(), draws, 3, True)
    assert theirs[3][0] > 0
    _assert_same(mine, theirs)


@pytest.mark.parametrize("n", [5, 64, 65, 150])
def test_omission_sums_are_identical(n: int) -> None:
    """The jackknife-after-bootstrap sums (Efron 1992 §3), added twice onto non-zero sums and by
    subject ranges, non-finite replicates left out."""
    data = np.random.default_rng(n).normal(size=(n, 3))
    _, present, _ = kernels.SubjectDraws(n, data, compiled=False).draw(301)
    centred = np.random.default_rng(n + 1).normal(size=301)
    finite = np.arange(301) % 6 != 0
    start = np.random.default_rng(2).normal(size=(3, n))
    results = []
    for loops in ((plain.omission_sums, plain.omission_sums),
                  (compiled.omission_sums_bits, compiled.omission_sums_bytes)):
        sums = start.copy()
        add = loops[1] if present.dtype == np.uint8 else loops[0]
        add(present, 0, n, finite, centred, sums)
        for first, stop in ((0, 1), (1, n // 2), (n // 2, n), (3, 3)):
            add(present, first, stop, finite, centred[::-1].copy(), sums)
        results.append(sums)
    np.testing.assert_array_equal(results[0], results[1])



def _sums_where_absent(present: np.ndarray, n: int, finite: np.ndarray, centred: np.ndarray,
                       sums: np.ndarray) -> None:
    """The definition, one addition at a time and only where subject i is absent."""
    for b in range(present.shape[0]):
        if not finite[b]:
            continue
        for i in range(n):
            here = (present[b, i] != 0 if present.dtype == np.uint8
                    else (int(present[b, 0]) >> i) & 1)
            if not here:
                d = float(centred[b])
                sums[0, i] += 1.0
                sums[1, i] += d
                sums[2, i] += d * d


@pytest.mark.parametrize("n", [7, 64, 90])
def test_omission_sums_at_the_edges_of_floating_point(n: int) -> None:
    """The compiled loops add -0.0 where a subject is present instead of branching. x + (-0.0)
    is x: exact for x other than zero, and for the zeros by IEEE 754-2019 §6.3 in the default
    rounding (+0 + -0 = +0, -0 + -0 = -0; quoted from memory). So their sums equal, bit for bit,
    those of adding only where absent, also from starting sums of -0.0, ±infinity and NaN and
    with θ*−θ̂ so large that its square overflows (1e200) or that it is infinite."""
    with np.errstate(over="ignore", invalid="ignore"):
        data = np.random.default_rng(n).normal(size=(n, 3))
        _, present, _ = kernels.SubjectDraws(n, data, compiled=False).draw(40)
        if present.dtype == np.uint8:  # subject 0 in every replicate: nothing is added to it
            present[:, 0] = 1
        else:
            present[:, 0] |= np.uint64(1)
        centred = np.random.default_rng(n + 1).normal(size=40)
        centred[[3, 9, 17, 25]] = [1e200, -0.0, np.inf, -1e300]
        finite = np.arange(40) % 7 != 0
        start = np.random.default_rng(3).normal(size=(3, n))
        start[:, 0], start[:, 1], start[:, 2], start[:, 3] = -0.0, np.inf, -np.inf, np.nan
        start[:, 4] = 0.0
        expected, sums = start.copy(), start.copy()
        _sums_where_absent(present, n, finite, centred, expected)
        add = compiled.omission_sums_bytes if present.dtype == np.uint8 else compiled.omission_sums_bits
        add(present, 0, n, finite, centred, sums)
    assert expected.tobytes() == sums.tobytes()  # bytes: -0.0 and NaN compared as they are
    assert np.signbit(sums[:, 0]).all()  # subject 0's -0.0 starts stayed -0.0

def test_the_default_choice_of_loops(monkeypatch: pytest.MonkeyPatch) -> None:
    """Plain numpy until the process has drawn COMPILED_FROM_DRAWS in it, compiled loops from
    then on and once this process has loaded them (this test module has)."""
    assert kernels.compiled_loaded()
    assert kernels.SubjectDraws(1, np.zeros((3, 1))).compiled
    assert kernels.use_compiled(1)
    assert not kernels.SubjectDraws(1, np.zeros((3, 1)), compiled=False).compiled
    monkeypatch.setattr(kernels, "compiled_loaded", lambda: False)
    monkeypatch.setattr(kernels, "_plain_draws", 0)
    limit = kernels.COMPILED_FROM_DRAWS
    assert not kernels.use_compiled(limit // 2)
    assert not kernels.use_compiled(limit // 2 - 1)
    assert kernels.use_compiled(1)  # the total reaches the limit here
    monkeypatch.setattr(kernels, "_plain_draws", 0)
    assert kernels.use_compiled(limit)


def test_a_command_line_analysis_does_not_load_the_compiled_loops(tmp_path: Path) -> None:
    """A fresh `bioparity analyze` of a short run (well under COMPILED_FROM_DRAWS draws) imports
    neither numba nor the service's web and database layers, nor scipy.stats: what it does not
    need, it does not wait for (the start-up target of benchmarks/startup.py). Its record is the
    one the compiled loops give in this process."""
    from service.intake.reading import read_request
    from service.records.building import build_record

    rng = np.random.default_rng(8)
    records = [{"subject": f"S{i:02d}", "period": p, "treatment": t,
                "value": float(v + rng.normal(0.0, 1.0))}
               for i in range(20)
               for p, (t, v) in enumerate((("B", 20.0), ("R", 30.0), ("T", 31.0)), 1)]
    request = {"design": {"test": "T", "reference": "R", "baseline": "B"}, "records": records,
               "settings": {"replicates": 800, "seed": 4}}
    path = tmp_path / "request.json"
    path.write_text(json.dumps(request), encoding="utf-8")
    script = (
        "import sys\n"
        "from service.cli.main import main\n"
        f"sys.argv = ['bioparity', 'analyze', {str(path)!r}, '--out', {str(tmp_path / 'out')!r}]\n"
        "try:\n"
        "    main()\n"
        "except SystemExit as exc:\n"
        "    assert not exc.code, exc.code\n"
        "print(sorted(m for m in ('numba', 'llvmlite', 'service.stats.compiled', 'fastapi',\n"
        "             'starlette', 'sqlalchemy', 'scipy.stats', 'uvicorn') if m in sys.modules))\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          cwd=ROOT, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == "[]"
    written = json.loads((tmp_path / "out" / "record.json").read_text(encoding="utf-8"))
    here = build_record(read_request("json", path.read_bytes(), {}))  # compiled loops here
    assert json.dumps(written, sort_keys=True) == json.dumps(here, sort_keys=True)
