"""Choosing the shadow engine."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import torch
from torch import nn

from .lockstep import LockstepError, LossOf, PerShadowEngine

__all__ = ["make_engine", "ENGINES"]

ENGINES = ("auto", "per_shadow")


def make_engine(kind: str, model: nn.Module, optimizer: torch.optim.Optimizer, loss_of: LossOf,
                before_step: Callable[[nn.Module], Any] | None, *, shadows: int
                ) -> PerShadowEngine:
    """The engine for ``kind``: ``"per_shadow"`` steps each shadow as its own module."""
    if kind not in ENGINES:
        raise LockstepError(f"engine must be one of {ENGINES}, got {kind!r}")
    return PerShadowEngine(model, optimizer, loss_of, before_step)
