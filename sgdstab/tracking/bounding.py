"""The constants and bounds at an epoch's end, and the audit of their assumptions.

Called by the epoch's end (``tracking.epoch_end``) through ``tracking.measure``, which
re-exports every name here.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import torch
from torch import nn

from ..shadows.lockstep import squared_distance, trainable_parameters
from ..theory.assessment import (
    GroupSettings,
    assumption_breaches,
    effective_constants,
    groups_reason,
    loss_bound_reason,
    reading_fields,
    run_bounds,
)
from ..theory.constants import Constants
from ..theory.history import StepHistory

__all__ = ["ESTIMATE_ANYWAY", "estimation_skipped", "constants_rows", "estimate_constants",
           "epoch_bounds", "audit_assumptions", "breach_causes"]


# -- constants ----------------------------------------------------------------------------------
# estimate_options key asking for estimates even where no bound can use them.
ESTIMATE_ANYWAY = "even_if_not_applicable"


def estimation_skipped(optimizer_reason: str, options: dict[str, Any]) -> bool:
    """Whether constants='estimate' skips the estimation: the optimizer puts every bound out of
    reach (``optimizer_reason`` non-empty: momentum, Nesterov, Adam, ...) and the user did not
    ask for estimates anyway (``estimate_options={ESTIMATE_ANYWAY: True}``). Estimating costs
    several forward and backward passes per epoch (measured at 75 % of training 8 shadows with
    momentum), for numbers nothing would read."""
    return bool(optimizer_reason) and not options.get(ESTIMATE_ANYWAY, False)


def constants_rows(n: int, size: int, seed: int) -> np.ndarray:
    """The seeded training indices the constants are estimated on (``min(size, n)`` of them)."""
    return np.random.default_rng(seed + 2).choice(n, size=min(size, n), replace=False)


def estimate_constants(model: nn.Module, batch: Any, previous: Constants | None, *,
                       loss_fn: Callable[..., torch.Tensor] | None,
                       step_loss: Callable[[nn.Module, Any], torch.Tensor] | None,
                       loss_bound: float | None, options: dict[str, Any]) -> Constants:
    """Estimate the constants on ``batch`` and merge them into ``previous`` (running maximum)."""
    options = {key: value for key, value in options.items() if key != ESTIMATE_ANYWAY}
    fresh = Constants.estimate(model, batch, loss_fn=loss_fn, step_loss=step_loss,
                               loss_bound=loss_bound, **options)
    return fresh if previous is None else previous.merged_max(fresh)


# -- bounds and the assumption audit ------------------------------------------------------------
def epoch_bounds(constants: Constants | None, divergence: Sequence[float], notes: list[str], *,
                 history: StepHistory, n: int, delta: float, groups: GroupSettings | None,
                 optimizer_reason: str, model: nn.Module, warned: bool,
                 category: type[Warning], loss_seen: float | None = None
                 ) -> tuple[dict[str, Any], bool]:
    """The reading's bound fields for the run so far, and whether a measured divergence broke
    its pathwise bound this epoch (``category`` warning the first time, unless ``warned``).

    Warns with ``stacklevel=4``: call it straight from the method the user called.
    """
    if constants is None and optimizer_reason:
        notes.append(f"bounds not applicable: {optimizer_reason}; no constants are estimated "
                     "for them (constants='estimate' with estimate_options="
                     f"{{'{ESTIMATE_ANYWAY}': True}} estimates them anyway)")
        return {}, False
    if constants is None:
        notes.append("bounds not computed: no constants given (constants=Constants(...) or "
                     "'estimate')")
        return {}, False
    effective = effective_constants(constants, groups)
    result = run_bounds(history, n, effective, delta, optimizer_reason or groups_reason(groups),
                        loss_seen)
    m_reason = loss_bound_reason(effective, loss_seen)
    if m_reason:
        notes.append(m_reason)
    if effective.source != "declared":
        notes.append("bounds use ESTIMATED constants (lower estimates of L and beta): they "
                     "are indicative, not certified")
    violated = audit_assumptions(result, divergence, effective, model, notes, warned, category,
                                 groups)
    return reading_fields(result, effective, violated, n=n, delta=delta), violated


def audit_assumptions(result: Any, divergence: Sequence[float], constants: Constants,
                      model: nn.Module, notes: list[str], warned: bool,
                      category: type[Warning], groups: GroupSettings | None = None) -> bool:
    """Whether a convex run's measured divergences exceed their pathwise bounds (a note each
    time, a ``category`` warning unless ``warned``). Warns with ``stacklevel=4``, i.e. at the
    caller of the method that called ``epoch_bounds``."""
    if constants.regime not in ("convex", "strongly_convex") or not result.path_applicable:
        return False
    norm = math.sqrt(sum(squared_distance(p) for _, p in trainable_parameters(model)))
    broken = assumption_breaches(divergence, result.path_bound, norm)
    if not broken:
        return False
    notes.append("assumption audit failed: " + "; ".join(broken))
    if not warned:
        warnings.warn(
            "ASSUMPTIONS VIOLATED: a shadow's measured divergence exceeds its pathwise bound ("
            + "; ".join(broken) + "), so this run's bounds do not hold. Likely causes, most "
            "likely first: " + "; ".join(breach_causes(constants, groups)) + ".",
            category, stacklevel=4)
    return True


def breach_causes(constants: Constants, groups: GroupSettings | None) -> list[str]:
    """The likely causes of a pathwise-bound breach, in the order to check them."""
    causes = [
        "(1) the loss given to the tracker is not the per-example loss averaged over the batch "
        "(a sum-reduced or rescaled loss multiplies the gradient, so L and beta must be "
        "multiplied too)",
    ]
    if groups is not None and groups.several:
        causes.append(
            f"(2) the optimizer's parameter groups differ (step-size ratios "
            f"{list(groups.ratios or ())}, weight decays {list(groups.decays or ())}); the "
            f"bounds use the per-group rule with beta = {constants.smoothness:.6g} and "
            f"gamma = {constants.strong_convexity:.6g}: check that every group's parameters "
            "belong to the declared loss")
    causes += [
        f"({len(causes) + 1}) the declared constants are too small for this loss and data "
        f"(L = {constants.lipschitz:.6g}, beta = {constants.smoothness:.6g}, gamma = "
        f"{constants.strong_convexity:.6g} after weight decay): e.g. features larger than the "
        "norm the constants assume",
        f"({len(causes) + 2}) the loss is not {constants.regime.replace('_', ' ')} in the "
        "parameters (a hidden layer or a non-convex head makes it non-convex)",
        f"({len(causes) + 3}) the shadows do not compute the main run's loss (augmentation or "
        "clipping outside step_loss / before_step; the null-swap audit would show it)",
    ]
    return causes
