"""How a run's readings evolve: readings in, divergence acceleration, the bound's budget.

Pure functions of ``EpochReading`` objects (or history.jsonl dicts) used by
``sgdstab.outputs.advice``:

- ``acceleration_epoch``: the epoch after which the measured divergence grows faster than
  linearly. Let ``D_e`` be the mean divergence over the shadows at epoch ``e`` (``D_0 = 0``) and
  ``r_e = (D_e - D_{e-1}) / (steps_e - steps_{e-1})`` its growth per optimizer step. Epoch ``e``
  is flagged when the rate rises ``consecutive`` (default 2) epochs in a row, each rise beyond
  ``tau_j = max(relative_noise * |r_j|, noise_sigmas * SE_j, 1e-15)`` (``SE_j`` the standard
  error across shadows of the per-shadow rises). A heuristic, not a bound.
- the budget projection: how many more epochs a target on a bound allows (the planner for a
  constant schedule, otherwise an extrapolation of the recorded bound).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .reading import EpochReading

__all__ = ["BudgetProjection", "TrainingPlan", "acceleration_epoch", "as_readings"]


@dataclass(frozen=True)
class BudgetProjection:
    """How far a target on the bound reaches: the last epoch within it and the epochs left.

    ``method`` is "planner" (``sgdstab.bounds.max_steps``), "extrapolation" (the last per-epoch
    increment of the bound carried forward, growing by the ratio of the last two increments when
    that ratio exceeds 1; exact for linear and geometric growth, conservative for slower growth)
    or "none". ``extra_epochs`` is ``None`` when it cannot be projected or when the bound has
    stopped growing (``unlimited``).
    """

    target: float
    bound_name: str
    last_epoch_within: int | None
    extra_epochs: int | None
    unlimited: bool
    method: str
    per_epoch_growth: float | None
    reason: str


@dataclass(frozen=True)
class TrainingPlan:
    """What the readings do not record but the planner needs: a constant-step-size plan.

    With it (and ``sgdstab.bounds.max_steps`` present) the budget projection asks the planner how
    many steps the target allows instead of extrapolating the recorded bound.
    """

    n: int
    step_size: float
    batch_size: int


# ---------------------------------------------------------------------------------------------
# Readings in
# ---------------------------------------------------------------------------------------------

_EMPTY: dict[str, Any] = {"divergence": (), "audit_divergence": None, "layer_divergence": {},
          "loss_difference_max": None, "loss_difference_mean": None, "gap_estimate": None,
          "gap_stderr": None, "train_loss": None, "holdout_loss": None}


def _as_reading(item: EpochReading | Mapping[str, Any]) -> EpochReading:
    if isinstance(item, EpochReading):
        return item
    if not isinstance(item, Mapping):
        raise TypeError("a reading must be an EpochReading or a mapping, got "
                        f"{type(item).__name__}")
    if "epoch" not in item:
        raise ValueError("a reading without an 'epoch' field")
    data = dict(_EMPTY)
    data.update({k: v for k, v in item.items() if v is not None or k not in _EMPTY})
    data.setdefault("steps", 0)
    for name in ("divergence", "path_bound", "shadow_faults", "notes"):
        if data.get(name) is None:
            data[name] = ()
    if data.get("bounds") is None:
        data["bounds"] = {}
    return EpochReading.from_dict(data)


def finite_or_none(value: Any) -> float | None:
    if value is None or isinstance(value, bool):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def ordered_readings(readings: Sequence[EpochReading | Mapping[str, Any]]) -> list[EpochReading]:
    """By epoch; a repeated epoch (a resumed run) keeps its last reading."""
    by_epoch: dict[int, EpochReading] = {}
    for item in readings:
        reading = _as_reading(item)
        by_epoch[int(reading.epoch)] = reading
    return [by_epoch[e] for e in sorted(by_epoch)]


def as_readings(records: Sequence[EpochReading | Mapping[str, Any]]) -> list[EpochReading]:
    """Readings or history.jsonl dicts as EpochReadings, by epoch (a repeated epoch: the last)."""
    return ordered_readings(records)


def bound_status(reading: EpochReading, value: float | None, name: str) -> tuple[bool, str]:
    """Whether the bound called ``name`` applies at this reading, and why not."""
    if reading.assumption_violated:
        return False, ("a measured divergence exceeded its pathwise bound, so the constants or "
                       "the convexity assumption are wrong for this run")
    entry = reading.bounds.get(name) if isinstance(reading.bounds, Mapping) else None
    if isinstance(entry, Mapping) and entry.get("applicable") is False:
        return False, str(entry.get("reason") or "the bounds module reports it not applicable")
    if value is None:
        if isinstance(entry, Mapping) and entry.get("reason"):
            return False, str(entry["reason"])
        for note in reading.notes:
            if "bound" in note and ("not" in note or "no " in note):
                return False, note
        return False, "no bound value was recorded"
    return True, ""


# ---------------------------------------------------------------------------------------------
# Divergence acceleration
# ---------------------------------------------------------------------------------------------


def divergence_matrix(readings: Sequence[EpochReading]) -> np.ndarray | None:
    """Epochs x shadows, over the shadows with a finite value at every epoch (None if none)."""
    width = max((len(r.divergence) for r in readings), default=0)
    if width == 0:
        return None
    table = np.full((len(readings), width), np.nan)
    for i, reading in enumerate(readings):
        for k, value in enumerate(reading.divergence):
            number = finite_or_none(value)
            faulted = k < len(reading.shadow_faults) and reading.shadow_faults[k] is not None
            if number is not None and not faulted:
                table[i, k] = number
    keep = np.all(np.isfinite(table), axis=0)
    return table[:, keep] if keep.any() else None


def divergence_rates(readings: Sequence[EpochReading], table: np.ndarray) -> np.ndarray:
    """Per-shadow divergence growth per optimizer step over each epoch (epochs x shadows)."""
    steps = np.asarray([r.steps for r in readings], dtype=float)
    previous_steps = np.concatenate([[0.0], steps[:-1]])
    previous = np.vstack([np.zeros((1, table.shape[1])), table[:-1]])
    if readings[0].epoch != 1:  # the record does not start at the beginning of training
        previous_steps[0], previous[0] = np.nan, np.nan
    span = steps - previous_steps
    with np.errstate(invalid="ignore", divide="ignore"):
        rates = (table - previous) / np.where(span > 0, span, np.nan)[:, None]
    return rates


def acceleration_epoch(readings: Sequence[EpochReading | Mapping[str, Any]], *,
                       consecutive: int = 2, relative_noise: float = 0.05,
                       noise_sigmas: float = 2.0) -> int | None:
    """The first epoch after which the divergence's growth rate rises ``consecutive`` times.

    The rule is stated in this module's docstring; ``None`` when it never fires or when there
    are too few epochs (it needs ``consecutive + 1`` rates).
    """
    ordered = ordered_readings(readings)
    table = divergence_matrix(ordered) if ordered else None
    if table is None:
        return None
    found = acceleration_in(ordered, table, consecutive, relative_noise, noise_sigmas)
    return found


def acceleration_in(readings: Sequence[EpochReading], table: np.ndarray, consecutive: int,
                  relative_noise: float, noise_sigmas: float) -> int | None:
    if consecutive < 1:
        raise ValueError(f"consecutive must be >= 1, got {consecutive}")
    rates = divergence_rates(readings, table)
    mean_rate = rates.mean(axis=1)
    shadows = rates.shape[1]
    rises = []
    for j in range(len(readings) - 1):
        per_shadow = rates[j + 1] - rates[j]
        rise = float(mean_rate[j + 1] - mean_rate[j])
        if not math.isfinite(rise):
            rises.append(False)
            continue
        spread = float(per_shadow.std(ddof=1) / math.sqrt(shadows)) if shadows >= 2 else 0.0
        threshold = max(relative_noise * abs(float(mean_rate[j])), noise_sigmas * spread, 1e-15)
        rises.append(rise > threshold)
    for j in range(len(rises) - consecutive + 1):
        if all(rises[j:j + consecutive]):
            return int(readings[j].epoch)
    return None


# ---------------------------------------------------------------------------------------------
# The budget
# ---------------------------------------------------------------------------------------------


def _planner() -> Any:
    try:
        from ..theory import bounds
    except ImportError:
        return None
    return getattr(bounds, "max_steps", None)


def plan_projection(plan: TrainingPlan, reading: EpochReading, target: float,
                     last_within: int | None, steps_per_epoch: float) -> BudgetProjection | None:
    """The planner's answer turned into epochs; ``None`` when the planner cannot be used."""
    planner = _planner()
    constants = reading.constants
    if planner is None or not constants or steps_per_epoch <= 0:
        return None
    regime = reading.bounds.get("regime") if isinstance(reading.bounds, Mapping) else None
    if regime is None:
        convex = constants.get("convex")
        gamma = finite_or_none(constants.get("strong_convexity")) or 0.0
        regime = "nonconvex" if not convex else ("strongly_convex" if gamma > 0 else "convex")
    try:
        answer = planner(target, regime=regime, n=plan.n, lipschitz=constants["lipschitz"],
                         schedule=plan.step_size, smoothness=constants.get("smoothness"),
                         strong_convexity=constants.get("strong_convexity") or 0.0,
                         batch_size=plan.batch_size, loss_bound=constants.get("loss_bound"),
                         bound="stability")
    except (KeyError, TypeError, ValueError):
        return None
    method = "planner"
    if not answer.applicable:
        return BudgetProjection(target, "expected", last_within, None, False, method, None,
                                f"the planner finds the bound not applicable: {answer.reason}")
    if answer.unbounded:
        return BudgetProjection(target, "expected", last_within, None, True, method, None,
                                f"the planner finds that any number of steps stays within "
                                f"{target:g} ({answer.note or 'the bound levels off'})")
    if answer.value is None:
        return BudgetProjection(target, "expected", last_within, 0, False, method, None,
                                f"the planner finds no step count within {target:g}: "
                                f"{answer.reason}")
    allowed = int(answer.value)
    extra = max(0, math.floor((allowed - reading.steps) / steps_per_epoch))
    plan_text = (f"the planner allows {allowed} steps in all within {target:g} (step size "
                 f"{plan.step_size:g}, batch {plan.batch_size}, n={plan.n}); {reading.steps} "
                 "are done, so ")
    if allowed < reading.steps:
        plan_text += "the budget is already spent"
    else:
        plan_text += f"about {extra} more epoch(s) of {steps_per_epoch:g} steps stay within it"
    return BudgetProjection(target, "expected", last_within, extra, False, method, None,
                            plan_text)


