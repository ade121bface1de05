"""The engines' refusal: an input the shadows cannot follow exactly (re-exported by
``sgdstab.shadows.lockstep`` and ``sgdstab``)."""

from __future__ import annotations

__all__ = ["LockstepError"]


class LockstepError(ValueError):
    """An input the lockstep engine cannot follow exactly (a clear refusal, never a guess)."""
