"""Words for people: the labels the report, the demo and the dashboards show for internal names."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

__all__ = ["BOUND_LABELS", "CRITERION_LABELS", "bound_label", "criterion_label"]

#: Stop criteria by internal name (advice.json's ``name``), as a reader would say them.
CRITERION_LABELS: Mapping[str, str] = {
    "holdout_loss": "lowest held-out loss",
    "estimated_risk": "training loss + estimated expected gap",
    "guarantee": "stability bound within target (guarantee)",
    "certified_risk": "smallest certified risk bound (guarantee)",
    # names in advice.json files of earlier versions
    "bound_risk": "training loss + stability bound",
    "bound_budget": "stability bound within the target",
    "measured_risk": "training loss + gap estimate",
    "divergence_acceleration": "divergence speeds up (heuristic)",
}


def criterion_label(name: str | None, entry: Mapping[str, Any] | Any = None) -> str:
    """The human label of a criterion: its own ``label`` when it carries one, else the known
    label of ``name``, else ``name`` with underscores as spaces."""
    label = entry.get("label") if isinstance(entry, Mapping) else getattr(entry, "label", None)
    if isinstance(label, str) and label:
        return label
    if name is None:
        return "none"
    return CRITERION_LABELS.get(name, name.replace("_", " "))

#: Bounds by their key in a reading's ``bounds``.
BOUND_LABELS: Mapping[str, str] = {
    "expected": "expected stability bound",
    "high_probability": "high-probability gap bound",
    "uniform_stability": "uniform stability of the seeded run",
    "path_bound": "pathwise divergence bound",
}


def bound_label(name: str) -> str:
    """The human label of a bound's key."""
    return BOUND_LABELS.get(name, name.replace("_", " "))
