"""The batched engine's way back to per-shadow stepping: once, with a warning, every run moves
into its own module and optimizer with its state unchanged (``BatchedEngine._fall_back`` and the
steps and forks that follow it)."""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import torch

from .lockstep import PerShadowEngine, Shadow, StepGroup
from .stacking import SlotState, _load_into

if TYPE_CHECKING:
    from .batched import BatchedEngine

__all__ = ["EngineFallbackWarning", "adopt", "fall_back", "fallback_fork", "fallback_step",
           "load_into_module", "move_to_per_shadow"]


class EngineFallbackWarning(UserWarning):
    """The batched engine cannot follow this run exactly; shadows are stepped one by one."""


def fall_back(engine: BatchedEngine, reason: str) -> None:
    """Move every run into its own module and optimizer and step them one by one from now."""
    warnings.warn(f"batched shadows: stepping shadows one by one instead, because {reason}",
                  EngineFallbackWarning, stacklevel=4)
    move_to_per_shadow(engine)
    engine.fallback_reason = reason
    engine.name = "per_shadow"


def move_to_per_shadow(engine: BatchedEngine) -> None:
    """Give every run its own module and optimizer, with its state unchanged, under a
    per-shadow engine that steps them from now on (``engine._fallback``)."""
    inner = PerShadowEngine(engine.main_model, engine.main_optimizer, engine.loss_of,
                            engine.before_step)
    inner.gradient_sync = engine.gradient_sync
    # Before any batched step the reference equals the main run exactly: drop it.
    keep_reference = engine.reference.forked and engine._stepper.updates > 0
    members = [*engine.shadows, *([engine.reference] if keep_reference else [])]
    states = {id(m): engine._state_of(m) for m in members if m.forked and engine._has_state(m)}
    engine._stack = None
    for member in members:
        engine._adopt(inner, member)
        if id(member) in states:
            engine._load_into_module(member, states[id(member)], engine._constants)
    inner.shadows = list(engine.shadows)
    if not keep_reference:
        engine.reference.forked = False
    engine._fallback = inner


def adopt(engine: BatchedEngine, inner: PerShadowEngine, member: Shadow) -> None:
    made = inner.add_shadow(member.spec, member.row, member.label)
    inner.shadows.remove(made)
    member.model, member.optimizer = made.model, made.optimizer


def load_into_module(engine: BatchedEngine, member: Shadow, state: SlotState,
                      constants: Mapping[str, torch.Tensor]) -> None:
    _load_into(member.model, member.optimizer, state, constants, engine._group_names)


def fallback_fork(engine: BatchedEngine, shadow: Shadow, step: int,
                   buffers: Mapping[str, torch.Tensor] | None) -> None:
    assert engine._fallback is not None
    if shadow.spec.origin == "self":
        engine._fork_twin(shadow, step, buffers)
    if not engine.reference.forked:
        engine._fallback.fork(shadow, step, buffers)
        return
    engine._load_into_module(shadow, engine._state_of(engine.reference),
                           engine._constants_of(engine.reference))
    shadow.forked = True
    shadow.forked_at = step


def fallback_step(engine: BatchedEngine, shadows: Sequence[Shadow], group: StepGroup, step: int
                   ) -> list[Shadow]:
    assert engine._fallback is not None
    engine._fallback.gradient_sync = engine.gradient_sync
    engine._fallback.after_step = engine.after_step
    runs = [*([engine.reference] if engine.reference.forked else []), *shadows]
    faulted = engine._fallback.step(runs, group, step)
    return [s for s in faulted if s is not engine.reference]
