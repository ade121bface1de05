"""StepHistory: the record of what training did, step by step, kept compactly.

The schedule (step size, batch size) is stored run-length compressed; each step's drawn indices are
kept in one growing array of the smallest unsigned integer type that holds them (2 bytes an index
up to n = 65,536, 4 beyond; each step's share follows from its batch size); shadow hits are
sparse (step, count) pairs; the optimizer's applicability is kept as the steps at which it
changed. The bounds are computed from this record by pure functions (``sgdstab.bounds``);
nothing here computes.

Growth: the all-index (uniform-stability) bound needs which examples every step drew, so the
record grows by one small integer per drawn example (an epoch over n examples adds 2n bytes for
n <= 65,536); everything else is bounded by the number of
schedule changes and shadow hits.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["StepHistory", "TimeSpent"]


@dataclass
class StepHistory:
    """Runs of ``(step_size, batch_size, count)``, per-step indices, per-shadow hits."""

    shadows: int
    runs: list[list[float]] = field(default_factory=list)   # [step_size, batch_size, count]
    _indices: list[np.ndarray] = field(default_factory=list)   # compact chunks
    _pending: list[np.ndarray] = field(default_factory=list)   # recent steps, not yet folded
    hits: list[list[tuple[int, int]]] = field(default_factory=list)
    steps: int = 0
    reasons: list[tuple[int, str]] = field(default_factory=list)   # (step, reason) at changes

    def __post_init__(self) -> None:
        if not self.hits:
            self.hits = [[] for _ in range(self.shadows)]

    def record(self, step_size: float, batch_size: int, indices: np.ndarray,
               hit_counts: list[int] | None) -> None:
        """One step: its step size, batch size and drawn indices, and how often each shadow's
        swapped index was drawn (None: no shadow's was)."""
        if self.runs and self.runs[-1][0] == step_size and self.runs[-1][1] == batch_size:
            self.runs[-1][2] += 1
        else:
            self.runs.append([float(step_size), int(batch_size), 1])
        self._pending.append(np.asarray(indices, dtype=np.int64))
        if len(self._pending) >= 256:   # fold a run of steps into one compact chunk
            joined = np.concatenate(self._pending)
            self._indices.append(joined.astype(_compact(joined)))
            self._pending = []
        if hit_counts is not None:
            for shadow, count in enumerate(hit_counts):
                if count:
                    self.hits[shadow].append((self.steps, int(count)))
        self.steps += 1

    def note_optimizer(self, step: int, reason: str) -> None:
        """From ``step`` on the optimizer's settings give this reason why the bounds do not
        apply ('' when they do); recorded only when it changes."""
        if not self.reasons or self.reasons[-1][1] != reason:
            self.reasons.append((int(step), str(reason)))

    def optimizer_reason(self) -> str:
        """Why the bounds do not apply to the recorded steps ('' when every step was taken with
        settings they cover): the first such reason, with the step it started at."""
        for step, reason in self.reasons:
            if reason:
                return reason if step == 0 else f"from step {step + 1}: {reason}"
        return ""

    def step_sizes(self) -> np.ndarray:
        if not self.runs:
            return np.zeros(0)
        return np.repeat([r[0] for r in self.runs], [int(r[2]) for r in self.runs])

    def batch_sizes(self) -> np.ndarray:
        if not self.runs:
            return np.zeros(0, dtype=np.int64)
        return np.repeat([int(r[1]) for r in self.runs], [int(r[2]) for r in self.runs])

    def shadow_hits(self) -> list[np.ndarray]:
        out = []
        for pairs in self.hits:
            counts = np.zeros(self.steps, dtype=np.int64)
            for step, count in pairs:
                counts[step] = count
            out.append(counts)
        return out

    def batch_indices(self) -> list[np.ndarray]:
        flat = self.flat_indices()
        offsets = np.r_[0, np.cumsum(self.batch_sizes())]
        return [flat[a:b] for a, b in zip(offsets[:-1], offsets[1:])]

    def flat_indices(self) -> np.ndarray:
        """Every step's drawn indices, concatenated, in the compact unsigned type (non-negative
        integers: cast before arithmetic that could overflow it)."""
        parts = self._indices + self._pending
        if len(parts) > 1 or self._pending:
            joined = np.concatenate(parts)
            self._indices, self._pending = [joined.astype(_compact(joined), copy=False)], []
        return self._indices[0] if self._indices else np.zeros(0, dtype=np.uint16)

    def state_dict(self) -> dict[str, Any]:
        return {"shadows": self.shadows, "runs": [list(r) for r in self.runs],
                "indices": self.flat_indices().copy(),
                "hits": [list(h) for h in self.hits], "steps": self.steps,
                "reasons": [list(r) for r in self.reasons]}

    @classmethod
    def from_state_dict(cls, state: dict[str, Any]) -> StepHistory:
        history = cls(shadows=int(state["shadows"]))
        history.runs = [list(r) for r in state["runs"]]
        indices = np.asarray(state["indices"])
        history._indices = [indices.astype(_compact(indices), copy=False)]
        history.hits = [[tuple(p) for p in h] for h in state["hits"]]
        history.steps = int(state["steps"])
        history.reasons = [(int(step), str(reason)) for step, reason in state.get("reasons", [])]
        return history


def _compact(indices: np.ndarray) -> type:
    """The smallest unsigned integer type holding ``indices`` (non-negative)."""
    top = int(indices.max()) if indices.size else 0
    if top < 1 << 16:
        return np.uint16
    return np.uint32 if top < 1 << 32 else np.uint64


@dataclass
class TimeSpent:
    """Wall-clock seconds the tracker has spent, by part (``tracker.time_spent``).

    ``recording``: building the recording loader, capturing each batch's indices and RNG state;
    ``step_hooks``: the optimizer hooks around the shadows' steps (forks, RNG restore, hit
    counts, the step record); ``shadow_steps``: stepping the shadows; ``epoch_end``:
    ``finish_epoch`` (probe evaluation, divergences, bounds, writing the sinks).
    """

    recording: float = 0.0
    step_hooks: float = 0.0
    shadow_steps: float = 0.0
    epoch_end: float = 0.0

    @property
    def bookkeeping(self) -> float:
        """Everything but the shadows' own steps."""
        return self.recording + self.step_hooks + self.epoch_end

    @property
    def total(self) -> float:
        return self.bookkeeping + self.shadow_steps
