"""How each stop criterion reads the epochs: the advice's rows and criteria, the trivial loss, the
certified gap, the guarantee's series, the measured pick. ``sgdstab.outputs.advice`` assembles
them into a ``StopAdvice``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass

import numpy as np

from .labels import CRITERION_LABELS
from .reading import EpochReading
from .trends import (
    BudgetProjection,
    TrainingPlan,
    acceleration_in,
    bound_status,
    divergence_rates,
    extrapolate_budget,
    finite_or_none,
    plan_projection,
)

__all__ = ["AdviceRow", "Criterion", "LABELS", "LOCKSTEP_BROKEN"]

#: Human labels of the criteria this advice names (reports and dashboards show these).
LABELS: dict[str, str] = {name: CRITERION_LABELS[name] for name in (
    "holdout_loss", "estimated_risk", "divergence_acceleration", "guarantee", "certified_risk")}


@dataclass(frozen=True)
class AdviceRow:
    """One epoch of the table behind the advice (``None`` where a value is missing).

    ``bound_risk`` is training loss + the stability bound (an estimate of the bound on *expected*
    risk); ``certified_gap`` the union-bound high-probability gap bound of this run and
    ``certified_risk`` training loss + it; ``*_vacuous`` compare with the trivial loss.
    """

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
    holdout_stderr: float | None = None
    run_gap: float | None = None
    run_gap_low: float | None = None
    run_gap_high: float | None = None
    expected_vacuous: bool = False
    certified_gap: float | None = None
    certified_risk: float | None = None
    certified_vacuous: bool = False
    path_ratio: float | None = None


@dataclass(frozen=True)
class Criterion:
    """A criterion's verdict: the epoch it picks (or ``None``) and why, in one sentence."""

    name: str
    epoch: int | None
    value: float | None
    reason: str
    label: str = ""


def _trivial(ordered: Sequence[EpochReading], given: float | None) -> float | None:
    """The trivial loss: given, else the readings' own, else the loss bound M."""
    if given is not None:
        value = finite_or_none(given)
        if value is None or value <= 0:
            raise ValueError("trivial_loss must be a finite number > 0")
        return value
    for reading in reversed(ordered):
        value = finite_or_none(reading.trivial_loss)
        if value is not None:
            return value
    return finite_or_none((ordered[-1].constants or {}).get("loss_bound"))


def _certified_gap(reading: EpochReading, epochs: int) -> float | None:
    """The high-probability gap bound at confidence delta / epochs (a union over the epochs)."""
    bounds = reading.bounds if isinstance(reading.bounds, Mapping) else {}
    high = bounds.get("high_probability")
    stability = finite_or_none(reading.uniform_stability)
    n, delta = bounds.get("n"), finite_or_none(bounds.get("delta"))
    bound = finite_or_none((reading.constants or {}).get("loss_bound"))
    if not (isinstance(high, Mapping) and high.get("applicable")) or reading.assumption_violated \
            or stability is None or n is None or delta is None or bound is None \
            or (reading.constants or {}).get("source") != "declared":
        return None
    from ..theory.bounds import high_probability_gap

    return finite_or_none(high_probability_gap(stability, int(n), bound, delta / epochs).value)


def _path_ratio(reading: EpochReading) -> float | None:
    ratios = []
    for d, b in zip(reading.divergence, reading.path_bound):
        divergence, bound = finite_or_none(d), finite_or_none(b)
        if divergence is not None and bound and bound > 0:
            ratios.append(divergence / bound)
    return max(ratios) if ratios else None


