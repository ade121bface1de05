"""EpochReading: what the tracker measured and computed at the end of one epoch."""

from __future__ import annotations

import json
import math
import warnings
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

__all__ = ["EpochReading", "read_history", "json_safe"]


@dataclass(frozen=True)
class EpochReading:
    """One epoch's measurements (see README, "What the numbers mean").

    A value that could not be computed is ``None`` and ``notes`` says why.
    """

    epoch: int
    steps: int
    divergence: tuple[float, ...]
    audit_divergence: float | None
    layer_divergence: Mapping[str, float]
    loss_difference_max: float | None
    loss_difference_mean: float | None
    gap_estimate: float | None
    gap_stderr: float | None
    train_loss: float | None
    holdout_loss: float | None
    path_bound: tuple[float | None, ...] = ()
    expected_bound: float | None = None
    high_probability_gap: float | None = None
    uniform_stability: float | None = None
    bounds: Mapping[str, Any] = field(default_factory=dict)
    constants: Mapping[str, Any] | None = None
    assumption_violated: bool = False
    holdout_count: int = 0
    holdout_stderr: float | None = None
    run_gap: float | None = None
    run_gap_low: float | None = None
    run_gap_high: float | None = None
    trivial_loss: float | None = None
    loss_seen: float | None = None
    shadow_faults: tuple[str | None, ...] = ()
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """A JSON-friendly dict (non-finite floats become None)."""
        return json_safe(asdict(self))

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> EpochReading:
        known = {name: data[name] for name in cls.__dataclass_fields__ if name in data}
        for name in ("divergence", "path_bound", "shadow_faults", "notes"):
            if name in known and known[name] is not None:
                known[name] = tuple(known[name])
        return cls(**known)


def json_safe(value: Any) -> Any:
    """A JSON-friendly copy: mappings with string keys, lists, non-finite floats as None."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return value


def read_history(path: str | Path) -> list[dict[str, Any]]:
    """Read history.jsonl (a file or a run directory). A damaged line is skipped with a warning;
    when an epoch appears again (a run resumed from a checkpoint older than its last record),
    the later records replace the earlier ones from that epoch on, with a warning."""
    path = Path(path)
    if path.is_dir():
        path = path / "history.jsonl"
    records = []
    with open(path, encoding="utf-8") as handle:
        lines = handle.read().split("\n")
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            record = json.loads(line)
        except json.JSONDecodeError:
            warnings.warn(f"{path}: line {number} is damaged or truncated (an interrupted write?); "
                          "skipped", stacklevel=2)
            continue
        epoch = record.get("epoch") if isinstance(record, dict) else None
        if isinstance(epoch, int):
            repeated = [r for r in records if isinstance(r, dict) and
                        isinstance(r.get("epoch"), int) and r["epoch"] >= epoch]
            if repeated:
                warnings.warn(f"{path}: line {number} repeats epoch {epoch} (a resumed run); "
                              f"it replaces {len(repeated)} earlier record(s) from epoch "
                              f"{epoch} on", stacklevel=2)
                records = [r for r in records if not any(r is x for x in repeated)]
        records.append(record)
    return records
