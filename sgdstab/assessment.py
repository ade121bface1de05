"""What a recorded run implies: applicability to the optimizer, constants, bounds, audit.

Pure functions between the tracker's record (``StepHistory``) and the published bounds
(``sgdstab.divergence.assess_run``); the tracker only calls them and warns.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import torch

from .constants import Constants
from .history import StepHistory

__all__ = ["optimizer_reason", "effective_constants", "run_bounds", "assumption_breaches",
           "reading_fields"]

#: Relative and absolute (times 1 + ||w||) slack for float round-off in the assumption audit.
AUDIT_RTOL = 1e-5
AUDIT_ATOL = 1e-6


def optimizer_reason(optimizer: torch.optim.Optimizer) -> str:
    """Why the published bounds do not apply to this optimizer ('' when they do).

    The bounds (Hardt, Recht & Singer 2016) are proved for plain SGD; momentum, Nesterov,
    adaptive methods and maximisation are outside them.
    """
    if type(optimizer) is not torch.optim.SGD:
        return (f"optimizer is {type(optimizer).__name__}: the bounds are proved for plain SGD "
                "(the tracker still measures)")
    for group in optimizer.param_groups:
        if group.get("momentum", 0):
            return (f"SGD with momentum {group['momentum']}: the bounds are proved for plain SGD "
                    "(the tracker still measures)")
        if group.get("nesterov", False):
            return "SGD with Nesterov momentum: the bounds are proved for plain SGD"
        if group.get("maximize", False):
            return "SGD with maximize=True: the bounds are stated for minimisation"
    return ""


def effective_constants(constants: Constants, optimizer: torch.optim.Optimizer) -> Constants:
    """Fold SGD's weight decay lambda (largest over groups) into the constants (HRS 2016 Sec. 2)."""
    decay = max(float(g.get("weight_decay", 0.0) or 0.0) for g in optimizer.param_groups)
    return constants.with_weight_decay(decay) if decay > 0 else constants


def run_bounds(history: StepHistory, n: int, constants: Constants, delta: float,
               reason: str) -> Any:
    """Every bound for the recorded run (``sgdstab.divergence.RunBounds``)."""
    from .divergence import assess_run

    return assess_run(
        regime=constants.regime, step_sizes=history.step_sizes(),
        batch_sizes=history.batch_sizes(), n=n, lipschitz=constants.lipschitz,
        smoothness=constants.smoothness, strong_convexity=constants.strong_convexity,
        loss_bound=constants.loss_bound, shadow_hits=history.shadow_hits(),
        batch_indices=history.flat_indices(), delta=delta, not_applicable_reason=reason)


def assumption_breaches(divergence: Sequence[float], path_bound: Sequence[float | None],
                        parameter_norm: float) -> list[str]:
    """Shadows whose measured divergence exceeds their pathwise bound beyond round-off.

    In the convex and strongly convex regimes the pathwise bound is a theorem (for the declared
    constants), so a breach means the constants or the convexity are wrong for this run.
    """
    slack = AUDIT_ATOL * (1.0 + parameter_norm)
    return [f"shadow_{k}: measured {measured:.6g} > bound {bound:.6g}"
            for k, (measured, bound) in enumerate(zip(divergence, path_bound))
            if bound is not None and measured > bound * (1 + AUDIT_RTOL) + slack]


def reading_fields(result: Any, constants: Constants, violated: bool) -> dict[str, Any]:
    """The EpochReading fields that come from the bounds."""
    return {
        "path_bound": tuple(result.path_bound),
        "expected_bound": result.expected.value,
        "high_probability_gap": result.high_probability.value,
        "uniform_stability": result.uniform_stability.value,
        "bounds": result.to_dict(),
        "constants": constants.to_dict(),
        "assumption_violated": violated,
    }
