"""Whether the published bounds cover the user's optimizer (needs torch, so it lives here)."""

from __future__ import annotations

import torch

__all__ = ["optimizer_reason"]


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
