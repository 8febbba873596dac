"""Turn a record into the plain values the report template prints (sentences, rows, figures)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from service.report import plots
from service.report.formatting import (
    DASH,
    VERDICT_WORDS,
    decimals_for,
    display,
    figure,
    fmt,
    interval_text,
    level_percent,
    mapping,
    ordered_treatments,
    sig,
    signed,
    text,
    words,
)
from service.report.sections import abe_view, profiles_view, shift_view, summary_rows

INTERVAL_NAMES = {
    "percentile": "Percentile",
    "basic": "Basic (reflected percentile)",
    "normal": "Normal approximation",
    "bca": "BCa (bias-corrected and accelerated)",
}
SHORT_INTERVAL_NAMES = {"percentile": "percentile", "basic": "basic", "normal": "normal",
                        "bca": "BCa"}
BOOTSTRAP_KNOWN = {"replicates", "seed", "bias", "standard_error", "intervals", "monte_carlo",
                   "histogram"}
SETTINGS_ORDER = ("replicates", "seed", "confidence_level", "interval", "limits",
                  "stratify_by_sequence", "incomplete_subjects", "average_bioequivalence",
                  "profiles")


def _require(record: Any) -> tuple[Mapping[str, Any], Mapping[str, Any]]:
    if not isinstance(record, Mapping):
        raise ValueError("record: expected a JSON object")
    for key in ("inputs", "result"):
        if not isinstance(record.get(key), Mapping):
            raise ValueError(f"record.{key}: missing or not a JSON object")
    if not isinstance(record["result"].get("metrics"), list):
        raise ValueError("record.result.metrics: missing or not a list")
    if not isinstance(record.get("inputs_sha256"), str):
        raise ValueError("record.inputs_sha256: missing or not a string")
    return record["inputs"], record["result"]


def settings_rows(settings: Mapping[str, Any], prefix: str = "") -> list[tuple[str, str]]:
    keys = [k for k in SETTINGS_ORDER if k in settings]
    keys += sorted(k for k in settings if k not in SETTINGS_ORDER)
    rows: list[tuple[str, str]] = []
    for key in keys:
        label = f"{prefix}{words(key)}"
        value = settings[key]
        if isinstance(value, Mapping):
            rows += settings_rows(value, prefix=f"{label} \u203a ")
        else:
            rows.append((label, display(value)))
    return rows


def fieller_text(fieller: Mapping[str, Any]) -> tuple[str, str]:
    kind = text(fieller.get("kind"))
    lower, upper = fieller.get("lower"), fieller.get("upper")
    if kind == "bounded":
        return interval_text(lower, upper), "a bounded interval"
    if kind == "exclusive":
        return (f"(\u2212\u221e, {fmt(lower)}] \u222a [{fmt(upper)}, +\u221e)",
                "two rays: the denominator mean is not clearly away from zero")
    if kind == "unbounded":
        return "(\u2212\u221e, +\u221e)", "the whole line: the data do not bound \u03b8"
    return "not computable", f"kind {kind!r}" if kind else "not in the record"


def ratio_sentence(theta: Any, acceptance: Mapping[str, Any]) -> str:
    limits = mapping(acceptance.get("limits"))
    method = SHORT_INTERVAL_NAMES.get(text(acceptance.get("interval")),
                                      text(acceptance.get("interval")))
    level = level_percent(acceptance.get("confidence_level"))
    verdict = text(acceptance.get("verdict"))
    limit_text = f"[{signed(limits.get('lower'))}, {signed(limits.get('upper'))}]"
    head = f"\u03b8\u0302 = {fmt(theta)}; "
    bounds = interval_text(acceptance.get("lower"), acceptance.get("upper"))
    if verdict == "within_limits":
        body = f"the {level} {method} interval {bounds} lies wholly inside the limits {limit_text}"
    elif verdict == "not_within_limits":
        body = (f"the {level} {method} interval {bounds} does not lie wholly inside the limits "
                f"{limit_text}")
    else:
        reason = text(acceptance.get("reason"))
        body = f"no {level} {method} interval could be computed" + (f" ({reason})" if reason
                                                                     else "")
    return f"{head}{body}: {VERDICT_WORDS.get(verdict, verdict or 'undetermined')}."


# Plain labels for the figures the engine adds beside the contract paths.
FIGURE_LABELS = {
    "z0": "bias-correction constant z\u2080 (BCa)",
    "acceleration": "acceleration a (BCa)",
    "finite_replicates": "replicates with a finite estimate",
    "nonfinite_replicates": "replicates without a finite estimate",
    "standard_error_of_standard_error": "standard error of the standard error",
    "standard_error_of_bias": "standard error of the bias",
    "min_replicates_omitting_subject": "fewest replicates that leave out a given subject",
}


def _label(key: str) -> str:
    label = FIGURE_LABELS.get(key, words(key))
    return label[:1].upper() + label[1:]


def _scalar_rows(source: Mapping[str, Any], skip: set[str], prefix: str = "") -> list[
        tuple[str, str]]:
    rows: list[tuple[str, str]] = []
    for key in sorted(k for k in source if k not in skip):
        value = source[key]
        if isinstance(value, Mapping):
            rows += _scalar_rows(value, set(), prefix=f"{prefix}{_label(key)} \u203a ")
        elif not isinstance(value, list):
            rows.append((f"{prefix}{_label(key)}",
                         sig(value, 4) if isinstance(value, float) else display(value)))
    return rows


def _bootstrap_view(ident: str, rmd: Mapping[str, Any], metric: str) -> dict[str, Any]:
    boot = mapping(rmd.get("bootstrap"))
    acceptance = mapping(rmd.get("acceptance"))
    intervals = mapping(boot.get("intervals"))
    rows = []
    for key in [*INTERVAL_NAMES, *sorted(k for k in intervals if k not in INTERVAL_NAMES)]:
        bounds = mapping(intervals.get(key))
        extras = _scalar_rows(bounds, {"lower", "upper"})
        rows.append({"name": INTERVAL_NAMES.get(key, words(key)),
                     "chosen": key == acceptance.get("interval"),
                     "text": interval_text(bounds.get("lower"), bounds.get("upper")),
                     "extras": "; ".join(f"{k} = {v}" for k, v in extras)})
    histogram = mapping(boot.get("histogram"))
    edges, counts = histogram.get("edges") or [], histogram.get("counts") or []
    if (edges or counts) and len(edges) != len(counts) + 1:
        index = ident.removeprefix("m")
        raise ValueError(
            f"record.result.metrics[{index}].ratio_of_mean_differences.bootstrap.histogram: "
            f"{len(edges)} edges for {len(counts)} counts; expected one edge more than counts")
    chosen = None
    if acceptance.get("lower") is not None and acceptance.get("upper") is not None:
        chosen = (float(acceptance["lower"]), float(acceptance["upper"]))
    limits = mapping(acceptance.get("limits"))
    limit_pair = None
    if limits.get("lower") is not None and limits.get("upper") is not None:
        limit_pair = (float(limits["lower"]), float(limits["upper"]))
    theta = mapping(rmd.get("estimate")).get("theta")
    label = SHORT_INTERVAL_NAMES.get(text(acceptance.get("interval")), "interval")
    histogram_figure = figure(
        plots.histogram_svg, f"{ident}-hist", list(histogram.get("edges") or []),
        list(histogram.get("counts") or []), theta, chosen, label, limit_pair,
        f"Bootstrap distribution of \u03b8 for {metric}")
    return {
        "replicates": boot.get("replicates"),
        "seed": boot.get("seed"),
        "bias": boot.get("bias"),
        "standard_error": boot.get("standard_error"),
        "intervals": rows,
        "any_extras": any(row["extras"] for row in rows),
        "level": level_percent(acceptance.get("confidence_level")),
        "monte_carlo": _scalar_rows(mapping(boot.get("monte_carlo")), set()),
        "other": _scalar_rows(boot, BOOTSTRAP_KNOWN),
        "figure": histogram_figure,
    }


def _ratio_view(ident: str, metric: Mapping[str, Any], name: str) -> dict[str, Any] | None:
    rmd = metric.get("ratio_of_mean_differences")
    if not isinstance(rmd, Mapping):
        return None
    estimate = mapping(rmd.get("estimate"))
    jack = mapping(rmd.get("jackknife"))
    acceptance = mapping(rmd.get("acceptance"))
    values = [(text(v.get("subject")), v.get("theta")) for v in jack.get("values") or []]
    fieller, fieller_note = fieller_text(mapping(rmd.get("fieller")))
    return {
        "theta": estimate.get("theta"),
        "numerator_mean": estimate.get("numerator_mean"),
        "denominator_mean": estimate.get("denominator_mean"),
        "sentence": ratio_sentence(estimate.get("theta"), acceptance),
        "verdict": text(acceptance.get("verdict")) or "undetermined",
        "reason": text(acceptance.get("reason")),
        "jackknife": {k: jack.get(k) for k in ("bias", "standard_error", "bias_corrected")},
        "jackknife_figure": figure(plots.jackknife_svg, f"{ident}-jack", values,
                                    estimate.get("theta"),
                                    f"Leave-one-subject-out estimates of \u03b8 for {name}")
        if values else None,
        "bootstrap": _bootstrap_view(ident, rmd, name),
        "fieller": fieller,
        "fieller_note": fieller_note,
    }


def metric_view(index: int, metric: Mapping[str, Any], design: Mapping[str, Any],
                settings: Mapping[str, Any], unit: str) -> dict[str, Any]:
    if not isinstance(metric, Mapping):
        raise ValueError(f"record.result.metrics[{index}]: expected a JSON object")
    ident = f"m{index}"
    name = text(metric.get("metric")) or "response"
    per_subject = [p for p in metric.get("per_subject") or [] if isinstance(p, Mapping)]
    seen = [str(t) for p in per_subject for t in mapping(p.get("values"))]
    columns = ordered_treatments(design, seen)
    subjects = mapping(metric.get("subjects"))
    summary = [dict(mapping(t)) for t in metric.get("treatment_summary") or []]
    abe = metric.get("average_bioequivalence")
    return {
        "ident": ident,
        "name": name,
        "summary_only": metric.get("analysis") == "summary_only",
        "summary": summary_rows(metric.get("summary")),
        "treatment_summary": summary,
        "summary_decimals": decimals_for([t.get(k) for t in summary
                                          for k in ("mean", "sd", "min", "max")]),
        "value_decimals": decimals_for([v for p in per_subject
                                        for v in mapping(p.get("values")).values()]),
        "difference_decimals": decimals_for(
            [p.get(k) for p in per_subject
             for k in ("numerator_difference", "denominator_difference")]),
        "columns": columns,
        "per_subject": [
            {"subject": text(p.get("subject")), "sequence": text(p.get("sequence")) or DASH,
             "values": [mapping(p.get("values")).get(c) for c in columns],
             "numerator_difference": p.get("numerator_difference"),
             "denominator_difference": p.get("denominator_difference"),
             "jackknife_theta": p.get("jackknife_theta")}
            for p in per_subject
        ],
        "analysed": len(subjects.get("analysed") or []),
        "excluded": [(text(e.get("subject")), text(e.get("reason")))
                     for e in subjects.get("excluded") or [] if isinstance(e, Mapping)],
        "ratio": _ratio_view(ident, metric, name),
        "has_abe_key": "average_bioequivalence" in metric,
        "abe": abe_view(abe) if isinstance(abe, Mapping) else None,
        "shift": shift_view(mapping(metric.get("nonparametric"))),
        "parallel": metric.get("analysis") == "parallel",
        "baseline": bool(design.get("baseline")),
        "unit": unit,
    }


def report_context(record: Mapping[str, Any]) -> dict[str, Any]:
    inputs, result = _require(record)
    study, design = mapping(inputs.get("study")), mapping(inputs.get("design"))
    settings, engine = mapping(inputs.get("settings")), mapping(result.get("engine"))
    unit = text(study.get("unit"))
    limits = mapping(settings.get("limits"))
    abe_settings = mapping(settings.get("average_bioequivalence"))
    abe_limits = mapping(abe_settings.get("limits"))
    fixed = [
        f"acceptance limits for \u03b8: [{signed(limits.get('lower'))}, "
        f"{signed(limits.get('upper'))}]",
        f"confidence level: {level_percent(settings.get('confidence_level'))}",
        f"interval method: {INTERVAL_NAMES.get(text(settings.get('interval')), DASH)}",
        f"bootstrap replicates: {fmt(settings.get('replicates'))}; seed: "
        f"{fmt(settings.get('seed'))}",
    ]
    if abe_settings:
        fixed.append(
            "average-bioequivalence limits on the ratio of geometric means: "
            f"[{fmt(abe_limits.get('lower'), 2)} %, {fmt(abe_limits.get('upper'), 2)} %] "
            f"at {level_percent(abe_settings.get('confidence_level'))}")
    scaling = mapping(settings.get("scaling"))
    if scaling and text(scaling.get("approach")) not in ("", "none"):
        fixed.append(f"scaled limits ({words(text(scaling.get('approach')))}) for: "
                     + ", ".join(str(m) for m in scaling.get("metrics") or []))
    tmax_limits = mapping(settings.get("tmax_limits"))
    if tmax_limits:
        fixed.append(f"limits of the Tmax shift: [{fmt(tmax_limits.get('lower'), 3)}, "
                     f"{fmt(tmax_limits.get('upper'), 3)}]")
    return {
        "title": text(study.get("title")) or "Untitled study",
        "analyte": text(study.get("analyte")) or DASH,
        "unit": unit or DASH,
        "description": text(study.get("description")),
        "record_id": text(record.get("id")) or "not archived",
        "created_at": text(record.get("created_at")) or "not archived",
        "inputs_sha256": record["inputs_sha256"],
        "design": [(role, text(design.get(role)) or "none")
                   for role in ("test", "reference", "baseline")],
        "engine": [(key, text(engine.get(key)) or DASH)
                   for key in ("name", "version", "numpy", "scipy", "python")],
        "metrics": [metric_view(i, m, design, settings, unit)
                    for i, m in enumerate(result["metrics"])],
        "warnings": [{"code": text(w.get("code")), "metric": text(w.get("metric")) or DASH,
                      "message": text(w.get("message"))}
                     for w in result.get("warnings") or [] if isinstance(w, Mapping)],
        "profiles": profiles_view(result.get("profiles") or [], design, unit),
        "profile_rules": [text(r) for r in result.get("profile_rules") or []],
        "settings": settings_rows(settings),
        "fixed_in_advance": fixed,
    }
