"""Stop suggestions from a run's epoch readings, each with the criterion and the reason.

``advise`` is a pure function of the readings (``EpochReading`` objects or history.jsonl dicts).
It reports four criteria and suggests one epoch:

- ``bound_risk``: the epoch minimising training loss + expected stability bound. When the bound
  applies, ``E[R(A(S))] <= E[R_S(A(S))] + eps_stab`` (Hardt, Recht & Singer 2016, Thm 2.2), so the
  sum is an upper bound on expected test risk, with this run's training loss standing in for its
  expectation. An epoch where the sum is at least the loss range ``M`` (when declared) is
  *vacuous*: the risk is at most ``M`` anyway. Vacuous epochs are never chosen; when every epoch
  is vacuous the criterion says so and the measured criteria decide.
- ``bound_budget`` (only with ``target``): the last epoch whose bound stays within the target, and
  a projection of how many more epochs the budget allows (see ``BudgetProjection``).
- ``measured_risk``: the epoch minimising training loss + the on-average replace-one gap estimate
  (available only when the replacements are fresh held-out draws).
- ``divergence_acceleration``: the epoch after which the measured divergence grows faster than
  linearly. Precisely: let ``D_e`` be the mean divergence over the shadows at epoch ``e``
  (``D_0 = 0``, all copies start equal) and ``r_e = (D_e - D_{e-1}) / (steps_e - steps_{e-1})``
  its growth per optimizer step during epoch ``e``. Epoch ``e`` is flagged when the growth rate
  rises for ``consecutive`` (default 2) epochs in a row, each rise beyond a noise threshold:
  ``r_{j+1} - r_j > tau_j`` for ``j = e .. e + consecutive - 1``, with
  ``tau_j = max(relative_noise * |r_j|, noise_sigmas * SE_j, 1e-15)`` where ``SE_j`` is the
  standard error across shadows of the per-shadow rises (needs 2+ shadows; otherwise 0).
  The first flagged epoch is reported.

Suggestion: when the bound applies, ``bound_risk``'s epoch, or ``bound_budget``'s when that is
earlier (training past it breaks the budget). When no bound applies, the measured criteria decide:
``measured_risk`` first, then ``divergence_acceleration``. Missing values stay ``None``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields
from typing import Any

import numpy as np

from .reading import EpochReading, json_safe

__all__ = [
    "AdviceRow",
    "BudgetProjection",
    "CAUTIONS",
    "Criterion",
    "StopAdvice",
    "TrainingPlan",
    "advise",
    "acceleration_epoch",
    "as_readings",
]

#: Shown with every suggestion (and in the report).
CAUTIONS: tuple[str, ...] = (
    "A stability bound holds only under its stated assumptions (plain SGD, the declared "
    "Lipschitz and smoothness constants, convexity where claimed); estimated constants make it "
    "indicative, not certified.",
    "No bound or estimate here is a substitute for evaluation on held-out data.",
    "High-stakes deployments follow their own validation and regulatory practice; a stop "
    "suggestion is an input to that process, not a replacement for it.",
)

_BUDGET_ON = ("expected", "high_probability")


@dataclass(frozen=True)
class AdviceRow:
    """One epoch of the table behind the advice (``None`` where a value is missing)."""

    epoch: int
    steps: int
    train_loss: float | None
    holdout_loss: float | None
    expected_bound: float | None
    high_probability_gap: float | None
    bound_applies: bool
    bound_reason: str
    bound_risk: float | None
    bound_vacuous: bool
    gap_estimate: float | None
    gap_stderr: float | None
    measured_risk: float | None
    mean_divergence: float | None
    divergence_rate: float | None
    within_target: bool | None


@dataclass(frozen=True)
class Criterion:
    """A criterion's verdict: the epoch it picks (or ``None``) and why, in one sentence."""

    name: str
    epoch: int | None
    value: float | None
    reason: str


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


