"""Row-to-row checks of a request's records and profiles (items already validated one by one)."""

from __future__ import annotations

from typing import Any

from service.intake.problems import Problem

Items = list[tuple[int, Any]]


def check_records(records: Items) -> list[Problem]:
    problems: list[Problem] = []
    by_period: dict[tuple[str, int, str], int] = {}
    for index, r in records:
        earlier = by_period.setdefault((r.subject, r.period, r.metric), index)
        if earlier != index:
            problems.append(Problem(("records", index, "period"),
                                    f"subject {r.subject!r} already has a {r.metric!r} value in "
                                    f"period {r.period} (records[{earlier}])"))
    # The same treatment in two periods is a replicate design, not a duplicate: whether the
    # table fits a supported design is decided once every row is read (service.records).
    return problems


def check_profiles(profiles: Items) -> list[Problem]:
    problems: list[Problem] = []
    seen: dict[tuple[str, int, str, float], int] = {}
    groups: dict[tuple[str, int, str], tuple[int, set[float]]] = {}
    for index, p in profiles:
        earlier = seen.setdefault((p.subject, p.period, p.treatment, float(p.time)), index)
        if earlier != index:
            problems.append(Problem(("profiles", index, "time"),
                                    f"subject {p.subject!r}, period {p.period}, treatment "
                                    f"{p.treatment!r} already has a sample at time {p.time} "
                                    f"(profiles[{earlier}])"))
        if p.concentration is None and not p.below_lloq:
            problems.append(Problem(("profiles", index, "concentration"),
                                    "must be a number; null is allowed only when below_lloq "
                                    "is true"))
        groups.setdefault((p.subject, p.period, p.treatment), (index, set()))[1].add(float(p.time))
    for (subject, period, treatment), (first, times) in groups.items():
        if len(times) < 3:
            problems.append(Problem(("profiles", first, "time"),
                                    f"the profile of subject {subject!r}, period {period}, "
                                    f"treatment {treatment!r} has only {len(times)} time "
                                    f"point{'' if len(times) == 1 else 's'}; "
                                    "at least 3 are needed"))
    return problems


def _where(key: str, index: int) -> str:
    return f"{key}[{index}]"


def check_consistency(records: Items, profiles: Items) -> list[Problem]:
    """One subject: one period -> treatment mapping and one sequence label (a treatment may
    recur in another period: replicate designs).

    Subjects sharing a label: one treatment order.
    """
    problems: list[Problem] = []
    # (subject, period) -> (treatment, source, key, index); source is the metric, or "" for
    # profiles; key and index say where (written out only for a problem)
    treatment_of: dict[tuple[str, int], tuple[str, str, str, int]] = {}
    label_of: dict[str, tuple[str, str, int]] = {}
    rows = [("records", i, r, r.metric) for i, r in records]
    rows += [("profiles", i, p, "") for i, p in profiles]
    for key, index, row, source in rows:
        # Within one metric of the records, a clash is a duplicate and is reported as one.
        first_t = treatment_of.setdefault((row.subject, row.period),
                                          (row.treatment, source, key, index))
        if first_t[0] != row.treatment and not (key == "records" and first_t[1] == source):
            problems.append(Problem((key, index, "treatment"),
                                    f"subject {row.subject!r} received {first_t[0]!r} in period "
                                    f"{row.period} according to {_where(first_t[2], first_t[3])}, "
                                    f"but {row.treatment!r} here"))
        if row.sequence is not None:
            first_l = label_of.setdefault(row.subject, (row.sequence, key, index))
            if first_l[0] != row.sequence:
                problems.append(Problem((key, index, "sequence"),
                                        f"subject {row.subject!r} has sequence label "
                                        f"{first_l[0]!r} in {_where(first_l[1], first_l[2])} but "
                                        f"{row.sequence!r} here"))
    problems.extend(_check_shared_labels(treatment_of, label_of))
    return problems


def _check_shared_labels(
    treatment_of: dict[tuple[str, int], tuple[str, str, str, int]],
    label_of: dict[str, tuple[str, str, int]],
) -> list[Problem]:
    plan: dict[str, dict[int, str]] = {}
    for (subject, period), (treatment, *_) in treatment_of.items():
        plan.setdefault(subject, {})[period] = treatment

    def order(subject: str) -> str:
        return "-".join(t for _, t in sorted(plan[subject].items()))

    problems: list[Problem] = []
    first_with: dict[str, str] = {}
    for subject in sorted(label_of):
        label = label_of[subject][0]
        model = first_with.setdefault(label, subject)
        if model == subject:
            continue
        own, theirs = plan[subject], plan[model]
        if any(own[p] != theirs[p] for p in own.keys() & theirs.keys()):
            _, key, index = label_of[subject]
            problems.append(Problem((key, index, "sequence"),
                                    f"subjects {model} and {subject} share sequence label "
                                    f"{label!r} but received treatments in different orders: "
                                    f"{model} {order(model)}, {subject} {order(subject)}"))
    return problems
