"""The Lipschitz estimate: per-example gradient norms (torch.func.vmap over torch.func.grad).

The largest norm over a probe batch, a LOWER and local estimate of L (see
``sgdstab.tracking.constants``, which re-exports ``estimate_lipschitz``).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from typing import Any

import torch
from torch import nn
from torch.func import functional_call, grad, vmap

from .batch_loss import (
    LossFn,
    StepLoss,
    _batch_size,
    _batched,
    _BatchLoss,
    _evaluation,
    _flatten,
    _loss_module,
    _slice_leaves,
    _trainable,
)

# ---------------------------------------------------------------------------------------------
# Per-example gradient norms and the Lipschitz estimate
# ---------------------------------------------------------------------------------------------


def _norms_vmap(
    wrapper: _BatchLoss, params: dict[str, torch.Tensor], leaves: list[Any],
    rebuild: Callable[[list[Any]], Any], n: int, chunk_size: int,
) -> torch.Tensor:
    mapped = [_batched(leaf) for leaf in leaves]
    in_dims = [0 if flag else None for flag in mapped]

    def example_norm(p: dict[str, torch.Tensor], example_leaves: list[Any]) -> torch.Tensor:
        one = [
            leaf.unsqueeze(0) if flag else leaf
            for leaf, flag in zip(example_leaves, mapped, strict=True)
        ]
        example = rebuild(one)
        grads = grad(lambda q: functional_call(wrapper, q, (example,)))(p)
        return torch.stack([g.pow(2).sum() for g in grads.values()]).sum().sqrt()

    batched_norm = vmap(example_norm, in_dims=(None, in_dims))
    out = [
        batched_norm(params, _slice_leaves(leaves, start, min(start + chunk_size, n)))
        for start in range(0, n, chunk_size)
    ]
    return torch.cat(out)


def _norms_loop(
    wrapper: _BatchLoss, params: dict[str, torch.Tensor], leaves: list[Any],
    rebuild: Callable[[list[Any]], Any], n: int,
) -> torch.Tensor:
    leaf_params = {name: p.clone().requires_grad_(True) for name, p in params.items()}
    inputs = list(leaf_params.values())
    out = []
    for i in range(n):
        example = rebuild(_slice_leaves(leaves, i, i + 1))
        loss = functional_call(wrapper, leaf_params, (example,))
        grads = torch.autograd.grad(loss, inputs, allow_unused=True)
        squares = [g.pow(2).sum() for g in grads if g is not None]
        total = torch.stack(squares).sum() if squares else loss.new_zeros(())
        out.append(total.sqrt().detach())
    return torch.stack(out)


def per_example_gradient_norms(
    model: nn.Module,
    batch: Any,
    *,
    loss_fn: LossFn | None = None,
    step_loss: StepLoss | None = None,
    chunk_size: int = 128,
) -> torch.Tensor:
    """``||grad_w f(w; z_i)||_2`` for every example of ``batch`` (1-D tensor, length n).

    Gradients over all trainable parameters flattened into one vector, in eval mode, via
    ``torch.func.vmap(grad(...))`` in chunks; falls back to one backward per example (with a
    warning) when vmap cannot trace the model. Model, buffers, ``.grad``, training flags and
    torch's global RNG state are left as they were.
    """
    if chunk_size < 1:
        raise ValueError(f"chunk_size must be >= 1, got {chunk_size!r}")
    wrapper = _loss_module(model, loss_fn, step_loss)
    leaves, rebuild = _flatten(batch)
    n = _batch_size(leaves)
    with _evaluation(model):
        params = _trainable(wrapper)
        try:
            norms = _norms_vmap(wrapper, params, leaves, rebuild, n, chunk_size)
        except Exception as error:  # vmap cannot trace every model; the loop can
            warnings.warn(
                f"per-example gradients: vmap failed ({type(error).__name__}: {error}); "
                "falling back to one backward pass per example",
                RuntimeWarning,
                stacklevel=2,
            )
            norms = _norms_loop(wrapper, params, leaves, rebuild, n)
    return norms.detach()


def estimate_lipschitz(
    model: nn.Module,
    batch: Any,
    *,
    loss_fn: LossFn | None = None,
    step_loss: StepLoss | None = None,
    chunk_size: int = 128,
) -> float:
    """Largest per-example gradient norm on ``batch`` at the current parameters (common practice).

    A LOWER estimate of the Lipschitz constant L: the true L is a supremum over all examples
    and all parameters the iterates visit, of which this sees one batch at one point.
    """
    norms = per_example_gradient_norms(
        model, batch, loss_fn=loss_fn, step_loss=step_loss, chunk_size=chunk_size
    )
    return float(norms.max())
