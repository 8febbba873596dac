"""A record built by hand in the DESIGN.md shape, for report tests independent of the engine.

The numbers come from seeded numpy draws and plain formulas (sample means, leave-one-out means);
they only have to be self-consistent, not to test the statistics.
"""

from __future__ import annotations

from typing import Any

import numpy as np

HOSTILE_SUBJECT = "<script>alert(1)</script>"
HOSTILE_TITLE = "\"&<>' study"


def hand_record(n: int = 12, seed: int = 20261202, hostile: bool = False) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    treatments = ("NEW", "CURRENT", "PLACEBO")
    base = rng.normal(40.0, 6.0, size=n)
    values = np.column_stack([base + rng.normal(21.0, 3.0, n), base + rng.normal(20.0, 3.0, n),
                              base + rng.normal(0.0, 1.0, n)])
    subjects = [f"V{i + 1:02d}" for i in range(n)]
    if hostile:
        subjects[0] = HOSTILE_SUBJECT
    sequences = ["NCP" if i % 2 else "PCN" for i in range(n)]

    def theta(x: np.ndarray[Any, Any]) -> float:
        m = x.mean(0)
        return float((m[0] - m[1]) / (m[1] - m[2]))

    theta_hat = theta(values)
    loo = [theta(np.delete(values, i, axis=0)) for i in range(n)]
    jack_mean = float(np.mean(loo))
    replicates = rng.normal(theta_hat, 0.05, size=1000)
    counts, edges = np.histogram(replicates, bins=30)
    lo, hi = (float(v) for v in np.quantile(replicates, [0.05, 0.95]))
    record: dict[str, Any] = {
        "inputs_sha256": "0" * 64,
        "inputs": {
            "study": {"title": HOSTILE_TITLE if hostile else "Softgel line transfer",
                      "analyte": "25-hydroxyvitamin D", "unit": "nmol·h/L",
                      "description": "Three-period crossover, invented numbers."},
            "design": {"test": "NEW", "reference": "CURRENT", "baseline": "PLACEBO"},
            "records": [],
            "settings": {"replicates": 1000, "seed": seed, "confidence_level": 0.9,
                         "interval": "bca", "limits": {"lower": -0.2, "upper": 0.2},
                         "stratify_by_sequence": False, "incomplete_subjects": "exclude"},
        },
        "result": {
            "metrics": [{
                "metric": "AUC",
                "analysis": "full",
                "subjects": {"analysed": subjects,
                             "excluded": [{"subject": "V99", "reason": "no value for PLACEBO"}]},
                "treatment_summary": [
                    {"treatment": t, "role": role, "n": n, "mean": float(values[:, j].mean()),
                     "sd": float(values[:, j].std(ddof=1)), "min": float(values[:, j].min()),
                     "max": float(values[:, j].max())}
                    for j, (t, role) in enumerate(zip(treatments,
                                                      ("test", "reference", "baseline"),
                                                      strict=True))
                ],
                "per_subject": [
                    {"subject": s, "sequence": q,
                     "values": {t: float(values[i, j]) for j, t in enumerate(treatments)},
                     "numerator_difference": float(values[i, 0] - values[i, 1]),
                     "denominator_difference": float(values[i, 1] - values[i, 2]),
                     "jackknife_theta": loo[i]}
                    for i, (s, q) in enumerate(zip(subjects, sequences, strict=True))
                ],
                "ratio_of_mean_differences": {
                    "estimate": {"theta": theta_hat,
                                 "numerator_mean": float(values[:, 0].mean() - values[:, 1].mean()),
                                 "denominator_mean": float(values[:, 1].mean()
                                                           - values[:, 2].mean())},
                    "jackknife": {
                        "bias": (n - 1) * (jack_mean - theta_hat),
                        "standard_error": float(np.sqrt(
                            (n - 1) / n * np.sum((np.array(loo) - jack_mean) ** 2))),
                        "bias_corrected": n * theta_hat - (n - 1) * jack_mean,
                        "values": [{"subject": s, "theta": v}
                                   for s, v in zip(subjects, loo, strict=True)],
                    },
                    "bootstrap": {
                        "replicates": 1000, "seed": seed,
                        "bias": float(replicates.mean() - theta_hat),
                        "standard_error": float(replicates.std(ddof=1)),
                        "intervals": {"percentile": {"lower": lo, "upper": hi},
                                      "basic": {"lower": 2 * theta_hat - hi,
                                                "upper": 2 * theta_hat - lo},
                                      "normal": None,
                                      "bca": {"lower": lo, "upper": hi}},
                        "monte_carlo": {"standard_error_of_standard_error": 0.0012,
                                        "standard_error_of_bias": None},
                        "histogram": {"edges": [float(e) for e in edges],
                                      "counts": [int(c) for c in counts]},
                    },
                    "fieller": {"kind": "bounded", "lower": lo - 0.01, "upper": hi + 0.01},
                    "acceptance": {"limits": {"lower": -0.2, "upper": 0.2}, "interval": "bca",
                                   "confidence_level": 0.9, "lower": lo, "upper": hi,
                                   "verdict": "within_limits" if -0.2 < lo and hi < 0.2
                                   else "not_within_limits",
                                   "reason": "the interval was compared with the limits"},
                },
            }],
            "warnings": [{"code": "few_subjects", "metric": "AUC",
                          "message": f"only {n} subjects; {HOSTILE_SUBJECT if hostile else ''}"}],
            "engine": {"name": "bioparity", "version": "0.1.0", "numpy": np.__version__,
                       "scipy": "x", "python": "3.11"},
        },
    }
    return record
