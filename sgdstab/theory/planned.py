"""The bounds after T planned steps of a schedule fixed in advance (closed forms and recursions).

Evaluates the bounds of sgdstab.theory.bounds and sgdstab.theory.divergence on a
sgdstab.theory.schedules schedule; numpy, scipy and the standard library only; no torch.
Re-exported by sgdstab.theory.planner, whose inversions call it.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import numpy as np

from .bounds import (
    _PLAIN_SGD,
    HRS,
    Bound,
    _batch_sizes,
    _convex_value,
    _delta,
    _fails,
    _first_excess,
    _holds,
    _non_negative,
    _optional_positive,
    _positive,
    _regime,
    _regime_assumptions,
    _steps,
    _strongly_convex_value,
    _train_size,
    check_regime,
)
from .confidence import high_probability_gap
from .divergence import _SAMPLING, _trajectory, nonconvex_schedule_bound
from .schedules import Schedule, _as_schedule, _Recorded

TARGET_BOUNDS = ("stability", "high_probability")


def _mean_gap_note() -> str:
    return (
        "eps_stab (in expectation over the sampling) used as beta_n: the statement holds for the "
        "gap averaged over the sampling, E_A[R - R_S]"
    )


def planned_bounds(
    horizons: Sequence[int],
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
) -> tuple[Bound, ...]:
    """The bound after T planned steps, for each T in horizons (constant batch size).

    convex: (2 L^2 / n) sum_{t<=T} alpha_t; strongly convex: L * expected_divergence with
    eta_t = 1 - alpha_t gamma (for a constant step size the finite-T sum of strongly_convex_bound);
    nonconvex: nonconvex_schedule_bound. bound='high_probability' passes that eps_stab through
    high_probability_gap. Sources and assumptions: those functions' (HRS 2016 from memory;
    McDiarmid).
    """
    regime, n = _regime(regime), _train_size(n)
    lipschitz = _positive("lipschitz", lipschitz)
    beta = _optional_positive("smoothness", smoothness)
    gamma = _non_negative("strong_convexity", strong_convexity)
    batch = int(_batch_sizes(batch_size, 1)[0])
    loss_bound = _optional_positive("loss_bound", loss_bound)
    if bound not in TARGET_BOUNDS:
        raise ValueError(f"bound must be one of {TARGET_BOUNDS}, got {bound!r}")
    if bound == "high_probability":
        delta = _delta(delta)
    horizons = [_steps(h) for h in horizons]
    sched = _as_schedule(schedule)
    last = max(horizons, default=0)
    if sched.horizon is not None and last > sched.horizon:
        raise ValueError(f"{sched.describe()} defines {sched.horizon} steps, asked for {last}")

    # Every Schedule kind is largest at step 1, so its condition is checked there.
    probe = (
        sched.step_sizes(last)
        if isinstance(sched, _Recorded)
        else np.full(min(last, 1), sched.peak)
    )
    assumptions = _regime_assumptions(regime, lipschitz, beta, gamma) + (_PLAIN_SGD,)
    if regime == "nonconvex" or beta is not None:
        reason = check_regime(regime, probe, beta, gamma)
    elif regime == "strongly_convex" and gamma == 0:
        reason = "strong convexity (gamma) must be declared > 0 in this regime"
    else:
        assumptions += ("step-size condition not checked: smoothness not declared",)
        reason = "" if regime == "convex" else _first_excess(probe, 1 / gamma, "1/gamma")
    if regime == "convex":
        source = f"{HRS}, Thm 3.8 (convex)"
    elif regime == "strongly_convex":
        source = f"{HRS}, growth recursion (Sec. 3), eta = 1 - alpha*gamma"
    else:
        source = f"{HRS}, Lemma 3.11 (t0) with the expected growth recursion"
    if not reason and regime == "nonconvex" and loss_bound is None:
        reason = "loss bound (M) not declared: the t0 argument needs sup f <= M"
    if reason:
        return tuple(_fails(reason, source, assumptions) for _ in horizons)

    if regime == "convex":
        stability = [
            _holds(_convex_value(sched.total_step_size(t), n, lipschitz), source, assumptions)
            for t in horizons
        ]
    elif regime == "strongly_convex" and sched.kind == "constant":
        stability = [
            _holds(_strongly_convex_value(sched.peak, t, n, lipschitz, gamma), source, assumptions)
            for t in horizons
        ]
    elif regime == "strongly_convex":
        a = sched.step_sizes(last)
        curve = lipschitz * _trajectory(1.0 - a * gamma, 2.0 * a * lipschitz / n)
        stability = [_holds(curve[t], source, assumptions + (_SAMPLING,)) for t in horizons]
    else:
        assert beta is not None  # check_regime gave a reason above when smoothness is not declared
        stability = [
            nonconvex_schedule_bound(sched.step_sizes(t), batch, n, lipschitz, beta, loss_bound)
            for t in horizons
        ]
    if bound == "stability":
        return tuple(stability)
    out = []
    for eps in stability:
        high = high_probability_gap(eps.value, n, loss_bound, delta)
        extra = (eps.source, *eps.assumptions, _mean_gap_note())
        out.append(dataclasses.replace(high, assumptions=high.assumptions + extra, t0=eps.t0))
    return tuple(out)


def planned_bound(steps: int, **problem) -> Bound:
    """planned_bounds for one horizon: the bound after `steps` planned steps."""
    return planned_bounds([steps], **problem)[0]
