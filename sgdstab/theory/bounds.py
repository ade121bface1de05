"""Published stability bounds for SGD in closed form (high-probability conversion re-exported).

Pure functions of numpy arrays; imports only numpy, scipy and the standard library, so it loads
without torch. No function writes into its arguments. Notation follows Hardt, Recht & Singer 2016:
step t (counted from 1) has step size alpha_t and batch size b_t, n training examples, the loss is
L-Lipschitz, beta-smooth, optionally gamma-strongly convex, with values in [0, M].

This module is also the base of the modules built on it, whose names stay importable from here:
sgdstab.theory.confidence (the high-probability conversion), sgdstab.theory.expansion
(expansivity of one step), sgdstab.theory.divergence (the divergence recursions, the non-convex t0
bound of a schedule, a recorded run's bounds), sgdstab.theory.schedules (step-size schedules),
sgdstab.theory.planned (planned bounds) and sgdstab.theory.planner (their inversions).

Provenance (what was checked with the search tool, and what is from memory):
- Hardt, Recht & Singer 2016, "Train faster, generalize better: stability of stochastic gradient
  descent": the theorem statements used here are FROM MEMORY. The stored copies of the paper
  (arXiv 1509.01240 on arxiv-vanity / ar5iv) came back only as their opening pages, not the
  theorem bodies, so theorem numbers are not given. A secondary restatement found with the search
  tool (zhenhuan-yang.github.io, "Algorithmic stability of SGD", 2020) agrees with the convex
  recursion (alpha_t <= 2/beta, increments 2 alpha_t L / n), the strongly convex one
  (alpha <= 1/beta, factor 1 - alpha gamma, limit 2L/(gamma n) on the divergence), the non-convex
  t0 lemma and the choice of t0 behind the non-convex closed form. The tests re-derive each
  closed form by hand.
- Bousquet & Elisseeff 2002 and McDiarmid: see sgdstab.theory.confidence.
"""

from __future__ import annotations

import importlib
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

REGIMES = ("convex", "strongly_convex", "nonconvex")

HRS = 'Hardt, Recht & Singer 2016, "Train faster, generalize better"'
FROM_MEMORY = "(statement from memory)"
BOUSQUET_ELISSEEFF = 'Bousquet & Elisseeff 2002, "Stability and generalization", Thm 12'
MCDIARMID = ("McDiarmid's bounded-differences inequality (McDiarmid 1989) on the gap, as in "
             "Bousquet & Elisseeff 2002, Sec. 3")

_RTOL = 1e-12  # step-size conditions are checked up to this relative round-off
_PLAIN_SGD = "plain SGD (no momentum, no adaptive step sizes)"


@dataclass(frozen=True)
class Bound:
    """A published bound evaluated on given inputs, with its source and assumptions."""

    value: float | None  # None when not applicable
    applicable: bool
    reason: str  # why not applicable ('' when applicable)
    source: str
    assumptions: tuple[str, ...]
    t0: int | None = None  # nonconvex_schedule_bound: the t0 that gave the value

    def to_dict(self) -> dict:
        return {
            "value": None if self.value is None else float(self.value),
            "applicable": self.applicable,
            "reason": self.reason,
            "source": self.source,
            "assumptions": list(self.assumptions),
            "t0": self.t0,
        }


def _holds(value: float, source: str, assumptions: Sequence[str], t0: int | None = None) -> Bound:
    return Bound(float(value), True, "", source, tuple(assumptions), t0)


def _fails(reason: str, source: str, assumptions: Sequence[str]) -> Bound:
    return Bound(None, False, reason, source, tuple(assumptions))


# ---------------------------------------------------------------------------------------------
# Input checks (ValueError with a clear message)


def _positive(name: str, value: float) -> float:
    x = float(value)
    if not (math.isfinite(x) and x > 0):
        raise ValueError(f"{name} must be a finite number > 0, got {value!r}")
    return x


def _optional_positive(name: str, value: float | None) -> float | None:
    return None if value is None else _positive(name, value)


def _non_negative(name: str, value: float) -> float:
    x = float(value)
    if not (math.isfinite(x) and x >= 0):
        raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")
    return x


