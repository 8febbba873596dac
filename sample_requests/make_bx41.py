"""Write the BX-41 demo request: an invented 2×2 crossover with concentration–time profiles.

Scenario (invented): an immediate-release tablet of the fictitious "compound BX-41"; a new tablet (test)
against the marketed tablet (reference) in 28 healthy subjects, sequences TR and RT, one week washout.
Plasma concentrations (ng/mL) are simulated from a one-compartment oral model
C(t) = A·(exp(−ke·t) − exp(−ka·t)) with between-subject variation, a period effect, a test/reference
bioavailability ratio and proportional measurement noise; values below 1 ng/mL are reported as below the
lower limit of quantification. Every number is simulated from the seed below; none is measured.

Run: python sample_requests/make_bx41.py   (rewrites bx41_profiles.json beside it)
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SEED = 4141
TIMES = (0.0, 0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0, 36.0)
LLOQ = 1.0
TEST, REFERENCE = "BX41-NEW", "BX41-MARKETED"


def simulate() -> dict[str, object]:
    rng = np.random.default_rng(SEED)
    profiles: list[dict[str, object]] = []
    relative_bioavailability = {TEST: 0.96, REFERENCE: 1.0}
    for i in range(28):
        subject = f"S{i + 1:02d}"
        sequence = "TR" if i % 2 == 0 else "RT"
        order = (TEST, REFERENCE) if sequence == "TR" else (REFERENCE, TEST)
        ka_subject = 1.4 * np.exp(rng.normal(0.0, 0.25))
        ke_subject = 0.16 * np.exp(rng.normal(0.0, 0.20))
        scale_subject = 120.0 * np.exp(rng.normal(0.0, 0.25))
        for period, treatment in enumerate(order, start=1):
            # within-subject, between-period variation of absorption and exposure
            ka = ka_subject * np.exp(rng.normal(0.0, 0.15))
            ke = ke_subject * np.exp(rng.normal(0.0, 0.05))
            a = (
                scale_subject
                * relative_bioavailability[treatment]
                * (1.03 if period == 2 else 1.0)
                * np.exp(rng.normal(0.0, 0.10))
            )
            for t in TIMES:
                clean = a * (np.exp(-ke * t) - np.exp(-ka * t))
                measured = clean * np.exp(rng.normal(0.0, 0.07))
                below = bool(measured < LLOQ)
                profiles.append(
                    {
                        "subject": subject,
                        "period": period,
                        "sequence": sequence,
                        "treatment": treatment,
                        "time": t,
                        "concentration": None if below else round(float(measured), 3),
                        "below_lloq": below,
                    }
                )
    return {
        "study": {
            "title": "Compound BX-41 immediate-release tablet: new versus marketed (demo)",
            "analyte": "BX-41 in plasma",
            "unit": "ng/mL",
            "description": "Invented demo data: simulated 2×2 crossover in 28 subjects from a "
            "one-compartment oral model with noise. Not a real study or a real compound.",
        },
        "design": {"test": TEST, "reference": REFERENCE},
        "profiles": profiles,
        "settings": {
            "replicates": 10000,
            "seed": SEED,
            "profiles": {"auc_method": "linear_up_log_down", "lloq": LLOQ},
        },
    }


def main() -> None:
    (HERE / "bx41_profiles.json").write_text(
        json.dumps(simulate(), indent=1, ensure_ascii=False) + "\n", encoding="utf-8"
    )


if __name__ == "__main__":
    main()
