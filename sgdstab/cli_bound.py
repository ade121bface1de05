"""`sgdstab bound`: the stability bound of a planned SGD run, epoch by epoch, and the planner.

configure(parser) adds the options to the subparser the main command line creates; run(args)
prints a plain aligned table and returns the exit code (0, or 2 for invalid inputs).
"""

from __future__ import annotations

import argparse
import math
import sys

from sgdstab import bounds

_SOLVE_FOR = ("steps", "step-size", "train-size")
_TARGET_BOUNDS = ("stability", "high-probability")


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the options of `sgdstab bound` to parser."""
    problem = parser.add_argument_group("the loss and the data")
    problem.add_argument("--regime", choices=bounds.REGIMES, required=True)
    problem.add_argument(
        "--train-size", "-n", type=int, required=True, help="n, number of training examples"
    )
    problem.add_argument(
        "--lipschitz", type=float, required=True, help="L, bound on per-example gradient norms"
    )
    problem.add_argument(
        "--smoothness", type=float, help="beta, Lipschitz constant of the gradient"
    )
    problem.add_argument(
        "--strong-convexity", type=float, default=0.0, help="gamma (strongly_convex regime)"
    )
    problem.add_argument("--loss-bound", type=float, help="M: every loss value lies in [0, M]")

    run = parser.add_argument_group("the planned run")
    run.add_argument("--schedule", choices=bounds.SCHEDULE_KINDS, default="constant")
    run.add_argument(
        "--step-size", type=float, required=True, help="first step size (c for c-over-t: c/t)"
    )
    run.add_argument(
        "--decay-factor", type=float, default=0.1, help="step-decay: multiply by this ..."
    )
    run.add_argument(
        "--decay-interval", type=int, default=30, help="... every this many epochs (step-decay)"
    )
    run.add_argument("--epochs", type=int, default=10)
    run.add_argument("--batch-size", type=int, default=1)
    run.add_argument("--delta", type=float, default=0.05, help="confidence 1 - delta (high prob.)")

    plan = parser.add_argument_group("planner")
    plan.add_argument("--target", type=float, help="largest acceptable bound")
    plan.add_argument(
        "--solve-for", choices=_SOLVE_FOR, default="steps", help="quantity the planner answers"
    )
    plan.add_argument(
        "--target-bound", choices=_TARGET_BOUNDS, default="stability", help="bound the target is on"
    )


def run(args: argparse.Namespace) -> int:
    """Print the bound epoch by epoch and, with --target, the planner's answer."""
    try:
        _print_report(args)
    except ValueError as error:
        print(f"sgdstab bound: error: {error}", file=sys.stderr)
        return 2
    return 0


def _cell(bound: bounds.Bound) -> str:
    return f"{bound.value:.6g}" if bound.applicable else "n/a"


def _table(rows: list[list[str]]) -> list[str]:
    widths = [max(len(row[k]) for row in rows) for k in range(len(rows[0]))]
    return ["  ".join(cell.rjust(w) for cell, w in zip(row, widths)).rstrip() for row in rows]


