"""Which study design a long-form table follows: crossover, replicate or parallel groups.

Each sequence's treatment order is read from the table: in each period of a sequence, the
treatment its subjects received (a sequence must fix one treatment per period). Then:

- parallel: every subject has one observation, all in one period;
- crossover: no sequence gives a treatment twice, every sequence gives test and reference
  (2×2 and multi-arm crossovers);
- replicate: only test (T) and reference (R), every sequence gives both, some sequence gives one
  of them twice, and the set of orders is a supported replicate design: 3 periods, two mirror
  sequences (T↔R, e.g. TRT/RTR) or the partial replicate TRR/RTR/RRT; 4 periods, each sequence
  2 T and 2 R, in two mirror sequences (e.g. TRTR/RTRT, TRRT/RTTR) or four sequences forming two
  mirror pairs (e.g. TRTR/RTRT/TRRT/RTTR).

A table that fits none gets design None and a reason in plain words.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from service.stats.phases import check_deadline

PARTIAL_REPLICATE = frozenset({"TRR", "RTR", "RRT"})
SUPPORTED_REPLICATES = (
    "3 periods: two mirror sequences such as TRT/RTR, or the partial replicate TRR/RTR/RRT; "
    "4 periods: sequences with two T and two R each, either two mirror sequences (TRTR/RTRT, "
    "TRRT/RTTR, TTRR/RRTT) or four sequences forming two mirror pairs (such as TRTR/RTRT/TRRT/RTTR)"
)


@dataclass(frozen=True)
class SequenceOrder:
    sequence: str
    periods: tuple[int, ...]
    treatments: tuple[str, ...]  # the treatment given in each of ``periods``


@dataclass(frozen=True)
class DesignRecognition:
    design: str | None  # crossover | replicate | parallel; None when the table fits no design
    reason: str  # why this design, or why none
    description: str | None  # e.g. "2×2 crossover", "full replicate, 2 sequences × 4 periods"
    orders: tuple[SequenceOrder, ...]
    test_replicated: bool  # some sequence gives the test more than once
    reference_replicated: bool
    incomplete_subjects: tuple[str, ...]  # subjects without a value in some period of their sequence


def recognise_design(
    *, subjects: Sequence[str], sequences: Sequence[str], periods: Sequence[int],
    treatments: Sequence[str], test: str, reference: str, deadline: float | None = None,
) -> DesignRecognition:
    """Classify the table; values play no part (missing observations are simply absent rows)."""
    n = len(subjects)
    lengths = [f"{name}: has {len(column)} entries, subjects has {n}"
               for name, column in (("sequences", sequences), ("periods", periods),
                                    ("treatments", treatments)) if len(column) != n]
    if lengths:
        raise ValueError("; ".join(lengths))
    problems: list[str] = []
    if test == reference:
        problems.append(f"test and reference are both {test!r}")
    present = set(treatments)
    problems += [f"the {role} treatment {label!r} has no observation"
                 for role, label in (("test", test), ("reference", reference)) if label not in present]
    sequence_of: dict[str, str] = {}
    plan: dict[str, dict[int, str]] = {}  # subject -> period -> treatment
    given: dict[str, dict[int, dict[str, str]]] = {}  # sequence -> period -> treatment -> subject
    for s, q, p, t in zip(subjects, sequences, periods, treatments, strict=True):
        if sequence_of.setdefault(s, q) != q:
            problems.append(f"subject {s!r} is in sequences {sequence_of[s]!r} and {q!r}")
        if p in plan.setdefault(s, {}):
            problems.append(f"subject {s!r} has more than one value in period {p}")
        plan[s][p] = t
        given.setdefault(q, {}).setdefault(p, {}).setdefault(t, s)
    if not problems and all(len(by_period) == 1 for by_period in plan.values()):
        # Parallel groups: sequence labels carry no treatment order, so they are not checked.
        return _single_observations(plan, test, reference)
    for q, by_period in sorted(given.items()):
        for p, by_treatment in sorted(by_period.items()):
            if len(by_treatment) > 1:
                who = ", ".join(f"{t!r} to {s!r}" for t, s in sorted(by_treatment.items()))
                problems.append(f"sequence {q!r} gives different treatments in period {p} ({who}): "
                                "a sequence must fix the treatment of each period")
    if problems:
        return _none("; ".join(list(dict.fromkeys(problems))[:20]))
    check_deadline(deadline, "the sequence orders", 1, 2)
    order_of = {q: SequenceOrder(q, tuple(sorted(by_period)),
                                 tuple(next(iter(by_period[p])) for p in sorted(by_period)))
                for q, by_period in given.items()}
    orders = tuple(order_of[q] for q in sorted(order_of))
    incomplete = tuple(sorted(s for s, by_period in plan.items()
                              if len(by_period) < len(order_of[sequence_of[s]].periods)))
    letters = {test: "T", reference: "R"}
    for o in orders:
        missing = [role for role, label in (("test", test), ("reference", reference))
                   if label not in o.treatments]
        if missing:
            return _none(f"sequence {o.sequence!r} ({_spell(o, letters)}) never gives the "
                         f"{' or the '.join(missing)}: every sequence must give both", orders)
    repeated = [o for o in orders if len(set(o.treatments)) < len(o.treatments)]
    test_rep = any(o.treatments.count(test) > 1 for o in orders)
    ref_rep = any(o.treatments.count(reference) > 1 for o in orders)
    if not repeated:
        k = len({t for o in orders for t in o.treatments})
        lengths_seen = sorted({len(o.periods) for o in orders})
        layout = ("2×2 crossover" if k == 2 and lengths_seen == [2] and len(orders) == 2
                       else f"crossover, {k} treatments, {'/'.join(map(str, lengths_seen))} "
                       f"periods, {len(orders)} sequence(s)")
        return DesignRecognition("crossover", "no sequence gives a treatment twice and every "
                                 "sequence gives test and reference", layout, orders,
                                 False, False, incomplete)
    others = sorted({t for o in orders for t in o.treatments} - {test, reference})
    if others:
        return _none(f"sequences {', '.join(repr(o.sequence) for o in repeated)} give a treatment "
                     f"more than once, and the table has treatments other than test and reference "
                     f"({', '.join(map(repr, others))}): replicate designs with a third treatment "
                     "are not supported", orders)
    description = _replicate_family({_spell(o, letters) for o in orders})
    spelled = "/".join(sorted(_spell(o, letters) for o in orders))
    if description is None:
        return _none(f"the sequences {spelled} (T = test, R = reference, in period order) give a "
                     f"treatment more than once but are not a supported replicate design; "
                     f"supported: {SUPPORTED_REPLICATES}", orders)
    return DesignRecognition("replicate", f"sequences {spelled}: {description}", description,
                             orders, test_rep, ref_rep, incomplete)


def _replicate_family(spelled: set[str]) -> str | None:
    lengths = {len(s) for s in spelled}
    if len(lengths) != 1:
        return None
    length = next(iter(lengths))
    mirror_pairs = _mirror_pairs(spelled)
    if length == 3:
        if spelled == PARTIAL_REPLICATE:
            return "partial replicate, 3 sequences × 3 periods (reference replicated)"
        if len(spelled) == 2 and mirror_pairs == 1:
            return "full replicate, 2 sequences × 3 periods"
        return None
    if length == 4 and all(s.count("T") == 2 for s in spelled) and 2 * mirror_pairs == len(spelled):
        if len(spelled) in (2, 4):
            return f"full replicate, {len(spelled)} sequences × 4 periods"
    return None


def _mirror_pairs(spelled: set[str]) -> int:
    """How many sequences have their T↔R mirror image in the set, halved."""
    swap = str.maketrans("TR", "RT")
    return sum(1 for s in spelled if s.translate(swap) in spelled) // 2


def _single_observations(plan: dict[str, dict[int, str]], test: str, reference: str) -> DesignRecognition:
    used_periods = sorted({p for by_period in plan.values() for p in by_period})
    if len(used_periods) > 1:
        return _none(f"every subject has one observation, but in different periods "
                     f"({', '.join(map(str, used_periods))}): a parallel-group study has one "
                     "period, and a crossover needs more than one observation per subject")
    groups = {t for by_period in plan.values() for t in by_period.values()}
    missing = [role for role, label in (("test", test), ("reference", reference)) if label not in groups]
    if missing:
        return _none(f"parallel groups without a {' or '.join(missing)} group")
    return DesignRecognition("parallel", "every subject has one observation, all in one period",
                             f"parallel groups, {len(groups)} treatment(s)", (), False, False, ())


def _spell(order: SequenceOrder, letters: dict[str, str]) -> str:
    """T/R letters in period order; another treatment is written as its label in brackets."""
    return "".join(letters.get(t, f"[{t}]") for t in order.treatments)


def _none(reason: str, orders: tuple[SequenceOrder, ...] = ()) -> DesignRecognition:
    return DesignRecognition(None, reason, None, orders, False, False, ())
