"""`sgdstab bound`: the stability bound of a planned SGD run, epoch by epoch, and the planner.

configure(parser) adds the options to the subparser the main command line creates; run(args)
prints a plain aligned table and returns the exit code (0, or 2 for invalid inputs).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

from ..theory import bounds
from .argtypes import number, whole_number

_SOLVE_FOR = ("steps", "step-size", "train-size")
_TARGET_BOUNDS = ("stability", "high-probability")


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the options of `sgdstab bound` to parser."""
    problem = parser.add_argument_group("the loss and the data")
    problem.add_argument("--regime", choices=bounds.REGIMES, required=True,
                         help="which published bound: the loss is convex, strongly convex or "
                              "non-convex in the weights (required)")
    problem.add_argument("--train-size", "-n", type=whole_number(2, " training examples"),
                         required=True, help="n, the number of training examples (required)")
    problem.add_argument("--lipschitz", type=number(above=0.0), required=True,
                         help="L, a bound on every per-example gradient norm (required)")
    problem.add_argument("--smoothness", type=number(above=0.0), default=None,
                         help="beta, the Lipschitz constant of the gradient (default: not "
                              "declared; the convex and strongly convex step-size conditions "
                              "and the non-convex bound need it)")
    problem.add_argument("--strong-convexity", type=number(at_least=0.0), default=0.0,
                         help="gamma, for the strongly_convex regime (default: %(default)s)")
    problem.add_argument("--loss-bound", type=number(above=0.0), default=None,
                         help="M: every loss value lies in [0, M] (default: not declared; the "
                              "high-probability and non-convex bounds need it)")

    run = parser.add_argument_group("the planned run")
    run.add_argument("--schedule", choices=bounds.SCHEDULE_KINDS, default="constant",
                     help="step-size schedule (default: %(default)s)")
    run.add_argument("--step-size", type=number(above=0.0), required=True,
                     help="the first step size; for c-over-t the c of c/t (required)")
    run.add_argument("--decay-factor", type=number(above=0.0, at_most=1.0), default=0.1,
                     help="step-decay: multiply the step size by this ... (default: %(default)s)")
    run.add_argument("--decay-interval", type=whole_number(1, " epoch"), default=30,
                     help="... every this many epochs (default: %(default)s)")
    run.add_argument("--epochs", type=whole_number(1, " epoch"), default=10,
                     help="epochs to plan (default: %(default)s)")
    run.add_argument("--batch-size", type=whole_number(1, " example"), default=1,
                     help="examples per step (default: %(default)s)")
    run.add_argument("--delta", type=number(above=0.0, below=1.0), default=0.05,
                     help="the high-probability bound holds with probability 1 - delta "
                          "(default: %(default)s)")

    plan = parser.add_argument_group("planner")
    plan.add_argument("--target", type=number(above=0.0), default=None,
                      help="largest acceptable bound (default: none, no planner answer)")
    plan.add_argument("--solve-for", choices=_SOLVE_FOR, default="steps",
                      help="the quantity the planner answers (default: %(default)s)")
    plan.add_argument("--target-bound", choices=_TARGET_BOUNDS, default="stability",
                      help="the bound the target is on (default: %(default)s)")

    out = parser.add_argument_group("output")
    out.add_argument("--json", action="store_true",
                     help="print one JSON object instead of the table (default: the table)")


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


def _vacuous(column: list[bounds.Bound], loss_bound: float | None) -> bool:
    """Every applicable value is at least M: the column says nothing (the gap is <= M anyway)."""
    values = [b.value for b in column if b.applicable and b.value is not None]
    return loss_bound is not None and bool(values) and all(v >= loss_bound for v in values)


def _compute(args: argparse.Namespace) -> dict[str, Any]:
    """Everything the table and the JSON show."""
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
    columns = {"stability bound": stability, f"gap w.p. {1 - args.delta:.6g}": high}
    if args.regime == "nonconvex" and args.schedule == "c-over-t":
        columns["c/t closed form"] = _closed_form_column(args, horizons)
    return dict(schedule=schedule, problem=problem, per_epoch=per_epoch, total=total,
                horizons=horizons, step_sizes=step_sizes, columns=columns)


