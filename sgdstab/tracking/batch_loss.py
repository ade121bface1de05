"""A batch as leaves (slicing, rebuilding) and the loss as a module of the model's parameters.

Shared by the Lipschitz and smoothness estimators of ``sgdstab.tracking.constants``.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from typing import Any

import torch
from torch import nn

LossFn = Callable[[Any, Any], torch.Tensor]
StepLoss = Callable[[nn.Module, Any], torch.Tensor]


# ---------------------------------------------------------------------------------------------
# Batch structure: leaves, slicing, rebuilding
# ---------------------------------------------------------------------------------------------


def _flatten(batch: Any) -> tuple[list[Any], Callable[[list[Any]], Any]]:
    """Leaves of a nested tuple/list/dict batch and a function rebuilding it from new leaves."""
    if isinstance(batch, Mapping):
        keys = list(batch.keys())
        parts = [_flatten(batch[key]) for key in keys]
        kind: type[Any] = type(batch)

        def rebuild_mapping(leaves: list[Any]) -> Any:
            out, start = {}, 0
            for key, (sub, sub_rebuild) in zip(keys, parts, strict=True):
                out[key] = sub_rebuild(leaves[start : start + len(sub)])
                start += len(sub)
            return out if kind is dict else kind(out)

        return [leaf for sub, _ in parts for leaf in sub], rebuild_mapping
    if isinstance(batch, (tuple, list)):
        parts = [_flatten(item) for item in batch]
        is_namedtuple = isinstance(batch, tuple) and hasattr(batch, "_fields")
        kind = type(batch)

        def rebuild_sequence(leaves: list[Any]) -> Any:
            items, start = [], 0
            for sub, sub_rebuild in parts:
                items.append(sub_rebuild(leaves[start : start + len(sub)]))
                start += len(sub)
            if is_namedtuple:
                return kind(*items)
            return kind(items) if kind in (tuple, list) else tuple(items)

        return [leaf for sub, _ in parts for leaf in sub], rebuild_sequence
    return [batch], lambda leaves: leaves[0]


def _batched(leaf: Any) -> bool:
    return isinstance(leaf, torch.Tensor) and leaf.dim() >= 1


def _batch_size(leaves: list[Any]) -> int:
    sizes = {leaf.shape[0] for leaf in leaves if _batched(leaf)}
    if not sizes:
        raise ValueError("batch contains no tensor with a leading example dimension")
    if len(sizes) > 1:
        raise ValueError(f"batch tensors disagree on the number of examples: {sorted(sizes)}")
    size = sizes.pop()
    if size == 0:
        raise ValueError("batch is empty")
    return size


def _slice_leaves(leaves: list[Any], start: int, stop: int) -> list[Any]:
    return [leaf[start:stop] if _batched(leaf) else leaf for leaf in leaves]


# ---------------------------------------------------------------------------------------------
# The loss as a module of the model's parameters
# ---------------------------------------------------------------------------------------------


class _BatchLoss(nn.Module):
    """``forward(batch)`` = mean loss of ``inner`` on ``batch``, so ``functional_call`` applies."""

    def __init__(self, inner: nn.Module, loss_of_batch: StepLoss) -> None:
        super().__init__()
        self.inner = inner
        self._loss_of_batch = (loss_of_batch,)  # a tuple keeps a Module loss unregistered

    def forward(self, batch: Any) -> torch.Tensor:
        return self._loss_of_batch[0](self.inner, batch)


def _loss_module(
    model: nn.Module, loss_fn: LossFn | None, step_loss: StepLoss | None
) -> _BatchLoss:
    if (loss_fn is None) == (step_loss is None):
        raise ValueError("give exactly one of loss_fn and step_loss")
    if step_loss is not None:
        return _BatchLoss(model, step_loss)
    assert loss_fn is not None  # exactly one of the two was given

    def supervised(inner: nn.Module, batch: Any) -> torch.Tensor:
        inputs, targets = batch
        return loss_fn(inner(inputs), targets)

    return _BatchLoss(model, supervised)


def _trainable(wrapper: _BatchLoss) -> dict[str, torch.Tensor]:
    params = {name: p.detach() for name, p in wrapper.named_parameters() if p.requires_grad}
    if not params:
        raise ValueError("model has no trainable parameters (requires_grad=True)")
    return params


@contextmanager
def _evaluation(model: nn.Module) -> Iterator[None]:
    """Eval mode and saved RNG for the duration; every module's flag restored exactly after."""
    flags = [(module, module.training) for module in model.modules()]
    rng_state = torch.get_rng_state()
    model.eval()
    try:
        with torch.enable_grad():
            yield
    finally:
        for module, flag in flags:
            module.training = flag
        torch.set_rng_state(rng_state)