@dataclass(frozen=True)
class StopAdvice:
    """A suggested stopping epoch, the criterion that chose it, and everything behind it."""

    suggested_epoch: int | None
    criterion: str | None
    reason: str
    rows: tuple[AdviceRow, ...]
    criteria: tuple[Criterion, ...]
    budget: BudgetProjection | None
    bound_applies: bool
    bound_reason: str
    certified: bool
    epochs_seen: int
    cautions: tuple[str, ...] = CAUTIONS

    def criterion_named(self, name: str) -> Criterion | None:
        """The criterion called ``name``, or ``None``."""
        return next((c for c in self.criteria if c.name == name), None)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-friendly dict (non-finite floats become None); ``from_dict`` inverts it."""
        return json_safe(asdict(self))

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> StopAdvice:
        """Rebuild from ``to_dict`` output (e.g. a run's advice.json)."""
        budget = data.get("budget")
        return cls(
            suggested_epoch=data.get("suggested_epoch"),
            criterion=data.get("criterion"),
            reason=str(data.get("reason", "")),
            rows=tuple(_build(AdviceRow, row) for row in data.get("rows", ())),
            criteria=tuple(_build(Criterion, c) for c in data.get("criteria", ())),
            budget=_build(BudgetProjection, budget) if budget else None,
            bound_applies=bool(data.get("bound_applies", False)),
            bound_reason=str(data.get("bound_reason", "")),
            certified=bool(data.get("certified", False)),
            epochs_seen=int(data.get("epochs_seen", 0) or 0),
            cautions=tuple(data.get("cautions", CAUTIONS)),
        )

    def summary(self) -> str:
        """A few lines of plain text: the suggestion, each criterion, the cautions."""
        if self.suggested_epoch is None:
            head = f"No stop suggestion after {self.epochs_seen} epoch(s): {self.reason}"
        else:
            head = (f"Suggested stop: epoch {self.suggested_epoch} of {self.epochs_seen} "
                    f"({self.criterion}). {self.reason}")
        lines = [head]
        if not self.bound_applies and self.bound_reason not in self.reason:
            lines.append(f"Bounds: not applicable ({self.bound_reason}).")
        elif not self.certified:
            lines.append("Bounds: computed with estimated constants (indicative, not certified).")
        for criterion in self.criteria:
            where = "-" if criterion.epoch is None else f"epoch {criterion.epoch}"
            lines.append(f"  {criterion.name}: {where}. {criterion.reason}")
        if self.budget is not None:
            lines.append(f"  budget: {self.budget.reason}")
        lines.append("Cautions: a bound holds only under its stated assumptions; no bound replaces "
                     "held-out evaluation; high-stakes deployments follow their own validation "
                     "and regulatory practice.")
        return "\n".join(lines)


def _build(cls: type, data: Mapping[str, Any]) -> Any:
    names = {f.name for f in fields(cls)}
    return cls(**{k: v for k, v in data.items() if k in names})




# ---------------------------------------------------------------------------------------------
# Readings in
# ---------------------------------------------------------------------------------------------

_EMPTY = {"divergence": (), "audit_divergence": None, "layer_divergence": {},
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


def _finite(value: Any) -> float | None:
    if value is None or isinstance(value, bool):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def _ordered(readings: Sequence[EpochReading | Mapping[str, Any]]) -> list[EpochReading]:
    """By epoch; a repeated epoch (a resumed run) keeps its last reading."""
    by_epoch: dict[int, EpochReading] = {}
    for item in readings:
        reading = _as_reading(item)
        by_epoch[int(reading.epoch)] = reading
    return [by_epoch[e] for e in sorted(by_epoch)]


def as_readings(records: Sequence[EpochReading | Mapping[str, Any]]) -> list[EpochReading]:
    """Readings or history.jsonl dicts as EpochReadings, by epoch (a repeated epoch: the last)."""
    return _ordered(records)


def _bound_status(reading: EpochReading, value: float | None, name: str) -> tuple[bool, str]:
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


def _divergence_matrix(readings: Sequence[EpochReading]) -> np.ndarray | None:
    """Epochs x shadows, over the shadows with a finite value at every epoch (None if none)."""
    width = max((len(r.divergence) for r in readings), default=0)
    if width == 0:
        return None
    table = np.full((len(readings), width), np.nan)
    for i, reading in enumerate(readings):
        for k, value in enumerate(reading.divergence):
            number = _finite(value)
            faulted = k < len(reading.shadow_faults) and reading.shadow_faults[k] is not None
            if number is not None and not faulted:
                table[i, k] = number
    keep = np.all(np.isfinite(table), axis=0)
    return table[:, keep] if keep.any() else None


def _rates(readings: Sequence[EpochReading], table: np.ndarray) -> np.ndarray:
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
    ordered = _ordered(readings)
    table = _divergence_matrix(ordered) if ordered else None
    if table is None:
        return None
    found = _acceleration(ordered, table, consecutive, relative_noise, noise_sigmas)
    return found


def _acceleration(readings: Sequence[EpochReading], table: np.ndarray, consecutive: int,
                  relative_noise: float, noise_sigmas: float) -> int | None:
    if consecutive < 1:
        raise ValueError(f"consecutive must be >= 1, got {consecutive}")
    rates = _rates(readings, table)
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
        from . import bounds
    except ImportError:
        return None
    return getattr(bounds, "max_steps", None)


def _plan_projection(plan: TrainingPlan, reading: EpochReading, target: float,
                     last_within: int | None, steps_per_epoch: float) -> BudgetProjection | None:
    """The planner's answer turned into epochs; ``None`` when the planner cannot be used."""
    planner = _planner()
    constants = reading.constants
    if planner is None or not constants or steps_per_epoch <= 0:
        return None
    regime = reading.bounds.get("regime") if isinstance(reading.bounds, Mapping) else None
    if regime is None:
        convex, gamma = constants.get("convex"), _finite(constants.get("strong_convexity")) or 0.0
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


def _project(values: list[tuple[int, float]], target: float, bound_name: str,
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


# ---------------------------------------------------------------------------------------------
# The advice
# ---------------------------------------------------------------------------------------------


def advise(readings: Sequence[EpochReading | Mapping[str, Any]], target: float | None = None,
           *, budget_on: str = "expected", plan: TrainingPlan | None = None,
           consecutive: int = 2, relative_noise: float = 0.05,
           noise_sigmas: float = 2.0) -> StopAdvice:
    """Stop suggestions from ``readings`` (see the module docstring for every criterion).

    ``target`` is a budget on the bound chosen by ``budget_on`` ("expected": the expected
    stability bound; "high_probability": the high-probability gap bound). With ``plan`` (and
    ``budget_on="expected"``) the projection comes from the planner. ``consecutive``,
    ``relative_noise`` and ``noise_sigmas`` tune the divergence-acceleration rule.
    """
    if budget_on not in _BUDGET_ON:
        raise ValueError(f"budget_on must be one of {_BUDGET_ON}, got {budget_on!r}")
    if target is not None:
        target = _finite(target)
        if target is None or target <= 0:
            raise ValueError("target must be a finite number > 0")
    ordered = _ordered(readings)
    if not ordered:
        return StopAdvice(None, None, "no epoch has been recorded yet", (), (), None, False,
                          "no readings", False, 0)

    table = _divergence_matrix(ordered)
    rows = _rows(ordered, table, target, budget_on)
    bound_applies = rows[-1].bound_applies and not any(r.assumption_violated for r in ordered)
    bound_reason = "" if bound_applies else next(
        (r.bound_reason for r in reversed(rows) if not r.bound_applies), "")
    constants = ordered[-1].constants or {}
    certified = bound_applies and constants.get("source") == "declared"

    bound_pick = _bound_criterion(rows, bound_applies, bound_reason, certified, constants)
    budget, budget_pick = None, None
    if target is not None:
        budget, budget_pick = _budget_criterion(rows, ordered[-1], target, budget_on, plan,
                                                bound_applies)
    measured_pick = _measured_criterion(rows, ordered)
    growth_pick = _growth_criterion(rows, ordered, table, consecutive, relative_noise,
                                    noise_sigmas)
    criteria = tuple(c for c in (bound_pick, budget_pick, measured_pick, growth_pick)
                     if c is not None)

    def result(epoch: int | None, name: str | None, reason: str) -> StopAdvice:
        return StopAdvice(epoch, name, reason, tuple(rows), criteria, budget, bound_applies,
                          bound_reason, certified, len(rows))

    chosen = _choose(bound_pick, budget_pick, measured_pick, growth_pick)
    if chosen is None:
        return result(None, None, "no criterion could choose an epoch: "
                      + ("no bound applies and " if not bound_applies else "")
                      + "neither a gap estimate nor a divergence acceleration is available")
    reason = chosen.reason
    if bound_applies and bound_pick.epoch is None and chosen is not budget_pick:
        reason = f"{bound_pick.reason} Measured criterion: {reason}"
    if chosen is bound_pick and budget_pick is not None and budget_pick.epoch is None:
        reason = f"{reason} The target cannot be met: {budget_pick.reason}"
    if not bound_applies:
        reason = f"No stability bound applies ({bound_reason}); measured criterion: {reason}"
    return result(chosen.epoch, chosen.name, reason)


def _rows(ordered: Sequence[EpochReading], table: np.ndarray | None, target: float | None,
          budget_on: str) -> list[AdviceRow]:
    """The per-epoch table behind the advice."""
    rates = _rates(ordered, table) if table is not None else None
    rows = []
    for i, reading in enumerate(ordered):
        expected = _finite(reading.expected_bound)
        high = _finite(reading.high_probability_gap)
        applies, why = _bound_status(reading, expected, "expected")
        train = _finite(reading.train_loss)
        gap = _finite(reading.gap_estimate)
        budget_value = expected
        if budget_on == "high_probability":
            applies_high, _ = _bound_status(reading, high, "high_probability")
            budget_value = high if applies and applies_high else None
        risk = train + expected if applies and train is not None else None
        loss_range = _finite((reading.constants or {}).get("loss_bound"))
        rows.append(AdviceRow(
            epoch=int(reading.epoch), steps=int(reading.steps), train_loss=train,
            holdout_loss=_finite(reading.holdout_loss), expected_bound=expected,
            high_probability_gap=high, bound_applies=applies, bound_reason=why,
            bound_risk=risk,
            bound_vacuous=risk is not None and loss_range is not None and risk >= loss_range,
            gap_estimate=gap, gap_stderr=_finite(reading.gap_stderr),
            measured_risk=train + gap if train is not None and gap is not None else None,
            mean_divergence=float(table[i].mean()) if table is not None else None,
            divergence_rate=_finite(rates[i].mean()) if rates is not None else None,
            within_target=(None if target is None or not applies or budget_value is None
                           else budget_value <= target)))
    return rows


def _argmin(pairs: list[tuple[int, float]]) -> tuple[int, float] | None:
    if not pairs:
        return None
    return min(pairs, key=lambda pair: (pair[1], pair[0]))


def _edge_note(epoch: int, last: int, count: int) -> str:
    if count == 1:
        return "; only one epoch qualifies, so this is no minimum yet"
    if epoch == last:
        return "; it is the last recorded epoch, so the sum may still be falling"
    return ""


def _bound_criterion(rows: Sequence[AdviceRow], bound_applies: bool, bound_reason: str,
                     certified: bool, constants: Mapping[str, Any]) -> Criterion:
    """(a) the epoch minimising training loss + expected bound, over non-vacuous epochs."""
    name = "bound_risk"
    if not bound_applies:
        return Criterion(name, None, None, f"No stability bound applies: {bound_reason}.")
    pairs = [(r.epoch, r.bound_risk) for r in rows
             if r.bound_risk is not None and not r.bound_vacuous]
    best = _argmin(pairs)
    if best is not None:
        kind = "certified" if certified else "indicative (estimated constants)"
        return Criterion(name, best[0], best[1],
                         f"Training loss + expected stability bound is smallest at epoch "
                         f"{best[0]} ({best[1]:.4g}), an upper bound on expected test risk under "
                         f"the bound's assumptions, {kind}"
                         + _edge_note(best[0], rows[-1].epoch, len(pairs)) + ".")
    if any(r.bound_vacuous for r in rows):
        return Criterion(name, None, None,
                         "The bound is vacuous at every epoch: training loss + bound is at least "
                         f"the loss range M = {constants.get('loss_bound'):g}, which bounds the "
                         "risk anyway.")
    return Criterion(name, None, None, "No epoch has both a training loss and an applicable "
                     "bound.")


def _budget_criterion(rows: Sequence[AdviceRow], last: EpochReading, target: float,
                      budget_on: str, plan: TrainingPlan | None, bound_applies: bool
                      ) -> tuple[BudgetProjection, Criterion]:
    """(b) the last epoch within the target, and how many more epochs the budget allows."""
    values = []
    if bound_applies:
        for r in rows:
            value = r.expected_bound if budget_on == "expected" else r.high_probability_gap
            if r.within_target is not None and value is not None:
                values.append((r.epoch, value))
    last_within = None
    for epoch, value in values:  # the last epoch of the first unbroken run within the target
        if value > target:
            break
        last_within = epoch
    budget = None
    if plan is not None and budget_on == "expected" and values:
        span = rows[-1].steps - (rows[-2].steps if len(rows) > 1 else 0)
        budget = _plan_projection(plan, last, target, last_within, span)
    if budget is None:
        budget = _project(values, target, budget_on, last_within)
    name = "bound_budget"
    if last_within is None:
        reason = budget.reason if values else f"no applicable bound to hold to {target:g}"
        return budget, Criterion(name, None, None, reason[:1].upper() + reason[1:] + ".")
    chosen = dict(values)[last_within]
    return budget, Criterion(name, last_within, chosen,
                             f"Epoch {last_within} is the last whose {budget_on} bound "
                             f"({chosen:.4g}) stays within the target {target:g}.")


def _measured_criterion(rows: Sequence[AdviceRow], ordered: Sequence[EpochReading]
                        ) -> Criterion:
    """(c) the epoch minimising training loss + the replace-one gap estimate."""
    pairs = [(r.epoch, r.measured_risk) for r in rows if r.measured_risk is not None]
    best = _argmin(pairs)
    if best is not None:
        return Criterion("measured_risk", best[0], best[1],
                         f"Training loss + replace-one gap estimate is smallest at epoch "
                         f"{best[0]} ({best[1]:.4g}), an estimate of test risk, not a bound"
                         + _edge_note(best[0], rows[-1].epoch, len(pairs)) + ".")
    gap_note = next((n for r in reversed(ordered) for n in r.notes if "gap estimate" in n),
                    "no gap estimate was recorded")
    return Criterion("measured_risk", None, None, f"Unavailable: {gap_note.rstrip('.')}.")


def _growth_criterion(rows: Sequence[AdviceRow], ordered: Sequence[EpochReading],
                      table: np.ndarray | None, consecutive: int, relative_noise: float,
                      noise_sigmas: float) -> Criterion:
    """(c) the epoch after which the measured divergence grows faster than linearly."""
    name = "divergence_acceleration"
    if table is None:
        return Criterion(name, None, None,
                         "Unavailable: no shadow has a finite divergence at every epoch.")
    turn = _acceleration(ordered, table, consecutive, relative_noise, noise_sigmas)
    if turn is not None:
        value = _finite(table[[r.epoch for r in rows].index(turn)].mean())
        return Criterion(name, turn, value,
                         f"After epoch {turn} the mean divergence's growth per step rose "
                         f"{consecutive} epoch(s) running beyond noise: the shadows are "
                         "separating faster than linearly.")
    if len(rows) < consecutive + 1:
        return Criterion(name, None, None, f"Too few epochs: the rule needs {consecutive + 1}, "
                         f"{len(rows)} recorded.")
    return Criterion(name, None, None, "The divergence has not grown faster than linearly so far.")


def _choose(bound_pick: Criterion, budget_pick: Criterion | None, measured_pick: Criterion,
            growth_pick: Criterion) -> Criterion | None:
    """The bound's epoch (or the budget's when earlier); without either, the measured ones."""
    if bound_pick.epoch is not None:
        if budget_pick is not None and budget_pick.epoch is not None \
                and budget_pick.epoch < bound_pick.epoch:
            return budget_pick
        return bound_pick
    if budget_pick is not None and budget_pick.epoch is not None:
        return budget_pick
    for pick in (measured_pick, growth_pick):
        if pick.epoch is not None:
            return pick
    return None
