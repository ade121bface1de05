"""What the tracker refuses at construction: arguments, models and optimizers it cannot mirror,
replacements of another dtype than the training examples."""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import torch
from torch import nn
from torch.nn.parallel import DistributedDataParallel
from torch.utils._pytree import tree_flatten

from ..shadows.errors import LockstepError
from ..shadows.lockstep import Shadow, trainable_parameters
from ..theory.constants import Constants

__all__ = ["check_loop_parts", "check_options", "check_replacement_types",
           "refuse_unmirrorable_modules"]


def check_loop_parts(model: Any, optimizer: Any, loss_fn: Any, step_loss: Any,
                     delta: float) -> None:
    """Refuse a model, optimizer or loss the shadows cannot follow, and a delta outside (0, 1)."""
    if not isinstance(model, nn.Module):
        raise TypeError("model must be a torch.nn.Module")
    if isinstance(model, DistributedDataParallel):
        raise LockstepError(
            "the model is wrapped in DistributedDataParallel: use "
            "sgdstab.DataParallelStabilityTracker(ddp_model, optimizer, ...) on every rank "
            "(the plain StabilityTracker would wait forever on the other ranks' gradients)")
    refuse_unmirrorable_modules(model)
    if not trainable_parameters(model):
        raise ValueError("the model has no trainable parameters (requires_grad=True): there is "
                         "nothing whose stability could be tracked")
    if not isinstance(optimizer, torch.optim.Optimizer):
        raise TypeError("optimizer must be a torch.optim.Optimizer")
    if isinstance(optimizer, torch.optim.LBFGS):
        raise LockstepError("LBFGS steps with a closure that re-evaluates the loss; the "
                            "tracker cannot mirror it")
    if loss_fn is None and step_loss is None:
        raise ValueError("give loss_fn=(outputs, targets) -> loss or "
                         "step_loss=(model, batch) -> loss (or both: step_loss for the "
                         "training steps, loss_fn for the clean per-example readings)")
    if not 0.0 < float(delta) < 1.0 or math.isnan(float(delta)):
        raise ValueError(f"delta must lie in (0, 1), got {delta}")


def check_options(n: int, constants: Any, probe_size: Any, loss_bound: Any,
                  estimate_every: Any) -> None:
    """Refuse fewer than 2 examples and constant or probe options out of range."""
    if n < 2:
        raise ValueError(f"the training set has {n} example(s); neighbouring datasets "
                         "need at least 2")
    if isinstance(constants, str) and constants != "estimate":
        raise ValueError("constants must be a Constants, 'estimate' or None")
    if probe_size is not None and int(probe_size) < 1:   # the default is at least 2
        raise ValueError(f"probe_size must be at least 1, got {probe_size}")
    if loss_bound is not None and not (math.isfinite(float(loss_bound)) and loss_bound > 0):
        raise ValueError(f"loss_bound must be a positive finite number, got {loss_bound}")
    if loss_bound is not None and isinstance(constants, Constants):
        raise ValueError("give loss_bound inside Constants(...) when constants are declared")
    if isinstance(estimate_every, bool) or not isinstance(estimate_every, int) or \
            estimate_every < 1:
        raise ValueError(f"estimate_every must be a whole number >= 1, got {estimate_every!r}")


def check_replacement_types(shadows: list[Shadow], train_set: Any,
                            collate: Callable[[list[Any]], Any],
                            fetch: Callable[[Any, int], Any]) -> None:
    """Refuse a replacement whose tensors have other dtypes than the training examples'
    (a float label where training uses integer labels would be cast silently in the
    shadows' batches and break the epoch-end evaluation)."""
    for shadow in shadows:
        own = collate([fetch(train_set, shadow.spec.index)])
        mine, theirs = tree_flatten(shadow.row)[0], tree_flatten(own)[0]
        for leaf, (a, b) in enumerate(zip(mine, theirs)):
            if isinstance(a, torch.Tensor) and isinstance(b, torch.Tensor) and \
                    a.dtype != b.dtype:
                raise LockstepError(
                    f"{shadow.label}: the replacement for training example "
                    f"{shadow.spec.index} holds {a.dtype} where the training examples hold "
                    f"{b.dtype} (tensor {leaf} of the collated example); the shadow's "
                    "batches would convert it silently (a float label cut to an integer): "
                    "give replacements with the training examples' dtypes")


_PER_CHANNEL = tuple(getattr(torch, name) for name in (
    "per_channel_affine", "per_channel_symmetric", "per_channel_affine_float_qparams")
    if hasattr(torch, name))


def refuse_unmirrorable_modules(model: nn.Module) -> None:
    """Refuse modules the shadows cannot copy: per-channel fake-quantization and observers
    (quantization-aware training) size their buffers at the first forward pass, so a shadow
    started from the main run cannot take them over."""
    for name, module in model.named_modules():
        if not type(module).__module__.startswith("torch.ao.quantization"):
            continue
        if getattr(module, "is_per_channel", False) or \
                getattr(module, "qscheme", None) in _PER_CHANNEL:
            raise LockstepError(
                f"module {name or 'model'} ({type(module).__name__}) quantizes per channel: its "
                "observer buffers change shape at the first forward pass, so the shadows cannot "
                "mirror it; use a per-tensor quantization-aware-training configuration (e.g. "
                "torch.ao.quantization.default_qat_qconfig) while tracking")
