"""sgdstab: track the algorithmic stability of SGD inside your own PyTorch training loop.

Names are imported on first use, so ``import sgdstab.bounds`` (pure numpy/scipy) loads no torch.
"""

from __future__ import annotations

import importlib
import importlib.abc
import importlib.machinery
import importlib.util
import sys
import warnings
from types import ModuleType
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
    "readings_to_frame": "outputs.reading",
    "TimeSpent": "theory.history",
    "StopAdvice": "outputs.advice",
    "advise": "outputs.advice",
    "write_report": "outputs.report",
}

__all__ = sorted(_WHERE)

#: Module paths of the flat layout (0.1.0) and where each module lives now. ``import
#: sgdstab.reading`` and ``from sgdstab.reading import readings_to_frame`` keep working: the old
#: name is the new module object itself (with a DeprecationWarning naming the new path).
MOVED_MODULES = {
    "advice": "outputs.advice", "assessment": "theory.assessment", "batched": "shadows.batched",
    "checkpoint": "tracking.checkpoint", "cli_bound": "cli.bound",
    "cli_report": "cli.report", "cli_types": "cli.argtypes", "constants": "tracking.constants",
    "demo": "cli.demo", "distributed": "tracking.distributed", "divergence": "theory.divergence",
    "engines": "shadows.engines", "history": "theory.history", "labels": "outputs.labels",
    "loaders": "shadows.loaders", "lockstep": "shadows.lockstep", "measure": "tracking.measure",
    "neighbours": "shadows.neighbours", "planner": "theory.planner", "probe": "tracking.probe",
    "reading": "outputs.reading", "report": "outputs.report", "sinks": "outputs.sinks",
    "spread": "tracking.spread", "stacked": "shadows.stacked", "stacking": "shadows.stacking",
    "stackstep": "shadows.stackstep", "tracker": "tracking.tracker", "trends": "outputs.trends",
    "verdict": "outputs.verdict",
}


class _MovedModuleFinder(importlib.abc.MetaPathFinder, importlib.abc.Loader):
    """Resolves ``sgdstab.<old name>`` to the module at its new path (the same object)."""

    def __init__(self) -> None:
        self.specs: dict[str, Any] = {}

    def find_spec(self, fullname: str, path: Any = None, target: Any = None
                  ) -> importlib.machinery.ModuleSpec | None:
        package, _, name = fullname.rpartition(".")
        if package != __name__ or name not in MOVED_MODULES:
            return None
        return importlib.util.spec_from_loader(fullname, self)

    def create_module(self, spec: importlib.machinery.ModuleSpec) -> ModuleType:
        new = f"{__name__}.{MOVED_MODULES[spec.name.rpartition('.')[2]]}"
        warnings.warn(f"{spec.name} moved to {new}; the old path will be removed in a later "
                      "release (names exported by sgdstab itself are unaffected)",
                      DeprecationWarning, stacklevel=2)
        module = importlib.import_module(new)
        self.specs[new] = module.__spec__
        return module

    def exec_module(self, module: ModuleType) -> None:
        """The module at the new path is already executed; only its own ``__spec__``, which the
        import system has just replaced with the old path's, is put back."""
        module.__spec__ = self.specs[module.__name__]


if not any(isinstance(finder, _MovedModuleFinder) for finder in sys.meta_path):
    sys.meta_path.append(_MovedModuleFinder())


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        value = getattr(importlib.import_module(f".{_WHERE[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'sgdstab' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_WHERE))