def _rows(ordered: Sequence[EpochReading], table: np.ndarray | None,
          trivial: float | None) -> list[AdviceRow]:
    """The per-epoch table behind the advice."""
    rates = divergence_rates(ordered, table) if table is not None else None
    rows = []
    for i, reading in enumerate(ordered):
        expected = finite_or_none(reading.expected_bound)
        applies, why = bound_status(reading, expected, "expected")
        train = finite_or_none(reading.train_loss)
        gap = finite_or_none(reading.gap_estimate)
        risk = train + expected if applies and train is not None and expected is not None \
            else None
        certified_gap = _certified_gap(reading, len(ordered))
        certified_risk = None if certified_gap is None or train is None else train + certified_gap

        def vacuous(value: float | None) -> bool:
            return value is not None and trivial is not None and value >= trivial

        rows.append(AdviceRow(
            epoch=int(reading.epoch), steps=int(reading.steps), train_loss=train,
            holdout_loss=finite_or_none(reading.holdout_loss), expected_bound=expected,
            high_probability_gap=finite_or_none(reading.high_probability_gap),
            bound_applies=applies, bound_reason=why, bound_risk=risk,
            bound_vacuous=vacuous(risk), gap_estimate=gap,
            gap_stderr=finite_or_none(reading.gap_stderr),
            measured_risk=train + gap if train is not None and gap is not None else None,
            mean_divergence=float(table[i].mean()) if table is not None else None,
            divergence_rate=finite_or_none(rates[i].mean()) if rates is not None else None,
            within_target=None, holdout_stderr=finite_or_none(reading.holdout_stderr),
            run_gap=finite_or_none(reading.run_gap),
            run_gap_low=finite_or_none(reading.run_gap_low),
            run_gap_high=finite_or_none(reading.run_gap_high),
            expected_vacuous=vacuous(expected) if applies else False,
            certified_gap=certified_gap, certified_risk=certified_risk,
            certified_vacuous=vacuous(certified_risk if certified_risk is not None
                                      else certified_gap),
            path_ratio=_path_ratio(reading)))
    return rows


def _guarantee_series(rows: Sequence[AdviceRow], budget_on: str, bound_applies: bool,
                      certified: bool) -> tuple[list[tuple[int, float]], str]:
    """(epoch, value) of the bound the guarantee is about, and that bound's description."""
    if not bound_applies:
        return [], ""
    use_certified = budget_on == "certified" or (
        budget_on == "auto" and rows[-1].certified_gap is not None)
    if use_certified:
        return ([(r.epoch, r.certified_gap) for r in rows if r.certified_gap is not None],
                f"certified gap bound (probability >= 1 - delta over all {len(rows)} epochs)")
    if budget_on == "high_probability":
        return ([(r.epoch, r.high_probability_gap) for r in rows
                 if r.high_probability_gap is not None and r.bound_applies],
                "high-probability gap bound (one epoch at a time)")
    kind = "declared constants" if certified else "estimated constants: indicative"
    return ([(r.epoch, r.expected_bound) for r in rows
             if r.expected_bound is not None and r.bound_applies],
            f"stability bound on the expected gap ({kind})")


def _with_target(row: AdviceRow, value: float | None, target: float | None) -> AdviceRow:
    if value is None or target is None:
        return row
    fields_now = asdict(row)
    fields_now["within_target"] = value <= target and not (row.expected_vacuous
                                                           or row.certified_vacuous)
    return AdviceRow(**fields_now)


def _no_guarantee(bound_reason: str, trivial: float | None, applies: bool) -> Criterion:
    if not applies:
        return Criterion("guarantee", None, None, f"No stability bound applies: {bound_reason}.")
    return Criterion("guarantee", None, None,
                     "No target: pass target=, or declare a loss bound M (or let the tracker "
                     "measure the loss before training) so the default target can be set."
                     if trivial is None else "No applicable bound was recorded.")


def _guarantee(rows: Sequence[AdviceRow], series: list[tuple[int, float]],
               last: EpochReading, target: float, bound_name: str,
               plan: TrainingPlan | None) -> tuple[BudgetProjection, Criterion]:
    """The last epoch of the first unbroken run within the target, and the projection."""
    vacuous = {r.epoch for r in rows if r.expected_vacuous or r.certified_vacuous}
    last_within = None
    for epoch, value in series:
        if value > target or epoch in vacuous:   # a vacuous bound guarantees nothing
            break
        last_within = epoch
    budget = None
    if plan is not None and bound_name.startswith("stability"):
        span = rows[-1].steps - (rows[-2].steps if len(rows) > 1 else 0)
        budget = plan_projection(plan, last, target, last_within, span)
    if budget is None:
        budget = extrapolate_budget(series, target, bound_name.split(" (")[0], last_within)
    if last_within is None:
        first = series[0]
        if first[0] in vacuous:
            return budget, Criterion(
                "guarantee", None, first[1],
                f"The {bound_name} is vacuous from epoch {first[0]} on ({first[1]:.4g}): no "
                "better than the trivial loss.")
        return budget, Criterion(
            "guarantee", None, first[1],
            f"The {bound_name} exceeds the target {target:.4g} from epoch {first[0]} on "
            f"({first[1]:.4g}).")
    value = dict(series)[last_within]
    tail = "" if last_within < series[-1][0] else " (every recorded epoch)"
    return budget, Criterion(
        "guarantee", last_within, value,
        f"The {bound_name} stays within the target {target:.4g} through epoch "
        f"{last_within}{tail}: {value:.4g} there.")


