"""`bioparity plan`: power and sample size of the next study, printed as a table."""

from __future__ import annotations

import argparse
import sys

EXIT_INVALID = 2


def add_plan_command(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    planning = commands.add_parser(
        "plan", help="power and sample size of the next study",
        epilog="Planning assumptions are not guarantees: the protocol and a qualified "
        "statistician fix the sample size; agencies differ on scaled approaches.")
    planning.add_argument("--design", required=True, choices=(
        "two_by_two", "full_replicate_4", "full_replicate_3", "partial_replicate", "parallel"))
    planning.add_argument("--cv", type=float, required=True,
                          help="within-subject CV as a fraction (0.30 for 30 %%)")
    planning.add_argument("--ratio", type=float, default=0.95, help="assumed true T/R ratio")
    planning.add_argument("--power", type=float, default=0.80, help="target power")
    planning.add_argument("--alpha", type=float, default=0.05)
    planning.add_argument("--limit-lower", type=float, default=0.80)
    planning.add_argument("--limit-upper", type=float, default=1.25)
    planning.add_argument("--dropout-rate", type=float, default=0.0)
    planning.add_argument("--approach", default="none",
                          choices=("none", "widened_limits", "reference_scaled"))
    planning.add_argument("--cv-reference", type=float, default=None)
    planning.add_argument("--method", default="exact",
                          choices=("exact", "noncentral_t", "shifted_t", "normal"))
    planning.add_argument("--simulations", type=int, default=100_000)
    planning.add_argument("--seed", type=int, default=None)
    planning.add_argument("--max-total", type=int, default=10_000)


def run_plan(args: argparse.Namespace) -> int:
    from service.stats.planning import PlanningInputError, plan, plan_to_json

    try:
        answer = plan_to_json(plan(
            design=args.design, cv=args.cv, ratio=args.ratio, target_power=args.power,
            alpha=args.alpha, limits=(args.limit_lower, args.limit_upper),
            dropout_rate=args.dropout_rate, approach=args.approach,
            cv_reference=args.cv_reference, method=args.method, simulations=args.simulations,
            seed=args.seed, max_total=args.max_total))
    except PlanningInputError as exc:
        print(f"error: the planning request is invalid ({len(exc.problems)} problem(s)):",
              file=sys.stderr)
        for field, message in exc.problems:
            print(f"  --{field.replace('_', '-').split('.')[0]}: {message}", file=sys.stderr)
        return EXIT_INVALID
    size, enrol = answer["sample_size"], answer["enrol"]
    mcse = answer["monte_carlo_standard_error"]
    rows = [
        ("design", args.design),
        ("within-subject CV", f"{args.cv:.4g}"),
        ("assumed ratio T/R", f"{args.ratio:.4g}"),
        ("limits", f"{args.limit_lower:.4g} to {args.limit_upper:.4g}"),
        ("alpha", f"{args.alpha:.4g}"),
        ("target power", f"{args.power:.4g}"),
        ("sample size (total)", str(size["total"])),
        ("per sequence", str(size["per_sequence"])),
        ("power at that size", f"{answer['power']:.4f}" + (f" ± {mcse:.4f}" if mcse else "")),
        ("power method", str(answer["power_method"])),
        ("enrol (after dropouts)", str(enrol["total"])),
    ]
    width = max(len(label) for label, _ in rows)
    for label, value in rows:
        print(f"{label:<{width}}  {value}")
    print()
    print(f"{'CV':>8}  {'ratio':>8}  {'power':>8}")
    for point in answer["curve"]:
        print(f"{point['cv']:8.4f}  {point['ratio']:8.4f}  {point['power']:8.4f}")
    print()
    for caution in answer["cautions"]:
        print(f"caution: {caution}")
    for warning in answer["warnings"]:
        print(f"note: {warning['message']}")
    return 0
