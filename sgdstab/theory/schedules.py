"""Step-size schedules for planned runs: the kinds a plan names, and recorded step sizes.

numpy and the standard library only; no torch. Re-exported by sgdstab.theory.planner.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import cast

import numpy as np
from scipy import special

from .bounds import _positive, _step_sizes, _steps

SCHEDULE_KINDS = ("constant", "step-decay", "cosine", "c-over-t")


@dataclass(frozen=True)
class Schedule:
    """Step sizes alpha_t for steps t = 1, 2, ...; every kind is non-increasing, largest at t = 1.

    constant: base; step-decay: base * decay_factor ** ((t - 1) // decay_every);
    cosine: base * (1 + cos(pi (t - 1) / total_steps)) / 2 for t <= total_steps; c-over-t: base / t.
    """

    kind: str = "constant"
    base_step_size: float = 0.1
    decay_factor: float = 0.1
    decay_every: int = 1
    total_steps: int | None = None

    def __post_init__(self) -> None:
        if self.kind not in SCHEDULE_KINDS:
            raise ValueError(f"schedule kind must be one of {SCHEDULE_KINDS}, got {self.kind!r}")
        _positive("base_step_size", self.base_step_size)
        if not 0 < float(self.decay_factor) <= 1:
            raise ValueError(f"decay_factor must lie in (0, 1], got {self.decay_factor!r}")
        if _steps(self.decay_every) < 1:
            raise ValueError("decay_every must be >= 1 step")
        if self.kind == "cosine" and (self.total_steps is None or _steps(self.total_steps) < 1):
            raise ValueError("a cosine schedule needs total_steps >= 1")

    @property
    def peak(self) -> float:
        return float(self.base_step_size)

    @property
    def horizon(self) -> int | None:
        """Last step the schedule defines (None: unlimited)."""
        if self.kind != "cosine":
            return None
        assert self.total_steps is not None  # __post_init__ requires it for cosine
        return int(self.total_steps)

    def with_peak(self, peak: float) -> Schedule:
        return dataclasses.replace(self, base_step_size=float(peak))

    def step_sizes(self, steps: int) -> np.ndarray:
        steps = _steps(steps)
        if self.horizon is not None and steps > self.horizon:
            raise ValueError(
                f"the cosine schedule stops at {self.horizon} steps, asked for {steps}"
            )
        t = np.arange(1, steps + 1)
        base = self.peak
        if self.kind == "constant":
            return np.full(steps, base)
        if self.kind == "step-decay":
            return base * float(self.decay_factor) ** ((t - 1) // int(self.decay_every))
        if self.kind == "cosine":
            assert self.total_steps is not None  # __post_init__ requires it for cosine
            return base * (1 + np.cos(np.pi * (t - 1) / int(self.total_steps))) / 2
        return base / t

    def total_step_size(self, steps: int) -> float:
        """sum_{t <= steps} alpha_t (closed form except for cosine)."""
        steps, base = _steps(steps), self.peak
        if self.kind == "constant":
            return steps * base
        if self.kind == "c-over-t":  # base * H_T, H_T = digamma(T + 1) + Euler's gamma
            return base * float(special.digamma(steps + 1) + np.euler_gamma) if steps else 0.0
        if self.kind == "step-decay" and self.decay_factor < 1:
            blocks, rest = divmod(steps, int(self.decay_every))
            log_f = math.log(self.decay_factor)
            full = -math.expm1(blocks * log_f) / -math.expm1(log_f)  # sum_{k<blocks} f^k
            return base * (int(self.decay_every) * full + rest * math.exp(blocks * log_f))
        if self.kind == "step-decay":
            return steps * base
        return float(self.step_sizes(steps).sum())

    def describe(self) -> str:
        if self.kind == "constant":
            return f"constant step size {self.peak:.6g}"
        if self.kind == "c-over-t":
            return f"step size c/t with c = {self.peak:.6g}"
        if self.kind == "cosine":
            return f"cosine from {self.peak:.6g} over {self.total_steps} steps"
        factor, every = f"{self.decay_factor:.6g}", self.decay_every
        return f"step size {self.peak:.6g} times {factor} every {every} steps"


@dataclass(frozen=True, eq=False)
class _Recorded:
    """A given array of per-step sizes used as a schedule (a private copy)."""

    values: np.ndarray
    kind = "recorded"

    @property
    def peak(self) -> float:
        return float(self.values.max())

    @property
    def horizon(self) -> int:
        return int(self.values.size)

    def with_peak(self, peak: float) -> _Recorded:
        return _Recorded(self.values * (float(peak) / self.peak))

    def step_sizes(self, steps: int) -> np.ndarray:
        steps = _steps(steps)
        if steps > self.horizon:
            raise ValueError(f"the given schedule has {self.horizon} steps, asked for {steps}")
        return self.values[:steps]

    def total_step_size(self, steps: int) -> float:
        return float(self.step_sizes(steps).sum())

    def describe(self) -> str:
        return f"{self.horizon} given step sizes (largest {self.peak:.6g})"


def _as_schedule(
    schedule: Schedule | _Recorded | float | Sequence[float] | np.ndarray,
) -> Schedule | _Recorded:
    if isinstance(schedule, (Schedule, _Recorded)):
        return schedule
    if np.ndim(schedule) == 0:  # a number: _positive converts it with float()
        return Schedule("constant", _positive("step size", cast(float, schedule)))
    values = _step_sizes(cast("Sequence[float] | np.ndarray", schedule)).copy()
    if values.size == 0 or values.max() <= 0:
        raise ValueError("a given schedule needs at least one step size > 0")
    values.flags.writeable = False
    return _Recorded(values)