def _train_size(n: float) -> float:
    x = float(n)
    if not (math.isfinite(x) and x >= 2):
        raise ValueError(f"n (training-set size) must be >= 2, got {n!r}")
    return x


def _integer_train_size(n: int) -> int:
    x = _train_size(n)
    if x != int(x):
        raise ValueError(f"n (training-set size) must be an integer, got {n!r}")
    return int(x)


def _delta(delta: float) -> float:
    x = float(delta)
    if not 0 < x < 1:
        raise ValueError(f"delta must lie in (0, 1), got {delta!r}")
    return x


def _regime(regime: str) -> str:
    if regime not in REGIMES:
        raise ValueError(f"regime must be one of {REGIMES}, got {regime!r}")
    return regime


def _steps(steps: int) -> int:
    if isinstance(steps, bool) or int(steps) != steps or steps < 0:
        raise ValueError(f"steps must be an integer >= 0, got {steps!r}")
    return int(steps)


def _step_sizes(step_sizes: Sequence[float] | np.ndarray) -> np.ndarray:
    a = np.asarray(step_sizes, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"step sizes must be a 1-D sequence, got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError("step sizes must be finite numbers")
    if np.any(a < 0):
        t = int(np.flatnonzero(a < 0)[0])
        raise ValueError(f"step sizes must be >= 0: step {t + 1} has {a[t]!r}")
    return a


def _integers(name: str, values: Sequence[int] | np.ndarray | int) -> np.ndarray:
    x = np.asarray(values)
    if x.dtype.kind in "iu":
        return x.astype(np.int64, copy=False)
    if x.size and (
        x.dtype.kind not in "fb" or not np.all(np.isfinite(x)) or np.any(x != np.round(x))
    ):
        raise ValueError(f"{name} must be integers")
    return x.astype(np.int64)


def _batch_sizes(batch_sizes: Sequence[int] | np.ndarray | int, steps: int) -> np.ndarray:
    b = _integers("batch sizes", batch_sizes)
    if b.ndim == 0:
        b = np.full(steps, int(b), dtype=np.int64)
    if b.shape != (steps,):
        raise ValueError(f"batch sizes must have one entry per step ({steps}), got shape {b.shape}")
    if np.any(b < 1):
        raise ValueError("batch sizes must be >= 1")
    return b


# ---------------------------------------------------------------------------------------------
# Regime conditions (HRS 2016 Sec. 2-3, from memory)


def _first_excess(a: np.ndarray, limit: float, label: str) -> str:
    over = np.flatnonzero(a > limit * (1 + _RTOL))
    if over.size == 0:
        return ""
    t = int(over[0])
    more = f" ({over.size} steps exceed it)" if over.size > 1 else ""
    return f"step size {a[t]:.6g} at step {t + 1} exceeds {label} = {limit:.6g}{more}"


def check_regime(
    regime: str,
    step_sizes: Sequence[float] | np.ndarray,
    smoothness: float | None,
    strong_convexity: float = 0.0,
) -> str:
    """'' if the expansivity conditions of the regime hold at every step, else the reason.

    convex: alpha_t <= 2/beta; strongly_convex: 0 < gamma <= beta and alpha_t <= 2/(beta + gamma);
    nonconvex: beta declared (any step size). Source: HRS 2016 (from memory).
    Steps are counted from 1 in the message.
    """
    regime = _regime(regime)
    a = _step_sizes(step_sizes)
    if smoothness is None:
        return "smoothness (beta) not declared: the expansivity conditions cannot be checked"
    beta = _positive("smoothness", smoothness)
    if regime == "nonconvex":
        return ""
    if regime == "convex":
        return _first_excess(a, 2.0 / beta, "2/beta")
    gamma = float(strong_convexity)
    if not (math.isfinite(gamma) and gamma > 0):
        return f"strong convexity (gamma) must be declared > 0, got {strong_convexity!r}"
    if gamma > beta * (1 + _RTOL):
        return f"strong convexity gamma = {gamma:.6g} exceeds smoothness beta = {beta:.6g}"
    return _first_excess(a, 2.0 / (beta + gamma), "2/(beta+gamma)")


# ---------------------------------------------------------------------------------------------
# Closed forms (HRS 2016, statements from memory)


def _regime_assumptions(regime: str, lipschitz: float, smoothness: float | None, gamma: float):
    beta = "not declared" if smoothness is None else f"{smoothness:.6g}"
    if regime == "convex":
        return (
            f"f(.; z) convex, L-Lipschitz (L = {lipschitz:.6g}), beta-smooth (beta = {beta})",
            "alpha_t <= 2/beta at every step",
        )
    if regime == "strongly_convex":
        return (
            f"f(.; z) gamma-strongly convex (gamma = {gamma:.6g}), beta-smooth (beta = {beta})",
            f"L = {lipschitz:.6g} bounds the gradient over the region the iterates stay in "
            "(the paper projects onto a bounded convex set)",
            "alpha_t <= 2/(beta+gamma) at every step",
        )
    return (f"f(.; z) beta-smooth (beta = {beta}), L-Lipschitz (L = {lipschitz:.6g}), not convex",)


def _convex_value(total_step_size: float, n: float, lipschitz: float) -> float:
    return 2.0 * lipschitz**2 / n * total_step_size


def convex_bound(
    step_sizes: Sequence[float] | np.ndarray,
    n: float,
    lipschitz: float,
    *,
    smoothness: float | None = None,
) -> Bound:
    """eps_stab <= (2 L^2 / n) * sum_t alpha_t.

    Source: HRS 2016, convex case (statement from memory). Assumes f(.; z) convex, L-Lipschitz,
    beta-smooth, alpha_t <= 2/beta (checked when smoothness is given), plain SGD, uniform sampling.
    """
    a = _step_sizes(step_sizes)
    n, lipschitz = _train_size(n), _positive("lipschitz", lipschitz)
    source = f"{HRS}, Thm 3.8 (convex)"
    assumptions = _regime_assumptions("convex", lipschitz, smoothness, 0.0) + (_PLAIN_SGD,)
    if smoothness is not None:
        reason = check_regime("convex", a, smoothness)
        if reason:
            return _fails(reason, source, assumptions)
    else:
        assumptions += ("alpha_t <= 2/beta not checked: smoothness not declared",)
    return _holds(_convex_value(float(a.sum()), n, lipschitz), source, assumptions)


def _strongly_convex_value(
    alpha: float, steps: int | None, n: float, lipschitz: float, gamma: float
):
    limit = 2.0 * lipschitz**2 / (gamma * n)
    if steps is None:
        return limit
    if steps == 0 or alpha == 0:
        return 0.0
    # (2 alpha L^2 / n) sum_{k<T} (1 - alpha gamma)^k = limit (1 - (1 - alpha gamma)^T), accurately.
    with np.errstate(divide="ignore"):
        return limit * -math.expm1(steps * np.log1p(-alpha * gamma))


def strongly_convex_bound(
    step_size: float,
    n: float,
    lipschitz: float,
    strong_convexity: float,
    steps: int | None = None,
    smoothness: float | None = None,
) -> Bound:
    """eps_stab <= 2 L^2 / (gamma n); steps = T: (2 alpha L^2 / n) sum_{k<T} (1 - alpha gamma)^k.

    Source: HRS 2016, strongly convex case with constant step size (statement from memory).
    Assumes f(.; z) gamma-strongly convex and beta-smooth, alpha <= 1/beta (checked when smoothness
    is given; alpha <= 1/gamma always), L the gradient bound over the iterates' region (projected
    SGD), plain SGD, uniform sampling.
    """
    alpha = _non_negative("step size", step_size)
    n, lipschitz = _train_size(n), _positive("lipschitz", lipschitz)
    gamma = _positive("strong_convexity", strong_convexity)
    steps = None if steps is None else _steps(steps)
    source = f"{HRS}, Thm 3.10 (strongly convex)"
    assumptions = _regime_assumptions("strongly_convex", lipschitz, smoothness, gamma)[:2] + (
        "constant step size alpha <= 1/beta",
        _PLAIN_SGD,
    )
    if smoothness is not None:
        beta = _positive("smoothness", smoothness)
        if gamma > beta * (1 + _RTOL):
            reason = f"strong convexity gamma = {gamma:.6g} exceeds smoothness beta = {beta:.6g}"
            return _fails(reason, source, assumptions)
        if alpha > (1 + _RTOL) / beta:
            reason = f"step size {alpha:.6g} exceeds 1/beta = {1 / beta:.6g}"
            return _fails(
                reason + " (the strongly convex theorem's condition)", source, assumptions
            )
    else:
        assumptions += ("alpha <= 1/beta not checked: smoothness not declared",)
        if alpha * gamma > 1 + _RTOL:
            reason = f"step size {alpha:.6g} exceeds 1/gamma = {1 / gamma:.6g} >= 1/beta"
            return _fails(reason, source, assumptions)
    return _holds(_strongly_convex_value(alpha, steps, n, lipschitz, gamma), source, assumptions)


def nonconvex_bound(
    c: float,
    steps: int,
    n: float,
    lipschitz: float,
    smoothness: float,
    *,
    step_sizes: Sequence[float] | np.ndarray | None = None,
) -> Bound:
    """eps_stab <= (1 + 1/(beta c)) / (n - 1) (2 c L^2)^(1/(beta c + 1)) T^(beta c/(beta c + 1)).

    Source: HRS 2016, non-convex case (statement from memory). Assumes f(.; z) in [0, 1],
    L-Lipschitz, beta-smooth, alpha_t <= c/t non-increasing (checked when step_sizes is given),
    plain SGD sampling one example uniformly per step.
    """
    c, steps = _positive("c", c), _steps(steps)
    n, lipschitz = _train_size(n), _positive("lipschitz", lipschitz)
    beta = _positive("smoothness", smoothness)
    source = f"{HRS}, Thm 3.12 (non-convex)"
    assumptions: tuple[str, ...] = (
        f"f(.; z) in [0, 1], L-Lipschitz (L = {lipschitz:.6g}), beta-smooth (beta = {beta:.6g})",
        f"alpha_t <= c/t (c = {c:.6g}) and non-increasing",
        _PLAIN_SGD,
    )
    if step_sizes is not None:
        a = _step_sizes(step_sizes)
        if a.size != steps:
            raise ValueError(f"step_sizes has {a.size} entries for steps = {steps}")
        limit = c / np.arange(1, steps + 1)
        over = np.flatnonzero(a > limit * (1 + _RTOL))
        if over.size:
            t = int(over[0])
            reason = f"step size {a[t]:.6g} at step {t + 1} exceeds c/t = {limit[t]:.6g}"
            return _fails(reason, source, assumptions)
        rising = np.flatnonzero(np.diff(a) > 0)
        if rising.size:
            t = int(rising[0]) + 1
            reason = f"step sizes increase at step {t + 1} ({a[t - 1]:.6g} -> {a[t]:.6g})"
            return _fails(reason, source, assumptions)
    else:
        assumptions += ("alpha_t <= c/t not checked: step sizes not given",)
    q = beta * c
    value = (1 + 1 / q) / (n - 1) * (2 * c * lipschitz**2) ** (1 / (q + 1)) * steps ** (q / (q + 1))
    return _holds(value, source, assumptions)


# ---------------------------------------------------------------------------------------------
# Names defined in the modules built on this one, importable from here on first use

_ELSEWHERE = {
    **dict.fromkeys(("high_probability_gap", "bousquet_elisseeff_gap"), "confidence"),
    **dict.fromkeys(("expansion_convex", "expansion_strongly_convex", "expansion_smooth"),
                    "expansion"),
    **dict.fromkeys(
        ("expected_divergence", "pathwise_divergence", "all_index_pathwise",
         "nonconvex_schedule_bound", "RunBounds", "assess_run"),
        "divergence",
    ),
    **dict.fromkeys(("SCHEDULE_KINDS", "Schedule"), "schedules"),
    **dict.fromkeys(("TARGET_BOUNDS", "planned_bounds", "planned_bound"), "planned"),
    **dict.fromkeys(("PlanAnswer", "max_steps", "max_step_size", "min_train_size"), "planner"),
}  # fmt: skip


def __getattr__(name: str) -> Any:
    # Resolved on first use (PEP 562): those modules import from this one, so importing them here
    # at load time would make `import sgdstab.theory.planner` fail when it is the first import.
    if name not in _ELSEWHERE:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{_ELSEWHERE[name]}", __package__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_ELSEWHERE))
