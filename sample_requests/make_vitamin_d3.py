"""Write the vitamin D3 softgel demo request (all numbers invented, simulated from a seed).

Scenario: a contract manufacturer moves a vitamin D3 softgel to a new encapsulation line. 24 volunteers
receive a placebo softgel, the current-line softgel and the new-line softgel in a three-period crossover
with the six Williams-style sequences (4 volunteers per sequence). The response is the 0–72 h area under
the serum 25-hydroxyvitamin-D curve, in nmol·h/L. These values are simulated, not measured.

Run: python sample_requests/make_vitamin_d3.py   (rewrites the .json and .csv files beside it)
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SEED = 20261202
LETTER = {"P": "PLACEBO", "C": "CURRENT", "N": "NEW"}
SEQUENCES = ("PCN", "CNP", "NPC", "PNC", "CPN", "NCP")


def simulate() -> dict[str, object]:
    rng = np.random.default_rng(SEED)
    records: list[dict[str, object]] = []
    # Invented model: endogenous exposure per volunteer, an increase over placebo per softgel line, and
    # within-volunteer noise; the new line is simulated 2 % below the current one in its increase.
    increase = {"PLACEBO": 0.0, "CURRENT": 950.0, "NEW": 930.0}
    period_shift = (0.0, 25.0, -15.0)
    for i in range(24):
        subject = f"V{i + 1:02d}"
        sequence = SEQUENCES[i % len(SEQUENCES)]
        endogenous = rng.normal(4300.0, 800.0)
        response = rng.normal(1.0, 0.18)  # how strongly this volunteer absorbs the dose
        for period, letter in enumerate(sequence, start=1):
            treatment = LETTER[letter]
            value = (
                endogenous
                + response * increase[treatment]
                + period_shift[period - 1]
                + rng.normal(0.0, 110.0)
            )
            records.append(
                {
                    "subject": subject,
                    "period": period,
                    "sequence": sequence,
                    "treatment": treatment,
                    "metric": "AUC_0_72",
                    "value": round(float(value), 1),
                }
            )
    return {
        "study": {
            "title": "Vitamin D3 softgel: new encapsulation line versus current line (demo)",
            "analyte": "serum 25-hydroxyvitamin D",
            "unit": "nmol·h/L",
            "description": "Invented demo data: simulated three-period crossover in 24 volunteers "
            "(placebo, current line, new line). Not a real study.",
        },
        "design": {"test": "NEW", "reference": "CURRENT", "baseline": "PLACEBO"},
        "records": records,
        "settings": {
            "replicates": 10000,
            "seed": SEED,
            "confidence_level": 0.90,
            "interval": "bca",
            "limits": {"lower": -0.20, "upper": 0.20},
            "stratify_by_sequence": False,
            "incomplete_subjects": "exclude",
        },
    }


def to_csv(records: list[dict[str, object]], delimiter: str, decimal_comma: bool) -> str:
    out = io.StringIO()
    writer = csv.writer(out, delimiter=delimiter, lineterminator="\n")
    columns = ["subject", "period", "sequence", "treatment", "metric", "value"]
    writer.writerow(columns)
    for record in records:
        row = [str(record[c]) for c in columns]
        if decimal_comma:
            row[-1] = row[-1].replace(".", ",")
        writer.writerow(row)
    return out.getvalue()


def main() -> None:
    request = simulate()
    records = request["records"]
    assert isinstance(records, list)
    (HERE / "vitamin_d3_softgel.json").write_text(
        json.dumps(request, indent=2, ensure_ascii=False) + "\n", encoding="utf-8"
    )
    (HERE / "vitamin_d3_softgel.csv").write_text(to_csv(records, ",", False), encoding="utf-8")
    (HERE / "vitamin_d3_softgel_semicolon.csv").write_text(
        to_csv(records, ";", True), encoding="utf-8"
    )


if __name__ == "__main__":
    main()
