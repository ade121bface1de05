"""Choosing the shadow engine: stacked, per-shadow, or batched (vmap).

``"per_shadow"`` steps each shadow as its own module with its own optimizer: exact for any
optimizer and model. ``"stacked"`` (``sgdstab.shadows.stacked``) steps all forked shadows of a
model made of Linear layers and element-wise activations as batched matrix products with a
hand-written backward; ``"batched"`` (``sgdstab.shadows.batched``) steps them together with
``vmap`` for other models that are pure functions of their parameters. Both stacked engines need
an element-wise optimizer and fall back to per-shadow stepping, with an ``EngineFallbackWarning``
saying why, for anything they cannot follow.

``"auto"`` takes the stacked engine where it can run and times it against per-shadow stepping on
the run's own batch at the first step after the shadows fork, keeping the faster
(``StackedEngine.choice`` says which and why); every other model steps one by one. It never
picks the vmap engine: vmap's batched kernels need not round every slot alike (a Conv1d model
measured a null-swap drift of 3e-8 from its reference, and a 4-feature softmax model was
reported to drift 2e-17 to 2e-16 on 3 of 22 runs), so its null-swap audit is not guaranteed
exact, and it measured no faster than per-shadow stepping in ``benchmarks/overhead.py``.
"""

from __future__ import annotations

import functools
import os
import warnings
from collections.abc import Callable
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn
from torch.func import vmap

from .batched import BatchedEngine, EngineFallbackWarning
from .lockstep import LockstepError, LossOf, PerShadowEngine
from .stacked import AUTO_OVERRIDE_VARIABLE, StackedEngine, stacked_refusal

__all__ = ["make_engine", "batched_refusal", "stacked_refusal", "replayed_dropout_kinds",
           "ENGINES", "ELEMENTWISE_OPTIMIZERS", "AUTO_OVERRIDE_VARIABLE",
           "EngineFallbackWarning"]

ENGINES = ("auto", "stacked", "batched", "per_shadow")

# Optimizers whose update of each parameter element depends only on that element's own gradient
# and state (plus scalars shared by the whole group): stepping them over stacked tensors equals
# stepping each slot alone. Exact classes only: a subclass may change that.
ELEMENTWISE_OPTIMIZERS: tuple[type[torch.optim.Optimizer], ...] = (
    torch.optim.SGD, torch.optim.Adam, torch.optim.AdamW, torch.optim.RMSprop,
    torch.optim.Adagrad, torch.optim.Adadelta, torch.optim.Adamax, torch.optim.NAdam,
    torch.optim.RAdam, torch.optim.Rprop, torch.optim.ASGD,
)

_DROPOUT_CHECKS: dict[type[nn.Module], tuple[Callable[[torch.Tensor], torch.Tensor],
                                              tuple[int, ...]]] = {
    nn.Dropout: (lambda x: F.dropout(x, 0.5, True), (6, 40)),
    nn.Dropout1d: (lambda x: F.dropout1d(x, 0.5, True), (6, 5, 8)),
    nn.Dropout2d: (lambda x: F.dropout2d(x, 0.5, True), (6, 5, 4, 4)),
    nn.Dropout3d: (lambda x: F.dropout3d(x, 0.5, True), (6, 5, 2, 2, 2)),
    nn.AlphaDropout: (lambda x: F.alpha_dropout(x, 0.5, True), (6, 40)),
    nn.FeatureAlphaDropout: (lambda x: F.feature_alpha_dropout(x, 0.5, True), (6, 5, 4, 4)),
}


def _scaled(dropout: Callable[[torch.Tensor], torch.Tensor], scale: torch.Tensor,
            x: torch.Tensor) -> torch.Tensor:
    return dropout(x * scale)


@functools.cache
def replayed_dropout_kinds() -> frozenset[type[nn.Module]]:
    """The dropout modules whose masks ``vmap(randomness="same")`` draws exactly as the unbatched
    module does from the same RNG state (checked on this torch, once per process)."""
    replayed = set()
    state = torch.get_rng_state()
    try:
        for kind, (dropout, shape) in _DROPOUT_CHECKS.items():
            torch.manual_seed(20240)
            x = torch.randn(shape)
            start = torch.get_rng_state()
            plain = dropout(x)
            torch.set_rng_state(start)
            try:
                scaled = functools.partial(_scaled, dropout)
                batched = vmap(scaled, in_dims=(0, None), randomness="same")(
                    torch.ones(3, *[1] * len(shape)), x)
            except Exception:  # noqa: BLE001 - a kind vmap cannot run is simply not replayed
                continue
            if all(torch.equal(plain, b) for b in batched):
                replayed.add(kind)
    finally:
        torch.set_rng_state(state)
    return frozenset(replayed)