def _certified_criterion(rows: Sequence[AdviceRow]) -> Criterion | None:
    """The epoch with the smallest non-vacuous certified risk bound (reported, never chosen
    by default)."""
    pairs = [(r.epoch, r.certified_risk) for r in rows
             if r.certified_risk is not None and not r.certified_vacuous]
    if not pairs:
        if any(r.certified_risk is not None for r in rows):
            return Criterion("certified_risk", None, None,
                             "Vacuous at every epoch: training loss + the certified gap bound "
                             "is no better than the trivial loss.")
        return None
    epoch, value = min(pairs, key=lambda pair: (pair[1], pair[0]))
    return Criterion("certified_risk", epoch, value,
                     f"Training loss + the certified gap bound is smallest at epoch {epoch} "
                     f"({value:.4g}): with probability >= 1 - delta this run's test risk is at "
                     "most that (up to the probe's estimate of the training loss).")


def _edge_note(epoch: int, last: int, count: int) -> str:
    if count == 1:
        return "; only one epoch is recorded, so this is no minimum yet"
    if epoch == last:
        return "; it is the last recorded epoch, so it may still be falling: training longer " \
               "may help"
    return ""


def _measured_pick(rows: Sequence[AdviceRow], ordered: Sequence[EpochReading],
                   table: np.ndarray | None, consecutive: int, relative_noise: float,
                   noise_sigmas: float) -> list[Criterion]:
    """The measured criteria, in the order they decide."""
    out = []
    held = [(r.epoch, r.holdout_loss, r.holdout_stderr) for r in rows
            if r.holdout_loss is not None]
    if held:
        epoch, value, error = min(held, key=lambda t: (t[1], t[0]))
        count = ordered[-1].holdout_count
        where = f" on {count} held-out examples" if count else " on the probe's held-out rows"
        spread = f" +/- {error:.2g} (standard error)" if error is not None else ""
        out.append(Criterion("holdout_loss", epoch, value,
                             f"The held-out loss is lowest at epoch {epoch}: {value:.4g}"
                             f"{spread}{where}" + _edge_note(epoch, rows[-1].epoch, len(held))
                             + "."))
    else:
        out.append(Criterion("holdout_loss", None, None,
                             "Unavailable: no held-out set (pass replacements=<held-out set>)."))
    estimated = _estimated_risk(rows)
    if estimated is not None:
        out.append(estimated)
    name = "divergence_acceleration"
    if table is None:
        out.append(Criterion(name, None, None,
                             "Unavailable: no shadow has a finite divergence at every epoch."))
        return out
    turn = acceleration_in(ordered, table, consecutive, relative_noise, noise_sigmas)
    if turn is not None:
        mean = finite_or_none(table[[r.epoch for r in rows].index(turn)].mean())
        out.append(Criterion(name, turn, mean,
                             f"After epoch {turn} the mean divergence's growth per step rose "
                             f"{consecutive} epoch(s) running beyond noise: the shadows are "
                             "separating faster than linearly."))
    elif len(rows) < consecutive + 1:
        out.append(Criterion(name, None, None, f"Too few epochs: the rule needs "
                             f"{consecutive + 1}, {len(rows)} recorded."))
    else:
        out.append(Criterion(name, None, None,
                             "The divergence has not grown faster than linearly so far."))
    return out


