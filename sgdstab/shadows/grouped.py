"""The grouped optimizer step: which optimizers one foreach step may serve for many shadows, and
the state view that lets one optimizer step them. ``PerShadowEngine`` (``shadows.lockstep``, which
re-exports the public names) decides when to use it.
"""

from __future__ import annotations

from typing import Any

import torch
from torch import nn

__all__ = ["GROUPED_OPTIMIZERS", "GROUPED_STEP_BYTES", "grouped_step_refusal"]

# Optimizers (exact classes) whose foreach step over many runs' parameters at once was checked to
# give every parameter the very bits that stepping each run with its own optimizer gives, with
# either kernel path (tests/test_grouped_step.py steps both side by side over several steps). On CPU
# torch's foreach ops loop over the tensors with the same per-tensor kernels.
# NAdam, RAdam and ASGD are left out: their foreach steps differed in the last bits (2.6e-7,
# 7.5e-9 and 1.5e-7 after six steps of a small CNN, torch 2.13 CPU).
GROUPED_OPTIMIZERS: tuple[type[torch.optim.Optimizer], ...] = (
    torch.optim.SGD, torch.optim.Adam, torch.optim.AdamW, torch.optim.RMSprop,
    torch.optim.Adagrad, torch.optim.Adamax, torch.optim.Adadelta, torch.optim.Rprop,
)

# The per-shadow engine steps shadows together only while their gradients, all alive at once
# until the one step, stay within this many bytes: the saving is Python and call overhead per
# optimizer call, which matters for small models only.
GROUPED_STEP_BYTES = 4 << 20


class _OwnersState(dict):  # type: ignore[type-arg]
    """A grouped optimizer's state: each parameter's entry is the one its shadow's own optimizer
    holds (looked up at every access, so forks and checkpoint loads that replace a shadow
    optimizer's state are followed)."""

    def __init__(self, owners: dict[int, torch.optim.Optimizer]) -> None:
        super().__init__()
        self.owners = owners

    def __getitem__(self, p: Any) -> Any:
        return self.owners[id(p)].state[p]

    def get(self, p: Any, default: Any = None) -> Any:
        state = self.owners[id(p)].state
        return state[p] if p in state else default

    def __contains__(self, p: object) -> bool:
        owner = self.owners.get(id(p))
        return owner is not None and p in owner.state


def _plain_setting(value: Any) -> bool:
    if value is None or isinstance(value, (bool, int, float, str)):
        return True
    return isinstance(value, tuple) and all(isinstance(v, (int, float)) for v in value)


def grouped_step_refusal(model: nn.Module, optimizer: torch.optim.Optimizer) -> str:
    """Why the per-shadow engine must call each shadow's optimizer on its own ('' when one
    foreach step of the optimizer's class over all shadows' parameters gives the same bits)."""
    if type(optimizer) not in GROUPED_OPTIMIZERS:
        return f"{type(optimizer).__name__} is not checked for grouped stepping"
    for group in optimizer.param_groups:
        for key in ("fused", "differentiable", "capturable"):
            if group.get(key):
                return f"the optimizer is {key}"
        if not all(_plain_setting(v) for k, v in group.items() if k != "params"):
            return "a setting is not a plain number (a tensor step size?)"
    for module in model.modules():
        if isinstance(module, (nn.Embedding, nn.EmbeddingBag)) and module.sparse:
            return "an embedding has sparse gradients"
    return ""


def _optimizer_hooks(optimizer: torch.optim.Optimizer) -> bool:
    """Whether step hooks would run around ``optimizer.step()`` (its own or global ones)."""
    from torch.optim import optimizer as module

    return bool(getattr(module, "_global_optimizer_pre_hooks", True)) or \
        bool(getattr(module, "_global_optimizer_post_hooks", True)) or \
        bool(optimizer._optimizer_step_pre_hooks) or bool(optimizer._optimizer_step_post_hooks)
