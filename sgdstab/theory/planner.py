"""Planned SGD runs: step-size schedules, the bound after T planned steps, and its inversions.

planned_bounds (sgdstab.theory.planned, re-exported here) evaluates the bounds of
sgdstab.theory.bounds and sgdstab.theory.divergence on a schedule fixed in advance
(sgdstab.theory.schedules, re-exported here); max_steps, max_step_size and min_train_size invert
them (closed form where one exists, integer bisection or scipy root finding otherwise). numpy,
scipy and the standard library only; no torch. Sources and assumptions travel with each Bound and
PlanAnswer.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from scipy import optimize

from .bounds import (
    Bound,
    _convex_value,
    _non_negative,
    _positive,
    _regime,
    _steps,
)
from .confidence import high_probability_gap
from .planned import TARGET_BOUNDS, planned_bound, planned_bounds
from .schedules import SCHEDULE_KINDS, Schedule, _as_schedule

__all__ = ["TARGET_BOUNDS", "SCHEDULE_KINDS", "Schedule", "planned_bounds", "planned_bound",
           "PlanAnswer", "max_steps", "max_step_size", "min_train_size"]


@dataclass(frozen=True)
class PlanAnswer:
    """The planner's answer: most steps / largest step size, or fewest examples, within target."""

    value: float | None  # int for steps and train_size; None when no answer exists or unbounded
    applicable: bool  # False when the bound's assumptions fail for these inputs
    reason: str  # why not applicable, or why there is no answer ('' otherwise)
    quantity: str  # "steps", "step_size" or "train_size"
    target: float
    bound: str = "stability"  # which bound the target applies to (TARGET_BOUNDS)
    bound_at_value: float | None = None
    unbounded: bool = False  # every value of the quantity meets the target
    note: str = ""  # qualifiers: capped by a step-size condition, search limit reached, ...
    source: str = ""

    def to_dict(self) -> dict:
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}


def _last_true(ok: Callable[[int], bool], lo: int, hi: int, guess: int | None = None) -> int:
    """Largest x in [lo, hi] with ok(x), for ok monotone (True, then False) and ok(lo) True.

    Gallops away from the guess (a closed form is usually off by at most one), then bisects.
    """
    good, bad = lo, hi + 1  # ok(good) holds; ok fails at bad (hi + 1 stands for "beyond hi")
    downward = False
    if guess is not None and lo < guess <= hi:
        good, bad, downward = (guess, bad, False) if ok(guess) else (good, guess, True)
    span = 1
    while bad - good > 1:
        probe = max(good + 1, bad - span) if downward else min(good + span, bad - 1)
        if ok(probe) == downward:  # the gallop crossed the boundary: bisect from here
            good, bad = (probe, bad) if downward else (good, probe)
            break
        good, bad = (good, probe) if downward else (probe, bad)
        span *= 2
    while bad - good > 1:
        mid = (good + bad) // 2
        good, bad = (mid, bad) if ok(mid) else (good, mid)
    return good


def _value(bound: Bound) -> float:
    """The value of a bound the caller knows to apply (its conditions were checked already)."""
    assert bound.value is not None, bound.reason
    return bound.value


def _stability_target(target: float, bound: str, n: float, loss_bound, delta) -> float:
    """The eps_stab whose high-probability gap equals target (inverse of high_probability_gap)."""
    if bound == "stability":
        return target
    s = math.sqrt(math.log(1 / delta) / (2 * n))
    return (target - loss_bound * s) / (1 + 2 * n * s)