def batched_refusal(model: nn.Module, optimizer: torch.optim.Optimizer) -> str:
    """Why the batched engine cannot follow this run exactly ('' when nothing stands in the way).

    What only shows when the model runs (vmap cannot trace it, buffers written in the forward
    pass, random ops drawn differently) is caught at the first batched step instead.
    """
    if type(optimizer) not in ELEMENTWISE_OPTIMIZERS:
        return (f"the optimizer {type(optimizer).__name__} is not one known to update each "
                "element on its own (batched: " +
                ", ".join(k.__name__ for k in ELEMENTWISE_OPTIMIZERS) + ")")
    replayed = replayed_dropout_kinds()
    for name, module in model.named_modules():
        label = f"module {name!r}" if name else "the model"
        if isinstance(module, nn.modules.batchnorm._NormBase):
            if module.track_running_stats:
                return (f"{label} ({type(module).__name__}) keeps running statistics, which each "
                        "shadow must update on its own batch")
            return (f"{label} ({type(module).__name__}) normalises over the batch, which vmap "
                    "does not round identically in every slot (measured)")
        if isinstance(module, nn.modules.dropout._DropoutNd):
            if getattr(module, "inplace", False):
                return (f"{label} is an in-place dropout, whose mask vmap does not draw like "
                        "the main run's")
            if type(module) not in replayed:
                return (f"{label} ({type(module).__name__}): vmap does not reproduce its masks "
                        "on this torch version")
        if isinstance(module, nn.Embedding) and module.sparse:
            return f"{label} is an embedding with sparse gradients"
    return ""


def make_engine(kind: str, model: nn.Module, optimizer: torch.optim.Optimizer, loss_of: LossOf,
                before_step: Callable[[nn.Module], Any] | None, *, shadows: int,
                loss_fn: Callable[..., torch.Tensor] | None = None
                ) -> PerShadowEngine | BatchedEngine:
    """The engine for ``kind`` (one of ``ENGINES``) and ``shadows`` runs; ``loss_fn`` is the
    user's ``loss_fn(outputs, targets)`` (None with a ``step_loss``), which the stacked engine
    needs. The engine's ``choice`` attribute says which engine steps and why.

    A stacked or batched request the run does not allow gives the per-shadow engine and an
    ``EngineFallbackWarning`` naming the reason. With ``"auto"`` the environment variable
    ``SGDSTAB_AUTO_ENGINE`` (``stacked`` or ``per_shadow``) fixes the choice instead of timing.
    """
    if kind not in ENGINES:
        raise LockstepError(f"engine must be one of {ENGINES}, got {kind!r}")
    refused = stacked_refusal(model, optimizer, loss_fn)
    if kind == "auto":
        override = os.environ.get(AUTO_OVERRIDE_VARIABLE, "").strip()
        if override == "per_shadow" or refused:
            why = (f"set by the environment variable {AUTO_OVERRIDE_VARIABLE}"
                   if override == "per_shadow" else
                   f"the stacked engine cannot step this run ({refused}); the vmap engine is "
                   "not chosen automatically (its null-swap audit is not guaranteed exact)")
            return _chosen(PerShadowEngine(model, optimizer, loss_of, before_step),
                           f"per_shadow: {why}")
        assert loss_fn is not None
        engine = StackedEngine(model, optimizer, loss_of, before_step, loss_fn=loss_fn,
                               auto=override != "stacked")
        if override == "stacked":
            engine.choice = f"stacked: set by the environment variable {AUTO_OVERRIDE_VARIABLE}"
        return engine
    if kind == "per_shadow":
        return _chosen(PerShadowEngine(model, optimizer, loss_of, before_step),
                       "per_shadow: engine='per_shadow' was asked for")
    reason = refused if kind == "stacked" else batched_refusal(model, optimizer)
    if reason:
        warnings.warn(f"engine={kind!r}: stepping shadows one by one, because {reason}",
                      EngineFallbackWarning, stacklevel=3)
        return _chosen(PerShadowEngine(model, optimizer, loss_of, before_step),
                       f"per_shadow: the {kind} engine cannot step this run ({reason})")
    if kind == "stacked":
        assert loss_fn is not None
        return StackedEngine(model, optimizer, loss_of, before_step, loss_fn=loss_fn)
    return _chosen(BatchedEngine(model, optimizer, loss_of, before_step),
                   "batched: engine='batched' was asked for")


def _chosen(engine: Any, choice: str) -> Any:
    engine.choice = choice
    return engine
