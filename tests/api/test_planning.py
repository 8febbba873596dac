"""Study planning over HTTP and on the command line (issue on planning, items 4 and 6)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

from service.stats.planning import plan, plan_to_json
from tests.api.conftest import ApiClient, json_request

REPO = Path(__file__).resolve().parents[2]


def test_planning_answers_the_classical_two_by_two_size(client: ApiClient) -> None:
    """2×2, CV 30 %, ratio 0.95, α 0.05, limits 0.80–1.25, power 80 %: 40 subjects (published
    sample-size tables, from memory); the answer equals the engine's own and carries cautions."""
    response = client.post("/v1/planning", json={"design": "two_by_two", "cv": 0.30})
    assert response.status_code == 200, response.text
    body = response.json()
    assert body["sample_size"]["total"] == 40
    assert body == plan_to_json(plan(design="two_by_two", cv=0.30))
    assert any("statistician" in c for c in body["cautions"])


def test_bad_planning_input_is_a_problem_naming_every_field(client: ApiClient) -> None:
    """RFC 9457 problem details with every problem at once; a ratio outside the limits and an
    unreachable target are refused, never a 500."""
    response = client.post("/v1/planning", json={"design": "two_by_two", "cv": -1, "ratio": 1.3,
                                                 "extra": 1})
    assert response.status_code == 422
    assert response.headers["content-type"].startswith("application/problem+json")
    response = client.post("/v1/planning", json={"design": "two_by_two", "cv": 0.3, "ratio": 1.3})
    assert response.status_code == 422 and "ratio" in response.text
    response = client.post("/v1/planning", json={"design": "two_by_two", "cv": 3.0,
                                                 "target_power": 0.99, "ratio": 0.81})
    assert response.status_code == 422 and "target_power" in response.text


def test_planning_from_an_archived_study_uses_its_cv_and_says_so(client: ApiClient) -> None:
    """The CV (and its df) are read from the record; asked for, the one-sided upper confidence
    limit of the CV from its χ² distribution (common practice) is larger than the estimate."""
    record = client.post("/v1/analyses", json=json_request()).json()
    metric = record["result"]["metrics"][0]
    url = f"/v1/analyses/{record['id']}/planning"
    plain = client.post(url, json={"metric": metric["metric"]})
    assert plain.status_code == 200, plain.text
    used = plain.json()["from_record"]
    cv = metric["average_bioequivalence"]["within_subject_cv_percent"] / 100
    assert used["cv_used"] == cv and used["df"] == metric["average_bioequivalence"]["log_difference"]["df"]
    upper = client.post(url, json={"metric": metric["metric"], "cv_from": "upper_confidence_limit"})
    assert upper.status_code == 200 and upper.json()["from_record"]["cv_used"] > cv
    missing = client.post(url, json={"metric": "no such metric"})
    assert missing.status_code == 422


def test_plan_command_prints_the_same_answer_as_a_table() -> None:
    """`bioparity plan` prints the size the engine answers, and its cautions; bad input exits 2."""
    command = [sys.executable, "-m", "service", "plan", "--design", "two_by_two", "--cv", "0.30",
               "--ratio", "0.95", "--power", "0.8"]
    done = subprocess.run(command, capture_output=True, text=True, cwd=REPO, timeout=120)
    assert done.returncode == 0, done.stderr
    assert "sample size (total)     40" in done.stdout and "caution:" in done.stdout
    bad = subprocess.run([*command[:-2], "--power", "1.5"], capture_output=True, text=True,
                         cwd=REPO, timeout=120)
    assert bad.returncode == 2 and "Traceback" not in bad.stderr
