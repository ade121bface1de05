"""The warning categories the tracker gives (also importable from ``tracking.tracker``)."""

from __future__ import annotations

__all__ = ["LockstepWarning", "AssumptionWarning", "ShadowFaultWarning"]


class LockstepWarning(UserWarning):
    """The null-swap audit found that the shadows do not follow the main run exactly."""


class AssumptionWarning(UserWarning):
    """A measured divergence exceeds its proved bound: declared constants or convexity are wrong."""


class ShadowFaultWarning(UserWarning):
    """A shadow hit a non-finite loss or parameter and was frozen."""