def _print_report(args: argparse.Namespace) -> None:
    if args.epochs < 1 or args.batch_size < 1:
        raise ValueError("--epochs and --batch-size must be >= 1")
    if args.decay_interval < 1:
        raise ValueError("--decay-interval must be >= 1 epoch")
    per_epoch = math.ceil(args.train_size / args.batch_size)
    total = args.epochs * per_epoch
    schedule = bounds.Schedule(
        kind=args.schedule,
        base_step_size=args.step_size,
        decay_factor=args.decay_factor,
        decay_every=args.decay_interval * per_epoch,
        total_steps=total if args.schedule == "cosine" else None,
    )
    problem = dict(
        regime=args.regime,
        lipschitz=args.lipschitz,
        smoothness=args.smoothness,
        strong_convexity=args.strong_convexity,
        batch_size=args.batch_size,
        loss_bound=args.loss_bound,
        delta=args.delta,
    )
    horizons = [epoch * per_epoch for epoch in range(1, args.epochs + 1)]
    step_sizes = schedule.step_sizes(total)
    stability = bounds.planned_bounds(horizons, n=args.train_size, schedule=schedule, **problem)
    high = bounds.planned_bounds(
        horizons, n=args.train_size, schedule=schedule, bound="high_probability", **problem
    )
    columns = {
        "stability bound": stability,
        f"gap w.p. {1 - args.delta:.6g}": high,
    }
    if args.regime == "nonconvex" and args.schedule == "c-over-t":
        columns["c/t closed form"] = _closed_form_column(args, horizons)

    print(
        f"sgdstab bound: {args.regime}, n = {args.train_size}, L = {args.lipschitz:.6g}, "
        f"beta = {_declared(args.smoothness)}, gamma = {args.strong_convexity:.6g}, "
        f"M = {_declared(args.loss_bound)}"
    )
    print(
        f"{schedule.describe()}, batch size {args.batch_size}, {per_epoch} steps per epoch, "
        f"{args.epochs} epochs"
    )
    print()
    rows = [["epoch", "steps", "step size", *columns]]
    for k, steps in enumerate(horizons):
        cells = [_cell(column[k]) for column in columns.values()]
        rows.append([str(k + 1), str(steps), f"{step_sizes[steps - 1]:.6g}", *cells])
    print("\n".join(_table(rows)))

    reasons = {}
    for name, column in columns.items():
        for bound in column:
            if not bound.applicable:
                reasons.setdefault(name, bound.reason)
    if reasons:
        print()
        for name, reason in reasons.items():
            print(f"n/a ({name}): {reason}")
    if args.loss_bound is not None and any(
        b.applicable and b.value >= args.loss_bound for column in columns.values() for b in column
    ):
        print()
        print(f"note: values >= M = {args.loss_bound:.6g} say nothing (every loss lies in [0, M])")
    sources = sorted({b.source for column in columns.values() for b in column if b.applicable})
    if sources:
        print()
        for source in sources:
            print(f"source: {source}")
    if args.target is not None:
        print()
        print(_plan(args, schedule, problem, per_epoch, total))


def _declared(value: float | None) -> str:
    return "not declared" if value is None else f"{value:.6g}"


def _closed_form_column(args: argparse.Namespace, horizons: list[int]) -> list[bounds.Bound]:
    reason = ""
    if args.smoothness is None or args.loss_bound is None or args.loss_bound > 1:
        reason = "needs --smoothness and --loss-bound <= 1 (the closed form assumes f in [0, 1])"
    elif args.batch_size != 1:
        reason = "the closed form is stated for batch size 1 (one example per step)"
    if reason:
        source = f"{bounds.HRS}, Thm 3.12 (non-convex)"
        return [bounds.Bound(None, False, reason, source, ())] * len(horizons)
    return [
        bounds.nonconvex_bound(
            args.step_size, steps, args.train_size, args.lipschitz, args.smoothness
        )
        for steps in horizons
    ]


def _plan(args, schedule, problem, per_epoch: int, total: int) -> str:
    bound = args.target_bound.replace("-", "_")
    what = f"target {args.target:.6g} on the {args.target_bound} bound"
    if args.solve_for == "steps":
        answer = bounds.max_steps(
            args.target, n=args.train_size, schedule=schedule, bound=bound, **problem
        )
    elif args.solve_for == "step-size":
        answer = bounds.max_step_size(
            args.target, n=args.train_size, steps=total, schedule=schedule, bound=bound, **problem
        )
    else:
        answer = bounds.min_train_size(
            args.target, steps=total, schedule=schedule, bound=bound, **problem
        )
    head = f"planner ({what}): "
    if not answer.applicable:
        return head + f"n/a: {answer.reason}"
    if answer.unbounded:
        return head + f"unbounded: {answer.note}"
    if answer.value is None:
        return head + f"no answer: {answer.reason}"
    if answer.quantity == "steps":
        text = f"at most {answer.value} steps ({answer.value / per_epoch:.4g} epochs)"
    elif answer.quantity == "step_size":
        text = f"step size at most {answer.value:.6g} (for {total} steps)"
    else:
        text = f"at least {answer.value} training examples (for {total} steps)"
    text += f"; bound there {answer.bound_at_value:.6g}"
    return head + text + (f" ({answer.note})" if answer.note else "")
