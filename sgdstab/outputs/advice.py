"""Stop advice from a run's readings: a verdict first, a measured stop, the guarantee beside it.

``advise`` is a pure function of the readings (``EpochReading`` objects or history.jsonl dicts).

**The suggested stop follows the measured evidence** (``follow="measured"``, the default):
``holdout_loss``, the epoch with the lowest loss on the held-out examples no shadow swapped in;
without a held-out set, ``estimated_risk``, training loss + the replace-one estimate of the
*expected* gap; without either, ``divergence_acceleration`` (a heuristic: the divergence starts to
grow faster than linearly; see ``sgdstab.trends``).

**The guarantee is reported beside it, never choosing by default**: up to which epoch a stability
bound stays within a target (default: a tenth of the trivial loss). The bound used is

- the *certified gap bound* of this run when it applies: the seeded run's uniform-stability
  constant (Hardt, Recht & Singer 2016 growth recursion along the recorded sampling path, convex
  and strongly convex losses, declared constants) turned into a high-probability bound with
  McDiarmid's inequality (as in Bousquet & Elisseeff 2002), at confidence ``delta / E`` for each of
  the ``E`` epochs considered (a union bound), so that ``R(A(S)) <= R_S(A(S)) + bound`` holds at all
  epochs together with probability >= 1 - delta and choosing the epoch from the data is allowed;
- otherwise the *stability bound* ``eps_stab``, which bounds the *expected* gap over training
  sets (Hardt, Recht & Singer 2016, Thm 2.2): training loss + ``eps_stab`` estimates the expected
  risk's bound; it certifies nothing about this run's test risk.

A bound is *vacuous* when it is no better than a trivial predictor: the bound (or training loss +
the gap bound) is at least the trivial loss, i.e. the smaller of the model's loss before training
and the loss bound M. Vacuous bounds never choose anything and are shown as vacuous.
``follow="guarantee"`` suggests the guarantee's last epoch instead (when there is one).
"""

from __future__ import annotations

import html
import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields
from typing import Any

import numpy as np

from .labels import CRITERION_LABELS
from .reading import EpochReading, json_safe
from .trends import (
    BudgetProjection,
    TrainingPlan,
    acceleration_epoch,
    acceleration_in,
    as_readings,
    bound_status,
    divergence_matrix,
    divergence_rates,
    extrapolate_budget,
    finite_or_none,
    ordered_readings,
    plan_projection,
)
from .verdict import VerdictLine, verdict_lines