def _estimated_risk(rows: Sequence[AdviceRow]) -> Criterion | None:
    """Training loss + the replace-one gap estimate, read with its standard error.

    The estimate averages only K shadows, so its minimum is often noise. The pick is the earliest
    epoch within one standard error of the minimum (the one-standard-error rule of model
    selection, common practice); when every recorded epoch is within it, the estimate does not
    single out an epoch and the criterion picks none (the advice then falls to the next one)."""
    triples = [(r.epoch, r.measured_risk, r.gap_stderr) for r in rows
               if r.measured_risk is not None]
    if not triples:
        return None
    low_epoch, low, error = min(triples, key=lambda t: (t[1], t[0]))
    spread = f" +/- {error:.2g} standard error" if error else ""
    smallest = (f"Training loss + the replace-one estimate of the expected gap is smallest at "
                f"epoch {low_epoch} ({low:.4g}{spread})")
    within = [(e, v) for e, v, _ in triples if v <= low + (error or 0.0)]
    if error and len(triples) > 1 and len(within) == len(triples):
        return Criterion("estimated_risk", None, None,
                         f"{smallest}, but every recorded epoch is within one standard error "
                         "of it: the estimate does not single out an epoch (more shadows "
                         "narrow it).")
    epoch, value = within[0]
    if epoch == low_epoch:
        return Criterion("estimated_risk", epoch, value,
                         f"{smallest}, an estimate, not a bound"
                         + _edge_note(epoch, rows[-1].epoch, len(triples)) + ".")
    return Criterion("estimated_risk", epoch, value,
                     f"{smallest}; epoch {epoch} ({value:.4g}) is the earliest within one "
                     "standard error of it, so the later minimum is not told apart from it "
                     "beyond noise (the one-standard-error rule); an estimate, not a bound.")


#: Why a criterion read from the shadows chose nothing once the lockstep is broken
LOCKSTEP_BROKEN = ("Not used: the lockstep is broken (see the verdict), so the shadows' readings "
                   "this rests on are not trustworthy.")


def _unchosen(criteria: Sequence[Criterion], broken: bool) -> str:
    """Why no measured criterion picked an epoch, one clause each (``broken``: the lockstep
    is, so the criteria read from the shadows were not used)."""
    if broken:
        return ("no held-out loss, and the criteria read from the shadows are not used (the "
                "lockstep is broken)")
    estimated = any(c.name == "estimated_risk" for c in criteria)
    return ", ".join((
        "no held-out loss",
        "no gap estimate" if not estimated else
        "a gap estimate that does not single out an epoch (every epoch within one standard "
        "error of its minimum)",
        "and no divergence acceleration"))


def _follow_sentence(chosen: Criterion | None, guarantee: Criterion, bound_name: str,
                     target: float | None, why_none: str) -> str:
    """One sentence saying which stop to follow and why."""
    if chosen is None:
        return (f"No criterion could choose an epoch: there is {why_none}; add a held-out set "
                "(replacements=...).")
    if chosen.name == "guarantee":
        return (f"Following the guarantee (follow='guarantee'): epoch {chosen.epoch} is the last "
                f"whose {bound_name} stays within {target:.4g}.")
    measured = f"epoch {chosen.epoch} ({LABELS[chosen.name]})"
    evidence = ("held-out loss measures this run's test risk directly"
                if chosen.name == "holdout_loss" else
                "it is measured evidence; no held-out loss was recorded")
    if guarantee.epoch is None:
        return (f"Follow the measured stop, {measured}: {evidence}; no stability bound gives a "
                "usable guarantee for this run.")
    assert chosen.epoch is not None  # a criterion is chosen only for the epoch it picks
    if guarantee.epoch >= chosen.epoch:
        return (f"Both agree: stop at {measured}; the {bound_name} stays within the target "
                "there.")
    return (f"Follow the measured stop, {measured}: {evidence}. The guarantee covers only "
            f"epochs up to {guarantee.epoch}: past it the bound, not necessarily the model, "
            f"exceeds the target; stop at epoch {guarantee.epoch} only if you need that "
            "guarantee itself.")


def _shadows_needed(last: EpochReading) -> int | None:
    """Shadows for the gap estimate's +/- 2 standard errors to exclude 0, at its spread."""
    gap, error = finite_or_none(last.gap_estimate), finite_or_none(last.gap_stderr)
    shadows = sum(1 for f in last.shadow_faults if f is None) or len(last.divergence)
    if gap is None or error is None or shadows < 2 or gap == 0:
        return None
    spread = error * math.sqrt(shadows)
    return max(2, math.ceil((2.0 * spread / abs(gap)) ** 2))
