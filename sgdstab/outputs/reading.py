"""EpochReading: what the tracker measured and computed at the end of one epoch."""

from __future__ import annotations

import json
import math
import warnings
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

__all__ = ["EpochReading", "read_history", "json_safe", "readings_to_frame", "versioned",
           "SCHEMA_VERSION", "LOST_LOCKSTEP"]

#: How a reading's note starts once the shadows skipped a main-run step they could not replay
#: (every reading from then on carries it; the verdict fails the lockstep on it)
LOST_LOCKSTEP = "lockstep lost"

#: Version of the record layout in history.jsonl and advice.json; bumped when a field changes
#: meaning or is removed (new fields do not bump it). Records written before it existed have no
#: ``schema_version`` and read as version 0.
SCHEMA_VERSION = 1


@dataclass(frozen=True, repr=False)
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
        return dict(json_safe(asdict(self)))

    def _headline(self) -> list[tuple[str, str]]:
        """The few figures a glance needs, as (label, text) pairs."""
        finite = [d for d in self.divergence if isinstance(d, float) and math.isfinite(d)]
        parts = [("epoch", str(self.epoch)), ("optimizer steps", str(self.steps))]
        if finite:
            parts.append((f"largest divergence ({len(self.divergence)} shadows)",
                          _short(max(finite))))
        if self.audit_divergence is not None:
            parts.append(("null-swap audit divergence", _short(self.audit_divergence)))
        if self.loss_difference_max is not None:
            parts.append(("largest loss difference", _short(self.loss_difference_max)))
        if self.gap_estimate is not None:
            stderr = "" if self.gap_stderr is None else f" \u00b1 {_short(self.gap_stderr)}"
            parts.append(("gap estimate", _short(self.gap_estimate) + stderr))
        if self.train_loss is not None:
            parts.append(("train loss (probe)", _short(self.train_loss)))
        if self.holdout_loss is not None:
            count = f"{self.holdout_count} examples" if self.holdout_count else "probe"
            parts.append((f"holdout loss ({count})", _short(self.holdout_loss)))
        if self.expected_bound is not None:
            parts.append(("expected stability bound", _short(self.expected_bound)))
        if self.high_probability_gap is not None:
            parts.append(("high-probability gap bound", _short(self.high_probability_gap)))
        if self.assumption_violated:
            parts.append(("assumption audit", "FAILED (a divergence exceeded its bound)"))
        if self.notes:
            parts.append(("notes", str(len(self.notes))))
        return parts

    def __repr__(self) -> str:
        text = ", ".join(f"{label} {value}" for label, value in self._headline()[2:])
        return f"<EpochReading epoch {self.epoch}, {self.steps} steps: {text}>"

    def _repr_html_(self) -> str:
        """A small table for notebooks: the headline figures and every note."""
        import html

        rows = "".join(f"<tr><th style='text-align:left'>{html.escape(label)}</th>"
                       f"<td>{html.escape(value)}</td></tr>" for label, value in self._headline())
        notes = "".join(f"<li>{html.escape(note)}</li>" for note in self.notes)
        return (f"<div><strong>EpochReading</strong><table>{rows}</table>"
                + (f"<ul>{notes}</ul>" if notes else "") + "</div>")

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> EpochReading:
        known = {name: data[name] for name in cls.__dataclass_fields__ if name in data}
        for name in ("divergence", "path_bound", "shadow_faults", "notes"):
            if name in known and known[name] is not None:
                known[name] = tuple(known[name])
        return cls(**known)


def _short(value: float) -> str:
    return f"{value:.4g}"


def versioned(record: Mapping[str, Any]) -> dict[str, Any]:
    """``record`` with the schema version and the writing package's version added."""
    from .. import __version__

    return {**record, "schema_version": SCHEMA_VERSION, "sgdstab_version": __version__}


#: The columns of ``readings_to_frame`` besides the per-shadow ones, in order.
FRAME_COLUMNS = ("steps", "divergence_max", "divergence_mean", "audit_divergence",
                 "loss_difference_max", "loss_difference_mean", "gap_estimate", "gap_stderr",
                 "train_loss", "holdout_loss", "expected_bound", "uniform_stability",
                 "high_probability_gap", "assumption_violated")


def readings_to_frame(readings: Any) -> Any:
    """A pandas DataFrame with one row per epoch (index ``epoch``).

    ``readings``: ``EpochReading`` objects or history.jsonl records (``read_history``). Columns:
    ``FRAME_COLUMNS``, then ``divergence_k`` and ``path_bound_k`` per shadow; a missing value is
    NaN. pandas is not a dependency of sgdstab: install it to use this.
    """
    try:
        import pandas as pd
    except ImportError as error:
        raise ImportError("readings_to_frame needs pandas, which sgdstab does not install: "
                          "pip install pandas") from error
    items = [r if isinstance(r, EpochReading) else EpochReading.from_dict(r) for r in readings]
    shadows = max((len(r.divergence) for r in items), default=0)
    rows = []
    for r in items:
        divergence = [math.nan if d is None else float(d) for d in r.divergence]
        finite = [d for d in divergence if math.isfinite(d)]
        row: dict[str, Any] = {
            "epoch": r.epoch, "steps": r.steps,
            "divergence_max": max(finite) if finite else math.nan,
            "divergence_mean": sum(finite) / len(finite) if finite else math.nan,
        }
        for name in FRAME_COLUMNS[3:]:
            value = getattr(r, name)
            row[name] = math.nan if value is None else value
        for k in range(shadows):
            row[f"divergence_{k}"] = divergence[k] if k < len(divergence) else math.nan
            bound = r.path_bound[k] if k < len(r.path_bound) else None
            row[f"path_bound_{k}"] = math.nan if bound is None else float(bound)
        rows.append(row)
    columns = ["epoch", *FRAME_COLUMNS,
               *(f"{kind}_{k}" for k in range(shadows) for kind in ("divergence", "path_bound"))]
    return pd.DataFrame(rows, columns=columns).set_index("epoch")


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
    records: list[dict[str, Any]] = []
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
