"""sgdstab: track the algorithmic stability of SGD inside your own PyTorch training loop."""

from .constants import Constants, estimate_lipschitz, estimate_smoothness
from .lockstep import LockstepError, NeighbourSpec
from .reading import EpochReading, read_history
from .tracker import AssumptionWarning, LockstepWarning, ShadowFaultWarning, StabilityTracker

__all__ = [
    "AssumptionWarning",
    "DataParallelStabilityTracker",
    "Constants",
    "EpochReading",
    "LockstepError",
    "LockstepWarning",
    "NeighbourSpec",
    "ShadowFaultWarning",
    "StabilityTracker",
    "estimate_lipschitz",
    "estimate_smoothness",
    "read_history",
]

__version__ = "0.1.0"


def __getattr__(name: str):
    # imported on first use, so builds without torch.distributed still import sgdstab
    if name == "DataParallelStabilityTracker":
        from .distributed import DataParallelStabilityTracker

        return DataParallelStabilityTracker
    raise AttributeError(f"module 'sgdstab' has no attribute {name!r}")
