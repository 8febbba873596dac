"""The command line: `python -m service analyze REQUEST.json --out DIR` (DESIGN.md §Command line)."""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import rfc8785

REPO = Path(__file__).resolve().parents[2]


def _request(n: int = 12, seed: int = 5) -> dict[str, object]:
    """A seeded, constructed three-arm request (test data only, not a demo)."""
    rng = np.random.default_rng(seed)
    records = []
    for i in range(n):
        base = rng.normal(50.0, 5.0)
        for period, (treatment, shift) in enumerate((("B", 0.0), ("R", 10.0), ("T", 10.5)), 1):
            records.append(
                {
                    "subject": f"S{i:02d}",
                    "period": period,
                    "treatment": treatment,
                    "value": float(base + shift + rng.normal(0.0, 1.0)),
                }
            )
    return {
        "design": {"test": "T", "reference": "R", "baseline": "B"},
        "records": records,
        "settings": {"replicates": 500, "seed": 11},
    }


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "service", *args],
        capture_output=True,
        text=True,
        cwd=REPO,
        timeout=300,
    )


def test_analyze_writes_a_record_whose_hash_any_client_can_recompute(tmp_path: Path) -> None:
    """DESIGN.md §Record: inputs_sha256 is the hex SHA-256 (FIPS 180-4, hashlib) of the RFC 8785
    canonical JSON (the rfc8785 package) of `inputs`; CLI records carry no id/created_at; θ̂ equals
    the plug-in formula of DESIGN.md computed here with numpy."""
    request = tmp_path / "request.json"
    request.write_text(json.dumps(_request()), encoding="utf-8")
    out = tmp_path / "out"
    done = _run("analyze", str(request), "--out", str(out))
    assert done.returncode == 0, done.stderr
    record = json.loads((out / "record.json").read_text(encoding="utf-8"))
    assert "id" not in record and "created_at" not in record
    assert record["inputs_sha256"] == hashlib.sha256(rfc8785.dumps(record["inputs"])).hexdigest()
    values = {t: [] for t in "TRB"}  # type: dict[str, list[float]]
    for r in _request()["records"]:  # type: ignore[attr-defined]
        values[r["treatment"]].append(r["value"])
    m = {t: float(np.mean(v)) for t, v in values.items()}
    theta = (m["T"] - m["R"]) / (m["R"] - m["B"])
    estimate = record["result"]["metrics"][0]["ratio_of_mean_differences"]["estimate"]["theta"]
    assert abs(estimate - theta) < 1e-12
    assert (out / "report.html").read_bytes().startswith(b"<!DOCTYPE html>")


def test_inputs_hash_of_values_whose_canonical_form_differs_from_their_json(tmp_path: Path) -> None:
    """The same recomputation (the rfc8785 package, hashlib) where the values are ints, integral
    floats and numbers below 1e-4, which RFC 8785 section 3.2.2.3 writes otherwise than Python's
    json (``7`` for 7.0, ``0.00003`` for 3e-05): the command reads a clean table through the
    plain lane and writes the records' canonical text from orjson's, rows rewritten where needed."""
    body = _request()
    rows = body["records"]  # type: ignore[index]
    rows[0]["value"] = 61  # type: ignore[index]
    rows[1]["value"] = 62.0  # type: ignore[index]
    rows[2]["value"] = 3e-05  # type: ignore[index]
    rows[3]["value"] = 1e16  # type: ignore[index]
    request = tmp_path / "request.json"
    request.write_text(json.dumps(body), encoding="utf-8")
    out = tmp_path / "out"
    done = _run("analyze", str(request), "--out", str(out))
    assert done.returncode == 0, done.stderr
    record = json.loads((out / "record.json").read_text(encoding="utf-8"))
    values = [r["value"] for r in record["inputs"]["records"]]
    assert {61.0, 62.0, 3e-05, 1e16} <= set(values)
    assert record["inputs_sha256"] == hashlib.sha256(rfc8785.dumps(record["inputs"])).hexdigest()


def test_analyze_is_reproducible_to_the_last_byte(tmp_path: Path) -> None:
    """Reproducibility (DESIGN.md: the seed is part of the inputs): two runs give identical files."""
    request = tmp_path / "request.json"
    request.write_text(json.dumps(_request()), encoding="utf-8")
    assert _run("analyze", str(request), "--out", str(tmp_path / "a")).returncode == 0
    assert _run("analyze", str(request), "--out", str(tmp_path / "b")).returncode == 0
    for name in ("record.json", "report.html"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()


def test_invalid_request_exits_2_lists_every_problem_and_writes_nothing(tmp_path: Path) -> None:
    """DESIGN.md §Command line: exit 2, every problem on stderr with its location, no traceback,
    nothing written."""
    bad = _request()
    records = bad["records"]
    assert isinstance(records, list)
    records[0]["value"] = "high"
    records[4]["treatment"] = "X"
    bad["settings"] = {"replicates": 5, "interval": "fancy"}
    request = tmp_path / "bad.json"
    request.write_text(json.dumps(bad), encoding="utf-8")
    out = tmp_path / "out"
    done = _run("analyze", str(request), "--out", str(out))
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    for location in ("records[0].value", "records[4].treatment", "settings.replicates",
                     "settings.interval"):
        assert location in done.stderr, done.stderr
    assert not out.exists()


def test_malformed_json_and_nan_are_refused(tmp_path: Path) -> None:
    """Python's json module accepts NaN (documented in the json module docs); the contract refuses it."""
    request = tmp_path / "nan.json"
    request.write_text(json.dumps(_request()).replace("500", "NaN", 1), encoding="utf-8")
    done = _run("analyze", str(request), "--out", str(tmp_path / "o1"))
    assert done.returncode == 2 and "NaN" in done.stderr and "Traceback" not in done.stderr
    request.write_text('{"design": {', encoding="utf-8")
    done = _run("analyze", str(request), "--out", str(tmp_path / "o2"))
    assert done.returncode == 2 and "line 1" in done.stderr and "Traceback" not in done.stderr
    done = _run("analyze", str(tmp_path / "missing.json"), "--out", str(tmp_path / "o3"))
    assert done.returncode == 2 and "Traceback" not in done.stderr


def test_demo_request_analyses(tmp_path: Path) -> None:
    """The shipped demo (invented data) analyses end to end; θ̂ matches the DESIGN.md formula on the
    demo's own numbers computed here with numpy."""
    path = REPO / "sample_requests" / "vitamin_d3_softgel.json"
    done = _run("analyze", str(path), "--out", str(tmp_path))
    assert done.returncode == 0, done.stderr
    record = json.loads((tmp_path / "record.json").read_text(encoding="utf-8"))
    demo = json.loads(path.read_text(encoding="utf-8"))
    m = {
        t: float(np.mean([r["value"] for r in demo["records"] if r["treatment"] == t]))
        for t in ("NEW", "CURRENT", "PLACEBO")
    }
    metric = record["result"]["metrics"][0]
    theta = metric["ratio_of_mean_differences"]["estimate"]["theta"]
    assert abs(theta - (m["NEW"] - m["CURRENT"]) / (m["CURRENT"] - m["PLACEBO"])) < 1e-12
    assert metric["ratio_of_mean_differences"]["acceptance"]["verdict"] in {
        "within_limits", "not_within_limits"}