__all__ = [
    "AdviceRow",
    "BudgetProjection",
    "CAUTIONS",
    "Criterion",
    "LABELS",
    "StopAdvice",
    "TrainingPlan",
    "VerdictLine",
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

#: Human labels of the criteria this advice names (reports and dashboards show these).
LABELS: dict[str, str] = {name: CRITERION_LABELS[name] for name in (
    "holdout_loss", "estimated_risk", "divergence_acceleration", "guarantee", "certified_risk")}

#: The default target is this fraction of the trivial loss.
DEFAULT_TARGET_FRACTION = 0.1
_FOLLOW = ("measured", "guarantee")


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


@dataclass(frozen=True)
class StopAdvice:
    """A verdict, a suggested stopping epoch, the criterion that chose it, and everything behind
    it. ``print(advice)`` shows the summary; ``advice.to_markdown()`` the same as Markdown."""

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
    verdict: tuple[VerdictLine, ...] = ()
    target: float | None = None
    target_source: str = ""
    trivial_loss: float | None = None
    guarantee_epoch: int | None = None
    guarantee_bound: str = ""
    shadows_needed: int | None = None

    def criterion_named(self, name: str) -> Criterion | None:
        """The criterion called ``name``, or ``None``."""
        return next((c for c in self.criteria if c.name == name), None)

    @property
    def criterion_label(self) -> str:
        """The chosen criterion's human label ('' when none chose)."""
        return LABELS.get(self.criterion or "", self.criterion or "")

    def to_dict(self) -> dict[str, Any]:
        """A JSON-friendly dict (non-finite floats become None); ``from_dict`` inverts it.
        Also carries ``verdict_markdown`` and ``criterion_label`` for dashboards."""
        data = json_safe(asdict(self))
        data["verdict_markdown"] = self.to_markdown()
        data["criterion_label"] = self.criterion_label
        return data

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
            verdict=tuple(_build(VerdictLine, v) for v in data.get("verdict", ())),
            target=data.get("target"),
            target_source=str(data.get("target_source", "")),
            trivial_loss=data.get("trivial_loss"),
            guarantee_epoch=data.get("guarantee_epoch"),
            guarantee_bound=str(data.get("guarantee_bound", "")),
            shadows_needed=data.get("shadows_needed"),
        )

    def headline(self) -> str:
        """One sentence: the suggested stop and what chose it."""
        if self.suggested_epoch is None:
            return f"No stop suggestion after {self.epochs_seen} epoch(s)."
        return (f"Suggested stop: epoch {self.suggested_epoch} of {self.epochs_seen} "
                f"({self.criterion_label}).")

    def summary(self) -> str:
        """Plain text: the verdict first, then the suggestion, each criterion, the cautions."""
        lines = ["Verdict:"]
        lines += [f"  [{v.status.upper():4}] {v.topic}: {v.text}" for v in self.verdict]
        lines.append(self.headline())
        for criterion in self.criteria:
            where = "-" if criterion.epoch is None else f"epoch {criterion.epoch}"
            lines.append(f"  {criterion.label or criterion.name}: {where}. {criterion.reason}")
        lines.append("Cautions: a bound holds only under its stated assumptions; no bound replaces "
                     "held-out evaluation; high-stakes deployments follow their own validation "
                     "and regulatory practice.")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    def __repr__(self) -> str:
        counts = {s: sum(v.status == s for v in self.verdict) for s in ("ok", "warn", "fail")}
        marks = ", ".join(f"{c} {s}" for s, c in counts.items() if c)
        return (f"StopAdvice(suggested_epoch={self.suggested_epoch}, "
                f"criterion={self.criterion!r}, epochs_seen={self.epochs_seen}, "
                f"guarantee_epoch={self.guarantee_epoch}, verdict=[{marks or 'empty'}])")

    def to_markdown(self) -> str:
        """The verdict and the suggestion as Markdown (TensorBoard's text panel renders it)."""
        out = ["**" + _md(self.headline()) + "**", ""]
        out += [f"- **{_md(v.topic)}** ({v.status}): {_md(v.text)}" for v in self.verdict]
        out += ["", "| criterion | epoch | reason |", "|---|---|---|"]
        for c in self.criteria:
            out.append(f"| {_md(c.label or c.name)} | {'-' if c.epoch is None else c.epoch} | "
                       f"{_md(c.reason)} |")
        out += ["", "_" + _md(" ".join(self.cautions)) + "_"]
        return "\n".join(out)

    def _repr_html_(self) -> str:
        rows = "".join(
            f"<tr><td>{html.escape(v.status)}</td><td><b>{html.escape(v.topic)}</b></td>"
            f"<td>{html.escape(v.text)}</td></tr>" for v in self.verdict)
        return (f"<p><b>{html.escape(self.headline())}</b></p>"
                f"<table>{rows}</table><p>{html.escape(self.reason)}</p>")


def _md(text: str) -> str:
    return text.replace("|", "\\|").replace("*", "\\*").replace("_", "\\_")


def _build(cls: type, data: Mapping[str, Any]) -> Any:
    names = {f.name for f in fields(cls)}
    return cls(**{k: v for k, v in data.items() if k in names})


# ---------------------------------------------------------------------------------------------
# The advice
# ---------------------------------------------------------------------------------------------


