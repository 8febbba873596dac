"""`bioparity analyze TABLE.csv`: the CSV dialects of the HTTP upload, from the command line."""

from __future__ import annotations

import csv
import io
import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[2]

OPTIONS = ["--title", "Line change check", "--test", "T", "--reference", "R", "--baseline", "B",
           "--replicates", "400", "--seed", "77", "--confidence-level", "0.9", "--interval", "bca",
           "--limit-lower", "-0.2", "--limit-upper", "0.2", "--stratify-by-sequence", "false",
           "--incomplete-subjects", "exclude"]


def _rows(n: int = 10, seed: int = 3) -> list[dict[str, object]]:
    """Seeded, constructed three-arm rows (test data only)."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        base = rng.normal(40.0, 4.0)
        for period, (treatment, shift) in enumerate((("B", 0.0), ("R", 8.0), ("T", 8.2)), 1):
            rows.append({"subject": f"P{i:02d}", "period": period, "sequence": "BRT",
                         "treatment": treatment, "value": round(base + shift + rng.normal(), 4)})
    return rows


def _csv(rows: list[dict[str, object]], delimiter: str, decimal_comma: bool) -> str:
    out = io.StringIO()
    writer = csv.writer(out, delimiter=delimiter, lineterminator="\n")
    writer.writerow(["subject", "period", "sequence", "treatment", "value"])
    for r in rows:
        value = str(r["value"]).replace(".", ",") if decimal_comma else str(r["value"])
        writer.writerow([r["subject"], r["period"], r["sequence"], r["treatment"], value])
    return out.getvalue()


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    """The installed console script when it is on PATH beside this Python, else `-m service`."""
    script = Path(sys.executable).with_name("bioparity")
    command = [str(script)] if script.exists() else [sys.executable, "-m", "service"]
    return subprocess.run([*command, *args], capture_output=True, text=True, cwd=REPO, timeout=300)


@pytest.mark.parametrize(("delimiter", "decimal_comma"), [(",", False), (";", True), ("\t", True)])
def test_the_same_study_as_json_and_as_csv_gives_the_same_inputs_hash(
    tmp_path: Path, delimiter: str, decimal_comma: bool
) -> None:
    """DESIGN.md §HTTP API: a CSV upload normalizes to exactly the inputs of the equivalent JSON
    request; the command line keeps that promise for each dialect the service reads (comma;
    semicolon and tab with decimal comma — common practice of spreadsheet exports)."""
    rows = _rows()
    table = tmp_path / "table.csv"
    table.write_text(_csv(rows, delimiter, decimal_comma), encoding="utf-8")
    request = {
        "study": {"title": "Line change check"},
        "design": {"test": "T", "reference": "R", "baseline": "B"},
        "records": rows,
        "settings": {"replicates": 400, "seed": 77, "confidence_level": 0.9, "interval": "bca",
                     "limits": {"lower": -0.2, "upper": 0.2}, "stratify_by_sequence": False,
                     "incomplete_subjects": "exclude"},
    }
    as_json = tmp_path / "request.json"
    as_json.write_text(json.dumps(request), encoding="utf-8")
    done_csv = _cli("analyze", str(table), "--out", str(tmp_path / "csv"), *OPTIONS)
    assert done_csv.returncode == 0, done_csv.stderr
    done_json = _cli("analyze", str(as_json), "--out", str(tmp_path / "json"))
    assert done_json.returncode == 0, done_json.stderr
    from_csv = json.loads((tmp_path / "csv" / "record.json").read_text(encoding="utf-8"))
    from_json = json.loads((tmp_path / "json" / "record.json").read_text(encoding="utf-8"))
    assert from_csv["inputs_sha256"] == from_json["inputs_sha256"]
    assert from_csv["result"] == from_json["result"]


def test_a_table_without_a_json_name_is_read_by_its_content(tmp_path: Path) -> None:
    """A LIMS export may have any name; a body that does not open with { is read as CSV
    (the same rule for standard input)."""
    table = tmp_path / "export.dat"
    table.write_text(_csv(_rows(), ",", False), encoding="utf-8")
    done = _cli("analyze", str(table), "--out", str(tmp_path / "o"), *OPTIONS)
    assert done.returncode == 0, done.stderr
    shutil.rmtree(tmp_path / "o")
    done = subprocess.run([sys.executable, "-m", "service", "analyze", "-", "--out",
                           str(tmp_path / "o"), *OPTIONS], input=table.read_text(encoding="utf-8"),
                          capture_output=True, text=True, cwd=REPO, timeout=300)
    assert done.returncode == 0, done.stderr


def test_invalid_csv_exits_2_naming_line_and_column_and_writes_nothing(tmp_path: Path) -> None:
    """DESIGN.md §Command line: exit 2, every problem with its location, nothing written; for a CSV
    table the location is the physical line (header = line 1) and the column."""
    text = _csv(_rows(), ",", False).splitlines()
    text[3] = text[3].rsplit(",", 1)[0] + ",high"          # line 4: a value that is no number
    cells = text[6].split(",")
    cells[1] = "two"                                         # line 7: a period that is no number
    text[6] = ",".join(cells)
    table = tmp_path / "bad.csv"
    table.write_text("\n".join(text) + "\n", encoding="utf-8")
    out = tmp_path / "out"
    done = _cli("analyze", str(table), "--out", str(out), *OPTIONS[:-4], "--replicates", "lots",
                "--incomplete-subjects", "exclude")
    assert done.returncode == 2, done.stdout
    assert "Traceback" not in done.stderr
    assert "line 4" in done.stderr and "value" in done.stderr, done.stderr
    assert "line 7" in done.stderr and "period" in done.stderr, done.stderr
    assert "--replicates: must be a whole number" in done.stderr, done.stderr
    assert not out.exists()


def test_settings_options_are_refused_for_a_json_request(tmp_path: Path) -> None:
    """A JSON request carries its settings inside (as over HTTP, where query parameters go with
    CSV uploads only): an option beside it is an error, not silently ignored."""
    request = tmp_path / "r.json"
    request.write_text(json.dumps({"design": {"test": "T", "reference": "R"},
                                   "records": _rows()}), encoding="utf-8")
    done = _cli("analyze", str(request), "--out", str(tmp_path / "o"), "--seed", "5")
    assert done.returncode == 2 and "--seed" in done.stderr and "Traceback" not in done.stderr
    assert not (tmp_path / "o").exists()


def test_bioparity_help_lists_every_command_and_the_csv_options() -> None:
    """`bioparity --help` (argparse) names each subcommand of `python -m service`; `analyze --help`
    names each CSV option, spelled like the HTTP query parameters with dashes."""
    done = _cli("--help")
    assert done.returncode == 0
    for command in ("analyze", "serve", "keys", "archive"):
        assert command in done.stdout
    done = _cli("analyze", "--help")
    assert done.returncode == 0
    for option in ("--title", "--analyte", "--unit", "--test", "--reference", "--baseline",
                   "--replicates", "--seed", "--confidence-level", "--interval", "--limit-lower",
                   "--limit-upper", "--stratify-by-sequence", "--incomplete-subjects"):
        assert option in done.stdout, option
    shim = subprocess.run([sys.executable, "-m", "service", "--help"], capture_output=True,
                          text=True, cwd=REPO, timeout=60)
    assert shim.returncode == 0 and "analyze" in shim.stdout