def max_steps(
    target: float,
    *,
    regime: str,
    n: float,
    lipschitz: float,
    schedule: Schedule | float | Sequence[float],
    smoothness: float | None = None,
    strong_convexity: float = 0.0,
    batch_size: int = 1,
    loss_bound: float | None = None,
    delta: float = 0.05,
    bound: str = "stability",
    max_horizon: int = 10**7,
) -> PlanAnswer:
    """Largest T with planned_bound(T) <= target.

    Exact for a constant step size (convex: T = target n / (2 L^2 alpha); strongly convex:
    T = ln(1 - target gamma n / (2 L^2)) / ln(1 - alpha gamma)), integer bisection otherwise;
    'unbounded' when the bound's limit in T is within target. Sources: planned_bounds'.
    max_horizon limits the search where each evaluation needs per-step arrays.
    """
    target = _positive("target", target)
    sched = _as_schedule(schedule)
    problem = dict(
        regime=regime, n=n, lipschitz=lipschitz, schedule=sched, smoothness=smoothness,
        strong_convexity=strong_convexity, batch_size=batch_size, loss_bound=loss_bound,
        delta=delta, bound=bound,
    )  # fmt: skip
    at = functools.lru_cache(maxsize=None)(lambda t: planned_bound(t, **problem))
    first = at(1)  # every schedule defines step 1; its conditions are checked there
    plan = _plan_answer("steps", target, bound, first.source)
    if not first.applicable:
        return plan(None, False, first.reason)
    at_zero = _value(at(0))
    if at_zero > target:
        return plan(None, True, f"even 0 steps give a {bound} bound of {at_zero:.6g} > target")
    constant = sched.kind == "constant"
    n_value, lipschitz_value = float(n), float(lipschitz)
    eps = _stability_target(target, bound, n_value, loss_bound, delta)
    guess, limit = None, None
    if regime == "convex" and constant:
        guess = math.floor(eps * n_value / (2 * lipschitz_value**2 * sched.peak))
    elif regime == "convex" and isinstance(sched, Schedule) and sched.kind == "step-decay" and (
        sched.decay_factor < 1
    ):
        total = sched.peak * sched.decay_every / (1 - sched.decay_factor)
        limit = _convex_value(total, n_value, lipschitz_value)
    elif regime == "strongly_convex" and constant:
        limit = 2 * lipschitz_value**2 / (float(strong_convexity) * n_value)
        rate = sched.peak * float(strong_convexity)
        if eps < limit:
            guess = 0 if rate >= 1 else math.floor(math.log1p(-eps / limit) / math.log1p(-rate))
    if limit is not None and limit <= eps and sched.horizon is None:
        value = _limit_value(limit, problem)
        note = f"the {bound} bound stays below its limit {value:.6g} <= target: any number of steps"
        return plan(None, True, "", unbounded=True, note=note)
    cheap = regime == "convex" or (regime == "strongly_convex" and constant)
    hi = sched.horizon if sched.horizon is not None else (10**15 if cheap else _steps(max_horizon))

    def ok(t: int) -> bool:
        b = at(t)
        return b.applicable and _value(b) <= target

    best = _last_true(ok, 0, hi, None if guess is None else max(0, min(guess, hi)))
    note = ""
    if best == hi:
        note = (
            f"the whole schedule ({hi} steps) stays within target"
            if sched.horizon is not None
            else f"the bound stays within target up to the search limit of {hi} steps"
        )
    elif not at(best + 1).applicable:
        note = f"step {best + 1} breaks the bound's condition: {at(best + 1).reason}"
    return plan(best, True, "", bound_at_value=at(best).value, note=note)


def _limit_value(stability_limit: float, problem: dict) -> float:
    if problem["bound"] == "stability":
        return stability_limit
    return _value(
        high_probability_gap(stability_limit, problem["n"], problem["loss_bound"], problem["delta"])
    )


def _plan_answer(quantity: str, target: float, bound: str, source: str):
    def make(value, applicable, reason, **extra) -> PlanAnswer:
        return PlanAnswer(
            value, applicable, reason, quantity, target, bound, source=source, **extra
        )

    return make


def _step_size_cap(regime: str, smoothness: float | None, gamma: float) -> tuple[float | None, str]:
    """The largest peak step size the regime's conditions allow (None: no limit)."""
    if regime == "convex":
        return (None, "") if smoothness is None else (2 / float(smoothness), "2/beta")
    if regime == "strongly_convex" and gamma > 0:
        if smoothness is None:
            return 1 / gamma, "1/gamma"
        return 2 / (float(smoothness) + gamma), "2/(beta+gamma)"
    return None, ""


