"""sgdstab: track the algorithmic stability of SGD inside your own PyTorch training loop.

Names are imported on first use, so ``import sgdstab.bounds`` (pure numpy/scipy) loads no torch.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

_WHERE = {
    "StabilityTracker": "tracking.tracker",
    "AssumptionWarning": "tracking.tracker",
    "LockstepWarning": "tracking.tracker",
    "ShadowFaultWarning": "tracking.tracker",
    "DataParallelStabilityTracker": "tracking.distributed",
    "EngineFallbackWarning": "shadows.engines",
    "Constants": "theory.constants",
    "ConstantSettings": "tracking.settings",
    "ProbeSettings": "tracking.settings",
    "estimate_lipschitz": "tracking.constants",
    "estimate_smoothness": "tracking.constants",
    "LockstepError": "shadows.errors",
    "NeighbourSpec": "shadows.lockstep",
    "EpochReading": "outputs.reading",
    "read_history": "outputs.reading",
    "TimeSpent": "theory.history",
    "StopAdvice": "outputs.advice",
    "advise": "outputs.advice",
    "write_report": "outputs.report",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        value = getattr(importlib.import_module(f".{_WHERE[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'sgdstab' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_WHERE))
