"""Write the QM-7 demo requests: an invented full-replicate study of a highly variable compound.

Scenario (invented): a modified-release capsule of the fictitious "compound QM-7", whose absorption
varies a lot from dose to dose. A new capsule (test) against the marketed capsule (reference) in 24
healthy subjects, a four-period full replicate (sequences TRTR and RTRT), two weeks washout. AUC to the
last sample (ng·h/mL) and Cmax (ng/mL) are simulated as log-normal values with a subject effect, a
period effect, a test/reference ratio of 0.94 and within-subject CVs of about 25 % (AUC) and 45 %
(Cmax, reference) — so Cmax is the metric the protocol names for scaled limits. Two subjects miss
their last period. Every number is simulated from the seed below; none is measured.

Two requests are written with the same table: one judging Cmax with limits widened to the
reference's variability (EMA 2010 §4.1.10), one with reference-scaled average bioequivalence (FDA
2011 draft guidance on progesterone). They belong to different jurisdictions: a real protocol fixes
one of them, and the metrics it applies to, before the study.

Run: python sample_requests/make_qm7_replicate.py   (rewrites qm7_replicate_*.json beside it)
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SEED = 7707
TEST, REFERENCE = "QM7-NEW", "QM7-MARKETED"
SUBJECTS = 24
# within-subject SD on the log scale: sqrt(ln(1 + CV²))
S_W = {
    "AUC_0_t": {TEST: math.sqrt(math.log1p(0.25**2)), REFERENCE: math.sqrt(math.log1p(0.25**2))},
    "Cmax": {TEST: math.sqrt(math.log1p(0.40**2)), REFERENCE: math.sqrt(math.log1p(0.45**2))},
}
LEVEL = {"AUC_0_t": 2400.0, "Cmax": 180.0}


def simulate() -> list[dict[str, object]]:
    rng = np.random.default_rng(SEED)
    records: list[dict[str, object]] = []
    period_effect = (0.0, 0.03, -0.02, 0.01)
    for i in range(SUBJECTS):
        subject = f"Q{i + 1:02d}"
        sequence = "TRTR" if i % 2 == 0 else "RTRT"
        order = (TEST, REFERENCE) * 2 if sequence == "TRTR" else (REFERENCE, TEST) * 2
        periods = 3 if i in (5, 22) else 4  # two subjects leave before their last period
        for metric, level in LEVEL.items():
            subject_effect = rng.normal(0.0, 0.30)
            for period in range(1, periods + 1):
                treatment = order[period - 1]
                log_value = (math.log(level) + subject_effect + period_effect[period - 1]
                             + (math.log(0.94) if treatment == TEST else 0.0)
                             + rng.normal(0.0, S_W[metric][treatment]))
                records.append({"subject": subject, "period": period, "sequence": sequence,
                                "treatment": treatment, "metric": metric,
                                "value": round(math.exp(log_value), 2)})
    return records


def request(approach: str) -> dict[str, object]:
    label = {"widened_limits": "limits widened to the reference's variability",
             "reference_scaled": "reference-scaled average bioequivalence"}[approach]
    return {
        "study": {
            "title": f"QM-7 capsule, full replicate: {label} for Cmax (demo)",
            "analyte": "compound QM-7 in plasma",
            "unit": "ng·h/mL (AUC), ng/mL (Cmax)",
            "description": "Invented demo data: a simulated four-period full replicate (TRTR/RTRT) "
                           "in 24 subjects of a fictitious highly variable compound. Not a real "
                           "study.",
        },
        "design": {"test": TEST, "reference": REFERENCE},
        "records": simulate(),
        "settings": {"replicates": 10000, "seed": 20261203,
                     "scaling": {"approach": approach, "metrics": ["Cmax"]}},
    }


def main() -> None:
    for approach, name in (("widened_limits", "qm7_replicate_widened.json"),
                           ("reference_scaled", "qm7_replicate_reference_scaled.json")):
        text = json.dumps(request(approach), indent=1, ensure_ascii=False) + "\n"
        (HERE / name).write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
