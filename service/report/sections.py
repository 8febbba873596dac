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

SCALING_WORDS = {
    "widened_limits": "limits widened to the reference's variability (EMA 2010 §4.1.10)",
    "reference_scaled": "reference-scaled average bioequivalence (FDA 2011 draft guidance on "
                        "progesterone, Howe's upper bound)",
    "none": "no scaling",
}


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
    approach = text(acceptance.get("approach"))
    if approach:
        # The verdict follows the scaled approach the protocol chose; its reason says how.
        how = SCALING_WORDS.get(approach, approach)
        return (f"{head}judged by {how}: {text(acceptance.get('reason'))}: "
                f"{VERDICT_WORDS.get(verdict, verdict or 'undetermined')}.")
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
    if abe.get("design") is not None:
        rows.insert(0, ("Design read from the table",
                        text(abe.get("design_description")) or text(abe.get("design"))))
    variability = mapping(abe.get("reference_variability"))
    if variability:
        rows.append(("Within-subject SD of the reference, s_wR (CV, df)",
                     f"{fmt(variability.get('s_wr'), 4)} ({fmt(variability.get('cv_wr_percent'), 1)}"
                     f" %, {fmt(variability.get('df'))})"))
        rows.append(("Within-subject SD of the test, s_wT (CV)",
                     f"{fmt(variability.get('s_wt'), 4)} ({fmt(variability.get('cv_wt_percent'), 1)}"
                     " %)"))
    left_out = [(text(s.get("subject")), text(s.get("reason")))
                for s in abe.get("subjects_left_out") or [] if isinstance(s, Mapping)]
    return {
        "scaling": scaling_view(mapping(abe.get("scaling"))),
        "left_out": left_out,
        "sentence": abe_sentence(abe),
        "verdict": text(acceptance.get("verdict")) or "undetermined",
        "rows": rows,
        "rounding": text(acceptance.get("rounding")),
        "reason": text(acceptance.get("reason")),
        "method": text(abe.get("method")),
    }


def scaling_view(scaling: Mapping[str, Any]) -> dict[str, Any] | None:
    """The scaled-limits block: which approach, whether it applied and why, what was compared."""
    if not scaling:
        return None
    limits = mapping(scaling.get("limits_percent"))
    criterion = mapping(scaling.get("criterion"))
    rows = [
        ("Approach fixed by the protocol", SCALING_WORDS.get(text(scaling.get("approach")),
                                                             text(scaling.get("approach")))),
        ("Applied", "yes" if scaling.get("applied") else "no"),
        ("Limits used (percent)", percent_interval(limits.get("lower"), limits.get("upper"))),
        ("Point estimate (percent), within 80.00–125.00 %",
         f"{fmt(scaling.get('point_estimate_percent'), 2)}, "
         + _yes_no(scaling.get("point_estimate_within"))),
    ]
    if criterion:
        rows.append(("Criterion (μT − μR)² − θ·σ²_wR: estimate, 95 % upper bound",
                     f"{fmt(criterion.get('estimate'), 6)}, {fmt(criterion.get('upper_bound'), 6)}"))
        rows.append(("θ, s_wR, df of s²_wR", f"{fmt(criterion.get('theta'), 4)}, "
                     f"{fmt(criterion.get('s_wr'), 4)}, {fmt(criterion.get('df'))}"))
    return {
        "rows": rows,
        "verdict": text(scaling.get("verdict")) or "undetermined",
        "reason": text(scaling.get("reason")),
        "method": text(scaling.get("method")),
        "caution": text(scaling.get("caution")),
    }


def _yes_no(flag: Any) -> str:
    return "yes" if flag is True else "no" if flag is False else DASH


def shift_view(comparison: Mapping[str, Any]) -> dict[str, Any] | None:
    """The distribution-free Tmax comparison (Hodges–Lehmann shift of test minus reference)."""
    if not comparison:
        return None
    limits = mapping(comparison.get("limits"))
    rows = [
        ("Shift of test minus reference (Hodges–Lehmann)", fmt(comparison.get("shift"), 3)),
        (f"{level_percent(comparison.get('confidence_level'))} distribution-free interval",
         f"[{fmt(comparison.get('lower'), 3)}, {fmt(comparison.get('upper'), 3)}]"),
        ("Subjects with both treatments", fmt(comparison.get("pairs"))),
        ("Interval from", words(text(comparison.get("interval_method")))),
    ]
    if limits:
        rows.append(("Limits set by the protocol",
                     f"[{fmt(limits.get('lower'), 3)}, {fmt(limits.get('upper'), 3)}]"))
    return {
        "rows": rows,
        "verdict": text(comparison.get("verdict")),
        "description": text(comparison.get("description")),
        "reason": text(comparison.get("reason")),
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
