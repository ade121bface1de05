"""StepHistory: the record of what training did, step by step, kept compactly.

The schedule (step size, batch size) is stored run-length compressed; each step's drawn indices are
kept in one growing integer array with offsets; shadow hits are sparse (step, count) pairs. The
bounds are computed from this record by pure functions (``sgdstab.bounds``); nothing here computes.
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
    _indices: list[np.ndarray] = field(default_factory=list)
    _offsets: list[int] = field(default_factory=lambda: [0])
    hits: list[list[tuple[int, int]]] = field(default_factory=list)
    steps: int = 0

    def __post_init__(self) -> None:
        if not self.hits:
            self.hits = [[] for _ in range(self.shadows)]

    def record(self, step_size: float, batch_size: int, indices: np.ndarray,
               hit_counts: list[int]) -> None:
        if self.runs and self.runs[-1][0] == step_size and self.runs[-1][1] == batch_size:
            self.runs[-1][2] += 1
        else:
            self.runs.append([float(step_size), int(batch_size), 1])
        self._indices.append(np.asarray(indices, dtype=np.int64))
        self._offsets.append(self._offsets[-1] + len(indices))
        for shadow, count in enumerate(hit_counts):
            if count:
                self.hits[shadow].append((self.steps, int(count)))
        self.steps += 1

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
        return [flat[a:b] for a, b in zip(self._offsets[:-1], self._offsets[1:])]

    def flat_indices(self) -> np.ndarray:
        if len(self._indices) > 1:
            self._indices = [np.concatenate(self._indices)]
        return self._indices[0] if self._indices else np.zeros(0, dtype=np.int64)

    def state_dict(self) -> dict[str, Any]:
        return {"shadows": self.shadows, "runs": [list(r) for r in self.runs],
                "indices": self.flat_indices().copy(), "offsets": list(self._offsets),
                "hits": [list(h) for h in self.hits], "steps": self.steps}

    @classmethod
    def from_state_dict(cls, state: dict[str, Any]) -> StepHistory:
        history = cls(shadows=int(state["shadows"]))
        history.runs = [list(r) for r in state["runs"]]
        history._indices = [np.asarray(state["indices"], dtype=np.int64)]
        history._offsets = list(state["offsets"])
        history.hits = [[tuple(p) for p in h] for h in state["hits"]]
        history.steps = int(state["steps"])
        return history


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