def extrapolate_budget(values: list[tuple[int, float]], target: float, bound_name: str,
             last_within: int | None) -> BudgetProjection:
    """Extrapolate the bound's per-epoch growth from the recorded values (epoch, value)."""
    def result(extra: int | None, unlimited: bool, method: str, growth: float | None,
               reason: str) -> BudgetProjection:
        return BudgetProjection(target, bound_name, last_within, extra, unlimited, method,
                                growth, reason)

    if not values:
        return result(None, False, "none", None,
                      f"no applicable {bound_name} bound was recorded, so the budget of "
                      f"{target:g} cannot be checked")
    last_epoch, last_value = values[-1]
    if last_value > target:
        where = (f"epoch {last_within} was the last within it" if last_within is not None
                 else "no recorded epoch was within it")
        return result(0, False, "none", None,
                      f"the {bound_name} bound ({last_value:.4g} at epoch {last_epoch}) already "
                      f"exceeds the target {target:g}; {where}")
    if len(values) < 2:
        return result(None, False, "none", None,
                      f"one epoch recorded: the bound's growth per epoch cannot be extrapolated "
                      f"yet (bound {last_value:.4g} of {target:g})")
    increments = [b - a for (_, a), (_, b) in zip(values[:-1], values[1:])]
    growth = increments[-1]
    remaining = target - last_value
    if growth <= 0:
        return result(None, True, "extrapolation", growth,
                      f"the {bound_name} bound stopped growing ({last_value:.4g} of {target:g} at "
                      f"epoch {last_epoch}); at this rate the budget does not bind")
    ratio = increments[-1] / increments[-2] if len(increments) >= 2 and increments[-2] > 0 else 1.0
    extra, total, step = 0, 0.0, growth
    while extra < 10**6:
        if ratio > 1.0:
            step *= ratio
        if total + step > remaining * (1 + 1e-9):  # round-off must not cost an epoch
            break
        total += step
        extra += 1
    shape = f"growing by x{ratio:.3g} per epoch" if ratio > 1.0 else "constant"
    return result(extra, False, "extrapolation", growth,
                  f"the {bound_name} bound is {last_value:.4g} of {target:g} at epoch "
                  f"{last_epoch} and grew {growth:.4g} in its last epoch; carrying that growth "
                  f"forward ({shape}), about {extra} more epoch(s) stay within the target")