def advise(readings: Sequence[EpochReading | Mapping[str, Any]], target: float | None = None,
           *, follow: str = "measured", target_fraction: float = DEFAULT_TARGET_FRACTION,
           trivial_loss: float | None = None, budget_on: str = "auto",
           plan: TrainingPlan | None = None, consecutive: int = 2,
           relative_noise: float = 0.05, noise_sigmas: float = 2.0) -> StopAdvice:
    """The verdict and stop suggestion for ``readings`` (see the module docstring).

    ``target``: the bound's target (default ``target_fraction`` x the trivial loss).
    ``trivial_loss`` overrides the readings' (the model's loss before training, or M).
    ``budget_on``: "auto" (the certified gap bound when it applies, else the stability bound),
    "certified", "expected" or "high_probability" (the readings' own, at confidence 1 - delta).
    ``plan`` lets the planner project the stability bound's budget; ``consecutive``,
    ``relative_noise`` and ``noise_sigmas`` tune the divergence-acceleration rule.
    """
    if follow not in _FOLLOW:
        raise ValueError(f"follow must be one of {_FOLLOW}, got {follow!r}")
    if budget_on not in ("auto", "certified", "expected", "high_probability"):
        raise ValueError("budget_on must be 'auto', 'certified', 'expected' or "
                         f"'high_probability', got {budget_on!r}")
    if target is not None:
        target = finite_or_none(target)
        if target is None or target <= 0:
            raise ValueError("target must be a finite number > 0")
    if not 0 < float(target_fraction) or not math.isfinite(float(target_fraction)):
        raise ValueError(f"target_fraction must be a finite number > 0, got {target_fraction}")
    ordered = ordered_readings(readings)
    if not ordered:
        return StopAdvice(None, None, "no epoch has been recorded yet", (), (), None, False,
                          "no readings", False, 0)

    trivial = _trivial(ordered, trivial_loss)
    target_source = "your target"
    if target is None and trivial is not None:
        target = target_fraction * trivial
        bound = finite_or_none((ordered[-1].constants or {}).get("loss_bound"))
        what = "the loss bound M" if bound is not None and bound == trivial and \
            trivial_loss is None else ("your trivial loss" if trivial_loss is not None
                                       else "the model's mean loss before training")
        target_source = f"{target_fraction:g} x the trivial loss {trivial:.4g}, {what}"
    table = divergence_matrix(ordered)
    rows = _rows(ordered, table, trivial)
    bound_applies = rows[-1].bound_applies and not any(r.assumption_violated for r in ordered)
    bound_reason = "" if bound_applies else next(
        (r.bound_reason for r in reversed(rows) if not r.bound_applies), "")
    constants = ordered[-1].constants or {}
    certified = bound_applies and constants.get("source") == "declared"

    series, bound_name = _guarantee_series(rows, budget_on, bound_applies, certified)
    rows = [_with_target(r, dict(series).get(r.epoch), target) for r in rows]
    budget, guarantee = None, _no_guarantee(bound_reason, trivial, bound_applies)
    if series and target is not None:
        budget, guarantee = _guarantee(rows, series, ordered[-1], target, bound_name, plan)
    certified_pick = _certified_criterion(rows)
    measured = _measured_pick(rows, ordered, table, consecutive, relative_noise, noise_sigmas)
    criteria = tuple(c for c in (*measured, guarantee, certified_pick) if c is not None)
    criteria = tuple(Criterion(c.name, c.epoch, c.value, c.reason, LABELS.get(c.name, c.name))
                     for c in criteria)
    chosen = next((c for c in criteria if c.name in ("holdout_loss", "estimated_risk",
                                                     "divergence_acceleration")
                   and c.epoch is not None), None)
    guarantee = next(c for c in criteria if c.name == "guarantee")
    if follow == "guarantee" and guarantee.epoch is not None:
        chosen = guarantee
    reason = _follow_sentence(chosen, guarantee, bound_name, target)
    last = ordered[-1]
    needed = _shadows_needed(last)
    verdict = verdict_lines(ordered, rows, chosen=chosen, guarantee=guarantee,
                            bound_name=bound_name, target=target, target_source=target_source,
                            certified=certified, bound_reason=bound_reason, follow=reason,
                            shadows_needed=needed)
    return StopAdvice(
        None if chosen is None else chosen.epoch, None if chosen is None else chosen.name,
        reason, tuple(rows), criteria, budget, bound_applies, bound_reason, certified, len(rows),
        verdict=tuple(verdict), target=target, target_source=target_source,
        trivial_loss=trivial, guarantee_epoch=guarantee.epoch, guarantee_bound=bound_name,
        shadows_needed=needed)


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
    pairs = [(r.epoch, r.measured_risk) for r in rows if r.measured_risk is not None]
    if pairs:
        epoch, value = min(pairs, key=lambda pair: (pair[1], pair[0]))
        out.append(Criterion("estimated_risk", epoch, value,
                             f"Training loss + the replace-one estimate of the expected gap is "
                             f"smallest at epoch {epoch} ({value:.4g}), an estimate, not a bound"
                             + _edge_note(epoch, rows[-1].epoch, len(pairs)) + "."))
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


def _follow_sentence(chosen: Criterion | None, guarantee: Criterion, bound_name: str,
                     target: float | None) -> str:
    """One sentence saying which stop to follow and why."""
    if chosen is None:
        return ("No criterion could choose an epoch: there is no held-out set, no gap estimate "
                "and no divergence acceleration; add a held-out set (replacements=...).")
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
