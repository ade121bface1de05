"""Choosing the shadow engine: batched (stacked tensors, one vmapped step) or per-shadow.

``"per_shadow"`` steps each shadow as its own module with its own optimizer: exact for any
optimizer and model. ``"batched"`` (``sgdstab.batched``) steps all forked shadows together; it is
exact for element-wise optimizers and models that are pure functions of their parameters, and falls
back to per-shadow stepping, with an ``EngineFallbackWarning`` saying why, for anything else.
``"auto"`` picks batched stepping only where it measured faster and exact
(``benchmarks/overhead.py``, 2-core CPU): from ``AUTO_BATCHED_FROM`` runs (shadows plus the audit),
with at least ``AUTO_MIN_THREADS`` torch threads (K=8, batch 32: 0.79x the per-shadow epoch on 2
threads, 0.93-1.09x on one; K=4 is slower batched everywhere, partly because the batched engine
also carries a no-swap reference run), and for models without convolutions: vmap runs them as
grouped convolutions, which need not round every slot alike (a Conv1d model measured a null-swap
drift of 3e-8) and were slower on batches of 256 (1.2x per-shadow).
"""

from __future__ import annotations

import functools
import warnings
from collections.abc import Callable
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn
from torch.func import vmap

from .batched import BatchedEngine, EngineFallbackWarning
from .lockstep import LockstepError, LossOf, PerShadowEngine

__all__ = ["make_engine", "batched_refusal", "replayed_dropout_kinds", "auto_prefers_per_shadow",
           "ENGINES", "ELEMENTWISE_OPTIMIZERS", "AUTO_BATCHED_FROM", "AUTO_MIN_THREADS",
           "EngineFallbackWarning"]

ENGINES = ("auto", "batched", "per_shadow")

# Optimizers whose update of each parameter element depends only on that element's own gradient
# and state (plus scalars shared by the whole group): stepping them over stacked tensors equals
# stepping each slot alone. Exact classes only: a subclass may change that.
ELEMENTWISE_OPTIMIZERS: tuple[type[torch.optim.Optimizer], ...] = (
    torch.optim.SGD, torch.optim.Adam, torch.optim.AdamW, torch.optim.RMSprop,
    torch.optim.Adagrad, torch.optim.Adadelta, torch.optim.Adamax, torch.optim.NAdam,
    torch.optim.RAdam, torch.optim.Rprop, torch.optim.ASGD,
)

# "auto" uses the batched engine from this many runs (shadows plus the audit) and torch threads
# on, for models without convolutions (see the module docstring).
AUTO_BATCHED_FROM = 8
AUTO_MIN_THREADS = 2

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


def auto_prefers_per_shadow(runs: int, threads: int, model: nn.Module | None = None) -> str:
    """Why ``engine="auto"`` steps ``runs`` runs of ``model`` one by one with ``threads`` torch
    threads ('' when it takes the batched engine, subject to ``batched_refusal``)."""
    if model is not None:
        for name, module in model.named_modules():
            if isinstance(module, nn.modules.conv._ConvNd):
                return (f"module {name!r} is a convolution, which batched stepping need not "
                        "round alike in every slot")
    if runs < AUTO_BATCHED_FROM:
        return (f"{runs} run(s) (shadows plus the audit) step faster one by one; batched "
                f"stepping pays off from {AUTO_BATCHED_FROM}")
    if threads < AUTO_MIN_THREADS:
        return (f"with {threads} torch thread(s) batched stepping is no faster (it needs "
                f"{AUTO_MIN_THREADS} or more to use its larger kernels)")
    return ""


def make_engine(kind: str, model: nn.Module, optimizer: torch.optim.Optimizer, loss_of: LossOf,
                before_step: Callable[[nn.Module], Any] | None, *, shadows: int,
                threads: int | None = None) -> PerShadowEngine | BatchedEngine:
    """The engine for ``kind`` ("auto", "batched" or "per_shadow") and ``shadows`` runs;
    ``threads`` (default ``torch.get_num_threads()``) informs the "auto" choice.

    A batched request the run does not allow gives the per-shadow engine and an
    ``EngineFallbackWarning`` naming the reason.
    """
    if kind not in ENGINES:
        raise LockstepError(f"engine must be one of {ENGINES}, got {kind!r}")
    threads = torch.get_num_threads() if threads is None else int(threads)
    if kind == "per_shadow" or (kind == "auto" and
                                auto_prefers_per_shadow(shadows, threads, model)):
        return PerShadowEngine(model, optimizer, loss_of, before_step)
    reason = batched_refusal(model, optimizer)
    if reason:
        warnings.warn(f"engine={kind!r}: stepping shadows one by one, because {reason}",
                      EngineFallbackWarning, stacklevel=3)
        return PerShadowEngine(model, optimizer, loss_of, before_step)
    return BatchedEngine(model, optimizer, loss_of, before_step)
