"""The stacked engine's loss: every slot's loss on its own targets and its derivative with
respect to the slot's outputs.

For cross-entropy over class indices and for the mean squared error the derivative is taken by
the kernels autograd itself runs for these losses (``_log_softmax_backward_data`` after the
scattered derivative of ``nll_loss``; ``mse_loss_backward``), fed the upstream values autograd
would feed them, but without building and running a graph: at batch 32 the graph and its engine
cost about as much as the loss's arithmetic (~210 against ~125 us a step for 9 runs). The
values are autograd's, bit for bit (tested). Any other loss goes through autograd, slot by slot.
Used by ``handstep``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from .stacking import _CannotBatch

__all__ = ["stacked_targets", "losses_and_gradient"]


def stacked_targets(targets: torch.Tensor, hits: Mapping[int, tuple[np.ndarray, Any]],
                    slots: int) -> torch.Tensor:
    """The batch's targets for every slot, a slot whose swap is in the batch getting its own."""
    if not hits:
        return targets.unsqueeze(0).expand(slots, *targets.shape)
    stacked = targets.unsqueeze(0).repeat(slots, *[1] * targets.dim())
    for j, (_, other) in hits.items():
        stacked[j] = other[1]
    return stacked


def losses_and_gradient(kind: str, loss_fn: Callable[..., torch.Tensor], outputs: torch.Tensor,
                        targets: torch.Tensor, hits: Mapping[int, tuple[np.ndarray, Any]]
                        ) -> tuple[torch.Tensor, torch.Tensor]:
    """Each slot's mean loss (a vector over slots) and the derivative of their sum with respect
    to ``outputs`` ([slots, rows, ...]). ``kind`` is ``chain._known_loss(loss_fn)``."""
    slots, rows = outputs.shape[0], outputs.shape[1]
    stacked = stacked_targets(targets, hits, slots)
    with torch.no_grad():
        if kind == "cross_entropy" and targets.dim() == 1 and not targets.is_floating_point():
            flat = stacked.reshape(-1, 1)
            logp = torch.log_softmax(outputs.reshape(slots * rows, -1), 1)
            try:   # a negative target (ignore_index) is out of range here: autograd's path
                picked = logp.gather(1, flat)
            except RuntimeError:
                picked = None
            if picked is not None:
                losses = picked.neg().view(slots, rows).mean(1)   # nll_loss's values
                upstream = torch.ones(slots * rows, 1, dtype=logp.dtype).div_(rows)
                chosen = torch.zeros_like(logp).scatter_(1, flat, upstream.neg_())
                grad = torch.ops.aten._log_softmax_backward_data(chosen, logp, 1, logp.dtype)
                return losses, grad.view_as(outputs)
        if kind == "mse" and targets.shape == outputs.shape[1:] and \
                targets.dtype == outputs.dtype:
            per = F.mse_loss(outputs, stacked, reduction="none")
            size = per[0].numel()
            losses = per.reshape(slots, -1).mean(1)
            upstream = torch.ones_like(per).div_(size)
            grad = torch.ops.aten.mse_loss_backward(upstream, outputs, stacked, 0)  # 'none'
            return losses, grad
    with torch.enable_grad():
        leaf = outputs.detach().requires_grad_(True)
        values = _autograd_losses(kind, loss_fn, leaf, stacked, targets)
        (grad,) = torch.autograd.grad(values.sum(), leaf)
    return values.detach(), grad


def _autograd_losses(kind: str, loss_fn: Callable[..., torch.Tensor], outputs: torch.Tensor,
                     stacked: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    slots, rows = outputs.shape[0], outputs.shape[1]
    if kind == "cross_entropy" and targets.dim() == 1 and not targets.is_floating_point() \
            and bool((stacked >= 0).all()):
        per = F.cross_entropy(outputs.reshape(slots * rows, -1), stacked.reshape(-1),
                              reduction="none")
        return per.view(slots, rows).mean(1)
    if kind == "mse" and targets.shape == outputs.shape[1:]:
        per = F.mse_loss(outputs, stacked, reduction="none")
        return per.reshape(slots, -1).mean(1)
    values = []
    for j in range(slots):
        value = loss_fn(outputs[j], stacked[j])
        if not isinstance(value, torch.Tensor) or value.numel() != 1:
            raise _CannotBatch("the loss is not a scalar tensor")
        values.append(value.reshape(()))
    return torch.stack(values)