def max_step_size(
    target: float,
    *,
    regime: str,
    n: float,
    lipschitz: float,
    steps: int,
    schedule: Schedule | float | Sequence[float] | None = None,
    smoothness: float | None = None,
    strong_convexity: float = 0.0,
    batch_size: int = 1,
    loss_bound: float | None = None,
    delta: float = 0.05,
    bound: str = "stability",
) -> PlanAnswer:
    """Largest peak step size alpha_1 with planned_bound(steps) <= target, schedule shape kept.

    Exact for the convex bound (alpha_1 = target n / (2 L^2 sum_t alpha_t / alpha_1)), root finding
    (scipy.optimize.brentq) otherwise; capped by the regime's step-size condition. A given array of
    step sizes is rescaled so that its largest entry is the answer. Sources: planned_bounds'.
    """
    target, steps = _positive("target", target), _steps(steps)
    shape = _as_schedule(1.0 if schedule is None else schedule)
    gamma = _non_negative("strong_convexity", strong_convexity)
    problem = dict(
        regime=_regime(regime), n=n, lipschitz=lipschitz, smoothness=smoothness,
        strong_convexity=gamma, batch_size=batch_size, loss_bound=loss_bound, delta=delta,
        bound=bound,
    )  # fmt: skip
    at = functools.lru_cache(maxsize=None)(
        lambda peak: planned_bound(steps, schedule=shape.with_peak(peak), **problem)
    )
    floor = at(shape.peak * 1e-300)  # the bound as the step sizes vanish
    plan = _plan_answer("step_size", target, bound, floor.source)
    if not floor.applicable:
        return plan(None, False, floor.reason)
    if _value(floor) > target:
        return plan(None, True, f"even vanishing step sizes give {_value(floor):.6g} > target")
    cap, label = _step_size_cap(regime, smoothness, gamma)
    if cap is not None:
        if _value(at(cap)) <= target:
            note = f"capped by the condition peak step size <= {label} = {cap:.6g}"
            return plan(cap, True, "", bound_at_value=at(cap).value, note=note)
        hi = cap
    else:
        # Non-convex: the t0 = T branch, M min(1, T b / n), does not grow with the step size.
        # (Convex without a declared smoothness also lands here; its bound grows without limit.)
        if regime == "nonconvex":
            assert loss_bound is not None  # planned_bounds does not apply without M here
            saturated = float(loss_bound) * min(1.0, steps * int(batch_size) / float(n))
            if _limit_value(saturated, problem) <= target:
                note = "the bound saturates at M min(1, T b / n) within target: any step size"
                return plan(None, True, "", unbounded=True, note=note)
        hi = shape.peak
        while _value(at(hi)) <= target:
            hi *= 2
    guess = None
    if regime == "convex" and bound == "stability":
        unit = _convex_value(
            shape.with_peak(1.0).total_step_size(steps), float(n), float(lipschitz)
        )
        guess = min(target / unit, hi)
    if guess is None or _value(at(guess)) > target:
        guess = optimize.brentq(lambda x: _value(at(x)) - target, hi * 1e-300, hi, rtol=1e-14)
    for _ in range(60):  # make sure the answer meets the target despite round-off
        if _value(at(guess)) <= target:
            break
        guess = guess * (1 - 2**-40)
    return plan(guess, True, "", bound_at_value=at(guess).value)


def min_train_size(
    target: float,
    *,
    regime: str,
    lipschitz: float,
    steps: int,
    schedule: Schedule | float | Sequence[float],
    smoothness: float | None = None,
    strong_convexity: float = 0.0,
    batch_size: int = 1,
    loss_bound: float | None = None,
    delta: float = 0.05,
    bound: str = "stability",
    max_train_size: int = 10**15,
) -> PlanAnswer:
    """Smallest n >= 2 with planned_bound(steps) <= target for a fixed number of steps.

    Exact where the bound is C / n (convex, strongly convex: n = ceil(C / target)), root finding
    (scipy.optimize.brentq) on n otherwise, then the integer boundary. Sources: planned_bounds'.
    """
    target, steps = _positive("target", target), _steps(steps)
    problem = dict(
        regime=_regime(regime), lipschitz=lipschitz, schedule=_as_schedule(schedule),
        smoothness=smoothness, strong_convexity=strong_convexity, batch_size=batch_size,
        loss_bound=loss_bound, delta=delta, bound=bound,
    )  # fmt: skip
    at = functools.lru_cache(maxsize=None)(lambda size: planned_bound(steps, n=size, **problem))
    plan = _plan_answer("train_size", target, bound, at(2).source)
    if not at(2).applicable:
        return plan(None, False, at(2).reason)

    def too_big(size: int) -> bool:
        return _value(at(size)) > target

    if not too_big(2):
        return plan(2, True, "", bound_at_value=at(2).value, note="n = 2 is the smallest size")
    hi = _steps(max_train_size)
    if too_big(hi):
        return plan(None, True, f"even n = {hi} gives {at(hi).value:.6g} > target")
    if regime != "nonconvex" and bound == "stability":
        guess = math.ceil(2 * _value(at(2)) / target)
    else:
        upper = 4
        while too_big(upper):
            upper *= 4
        root = optimize.brentq(
            lambda x: _value(at(x)) - target, max(2, upper / 4), upper, rtol=1e-14
        )
        guess = math.ceil(root)
    best = _last_true(too_big, 2, hi, max(2, min(guess - 1, hi))) + 1
    return plan(best, True, "", bound_at_value=at(best).value)