def _print_report(args: argparse.Namespace) -> None:
    if args.batch_size > args.train_size:
        raise ValueError(f"--batch-size {args.batch_size} is larger than --train-size "
                         f"{args.train_size}")
    plan = _compute(args)
    if args.json:
        print(json.dumps(_as_json(args, plan), indent=2))
        return
    schedule, horizons, per_epoch = plan["schedule"], plan["horizons"], plan["per_epoch"]
    columns = dict(plan["columns"])
    hidden = {name: column for name, column in columns.items()
              if name.startswith("gap w.p.") and _vacuous(column, args.loss_bound)}
    for name in hidden:
        del columns[name]

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
        rows.append([str(k + 1), str(steps), f"{plan['step_sizes'][steps - 1]:.6g}", *cells])
    print("\n".join(_table(rows)))

    for name, column in hidden.items():
        smallest = min(b.value for b in column if b.applicable)
        print()
        print(f"{name} (high-probability gap bound) not shown: at least {smallest:.6g} at every "
              f"epoch, not below M = {args.loss_bound:.6g}; every loss lies in [0, M], so it "
              "says nothing here")
    reasons: dict[str, str] = {}
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
        print(_plan(args, schedule, plan["problem"], per_epoch, plan["total"]))


def _bound_json(bound: bounds.Bound, loss_bound: float | None) -> dict[str, Any]:
    value = bound.value if bound.applicable and bound.value is not None and \
        math.isfinite(bound.value) else None
    return {"value": value, "applicable": bool(bound.applicable),
            "reason": bound.reason or None, "source": bound.source,
            "vacuous": None if value is None or loss_bound is None else value >= loss_bound}


def _as_json(args: argparse.Namespace, plan: dict[str, Any]) -> dict[str, Any]:
    from .. import __version__

    keys = {"stability bound": "stability"}
    names = {name: keys.get(name, "high_probability_gap" if name.startswith("gap w.p.") else
                            "closed_form_c_over_t") for name in plan["columns"]}
    epochs = []
    for k, steps in enumerate(plan["horizons"]):
        entry: dict[str, Any] = {"epoch": k + 1, "steps": steps,
                                 "step_size": float(plan["step_sizes"][steps - 1])}
        for name, column in plan["columns"].items():
            entry[names[name]] = _bound_json(column[k], args.loss_bound)
        epochs.append(entry)
    inputs = {key: value for key, value in vars(args).items()
              if key not in ("json", "command", "handler") and not callable(value)}
    result: dict[str, Any] = {
        "sgdstab_version": __version__,
        "inputs": inputs,
        "schedule": plan["schedule"].describe(),
        "steps_per_epoch": plan["per_epoch"],
        "epochs": epochs,
    }
    if args.target is not None:
        result["planner"] = _plan_json(args, plan)
    return result


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


def _solve(args: argparse.Namespace, schedule: Any, problem: dict[str, Any],
           total: int) -> Any:
    bound = args.target_bound.replace("-", "_")
    if args.solve_for == "steps":
        return bounds.max_steps(
            args.target, n=args.train_size, schedule=schedule, bound=bound, **problem
        )
    if args.solve_for == "step-size":
        return bounds.max_step_size(
            args.target, n=args.train_size, steps=total, schedule=schedule, bound=bound, **problem
        )
    return bounds.min_train_size(
        args.target, steps=total, schedule=schedule, bound=bound, **problem
    )


def _plan_json(args: argparse.Namespace, plan: dict[str, Any]) -> dict[str, Any]:
    answer = _solve(args, plan["schedule"], plan["problem"], plan["total"])
    return {"target": args.target, "target_bound": args.target_bound,
            "solve_for": args.solve_for, "applicable": bool(answer.applicable),
            "unbounded": bool(answer.unbounded), "quantity": answer.quantity,
            "value": answer.value, "bound_at_value": answer.bound_at_value,
            "reason": answer.reason or None, "note": answer.note or None}


def _plan(args: argparse.Namespace, schedule: Any, problem: dict[str, Any], per_epoch: int,
          total: int) -> str:
    what = f"target {args.target:.6g} on the {args.target_bound} bound"
    answer = _solve(args, schedule, problem, total)
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
