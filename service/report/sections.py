"""Report views for average bioequivalence, summary-only metrics and concentration–time profiles."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from service.report import plots
from service.report.formatting import (
    DASH,
    VERDICT_WORDS,
    decimals_for,
    display,
    figure,
    fmt,
    level_percent,
    mapping,
    ordered_treatments,
    p_value,
    percent_interval,
    text,
    words,
)


def abe_sentence(abe: Mapping[str, Any]) -> str:
    ratio = mapping(abe.get("ratio_percent"))
    acceptance = mapping(abe.get("acceptance"))
    limits = mapping(acceptance.get("limits"))
    verdict = text(acceptance.get("verdict"))
    level = level_percent(abe.get("confidence_level"))
    limit_text = f"[{fmt(limits.get('lower'), 2)} %, {fmt(limits.get('upper'), 2)} %]"
    lower, upper = acceptance.get("lower", ratio.get("lower")), acceptance.get(
        "upper", ratio.get("upper"))
    head = f"Ratio of geometric means = {fmt(ratio.get('estimate'), 2)} %; "
    if lower is None or upper is None:
        body = f"no {level} confidence interval could be computed"
    else:
        bounds = percent_interval(lower, upper)
        inside = "lies wholly inside" if verdict == "within_limits" else (
            "does not lie wholly inside")
        body = f"the {level} confidence interval {bounds} {inside} the limits {limit_text}"
    return f"{head}{body}: {VERDICT_WORDS.get(verdict, verdict or 'undetermined')}."


def abe_view(abe: Mapping[str, Any]) -> dict[str, Any]:
    log_difference = mapping(abe.get("log_difference"))
    ratio = mapping(abe.get("ratio_percent"))
    tost = mapping(abe.get("tost"))
    sequence = mapping(abe.get("sequence_effect"))
    acceptance = mapping(abe.get("acceptance"))
    limits = mapping(acceptance.get("limits"))
    sequence_df = ""
    if sequence.get("df_numerator") is not None and sequence.get("df_denominator") is not None:
        sequence_df = (f" on {fmt(sequence['df_numerator'])} and "
                       f"{fmt(sequence['df_denominator'])} df")
    rows = [
        ("Ratio of geometric means, test / reference", f"{fmt(ratio.get('estimate'), 2)} %"),
        (f"{level_percent(abe.get('confidence_level'))} confidence interval",
         percent_interval(ratio.get("lower"), ratio.get("upper"))),
        ("Interval as compared with the limits (rounded)",
         percent_interval(acceptance.get("lower"), acceptance.get("upper"))),
        ("Acceptance limits", percent_interval(limits.get("lower"), limits.get("upper"))),
        ("Difference of log means (estimate, standard error)",
         f"{fmt(log_difference.get('estimate'), 4)}, "
         f"{fmt(log_difference.get('standard_error'), 4)}"),
        ("Residual degrees of freedom", fmt(log_difference.get("df"))),
        ("Within-subject coefficient of variation",
         f"{fmt(abe.get('within_subject_cv_percent'), 1)} %"),
        ("One-sided test p-values (lower limit, upper limit)",
         f"{p_value(tost.get('p_lower'))}, {p_value(tost.get('p_upper'))}"),
        ("Sequence effect (F, p)",
         f"{fmt(sequence.get('f'), 3)}{sequence_df}, p = {p_value(sequence.get('p'))}"),
    ]
    if abe.get("subjects") is not None:
        rows.append(("Subjects, observations in the model",
                     f"{fmt(abe.get('subjects'))}, {fmt(abe.get('observations'))}"))
    return {
        "sentence": abe_sentence(abe),
        "verdict": text(acceptance.get("verdict")) or "undetermined",
        "rows": rows,
        "rounding": text(acceptance.get("rounding")),
        "reason": text(acceptance.get("reason")),
        "method": text(abe.get("method")),
    }


def summary_rows(summary: Any) -> list[dict[str, Any]]:
    """`metric.summary` per treatment, as a list of rows or a mapping treatment -> figures."""
    if isinstance(summary, Mapping):
        items = [{"treatment": k, **mapping(v)} for k, v in summary.items()]
    else:
        items = [dict(mapping(v)) for v in summary or []]
    return [{"treatment": text(i.get("treatment")), "n": i.get("n"), "median": i.get("median"),
             "min": i.get("min"), "max": i.get("max")} for i in items]


def profiles_view(profiles: Sequence[Any], design: Mapping[str, Any], unit: str) -> dict[
        str, Any]:
    rows = [p for p in profiles if isinstance(p, Mapping)]
    treatments = ordered_treatments(design, [text(p.get("treatment")) for p in rows])
    figures = []
    for k, treatment in enumerate(treatments):
        curves = []
        for p in rows:
            if text(p.get("treatment")) != treatment:
                continue
            points = [q for q in p.get("points") or [] if isinstance(q, Mapping)
                      and q.get("time") is not None]
            # the terminal-phase (λz) points are the ones whose times the record lists
            fit_times = {float(t) for t in p.get("lambda_z_times") or [] if t is not None}
            curves.append(plots.Curve(
                label=f"subject {text(p.get('subject'))}, period {text(p.get('period'))}",
                times=tuple(float(q["time"]) for q in points),
                concentrations=tuple(None if q.get("concentration") is None
                                     else float(q["concentration"]) for q in points),
                fitted=tuple(float(q["time"]) in fit_times and bool(q.get("used", True))
                             for q in points)))
        figures.append({
            "treatment": treatment,
            "linear": figure(plots.profiles_svg, f"p{k}-lin", curves, False,
                              f"Profiles of {treatment}, linear scale", unit),
            "log": figure(plots.profiles_svg, f"p{k}-log", curves, True,
                           f"Profiles of {treatment}, log scale", unit),
        })
    table = [{
        "subject": text(p.get("subject")), "period": text(p.get("period")),
        "treatment": text(p.get("treatment")),
        "values": [p.get(k) for k in ("cmax", "tmax", "auc_0_t", "auc_0_inf", "lambda_z",
                                      "half_life", "r2_adjusted", "auc_extrapolated_percent")],
        "lambda_z_times": ", ".join(display(t).removesuffix(".0")
                                    for t in p.get("lambda_z_times") or []) or DASH,
        "flags": ", ".join(words(text(f)) for f in p.get("flags") or []) or DASH,
    } for p in rows]
    decimals = [decimals_for([row["values"][j] for row in table]) for j in range(8)]
    return {"table": table, "figures": figures, "decimals": decimals}
