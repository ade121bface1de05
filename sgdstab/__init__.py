"""sgdstab: track the algorithmic stability of SGD inside your own PyTorch training loop."""

from .constants import Constants, estimate_lipschitz, estimate_smoothness
from .lockstep import LockstepError, NeighbourSpec
from .reading import EpochReading, read_history
from .tracker import AssumptionWarning, LockstepWarning, ShadowFaultWarning, StabilityTracker

__all__ = [
    "AssumptionWarning",
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
