"""Stop advice from a run's readings: a verdict first, a measured stop, the guarantee beside it.

``advise`` is a pure function of the readings (``EpochReading`` objects or history.jsonl dicts).

**The suggested stop follows the measured evidence** (``follow="measured"``, the default):
``holdout_loss``, the epoch with the lowest loss on the held-out examples no shadow swapped in;
without a held-out set, ``estimated_risk``, training loss + the replace-one estimate of the
*expected* gap (the earliest epoch within one standard error of its minimum; none when every
epoch is within it); without either, ``divergence_acceleration`` (a heuristic: the divergence
starts to grow faster than linearly; see ``sgdstab.outputs.trends``).

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

from .criteria import (
    LABELS,
    LOCKSTEP_BROKEN,
    AdviceRow,
    Criterion,
    _certified_criterion,
    _follow_sentence,
    _guarantee,
    _guarantee_series,
    _measured_pick,
    _no_guarantee,
    _rows,
    _shadows_needed,
    _trivial,
    _unchosen,
    _with_target,
)
from .reading import EpochReading, json_safe
from .trends import (
    BudgetProjection,
    TrainingPlan,
    acceleration_epoch,
    as_readings,
    divergence_matrix,
    finite_or_none,
    ordered_readings,
)
from .verdict import VerdictLine, lockstep_line, verdict_lines

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

#: The default target is this fraction of the trivial loss.
DEFAULT_TARGET_FRACTION = 0.1
_FOLLOW = ("measured", "guarantee")


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
    broken = lockstep_line(ordered).status == "fail"
    if broken:   # only the held-out loss is the main run's own
        measured = [c if c.name == "holdout_loss" else
                    Criterion(c.name, None, None, LOCKSTEP_BROKEN) for c in measured]
    criteria = tuple(c for c in (*measured, guarantee, certified_pick) if c is not None)
    criteria = tuple(Criterion(c.name, c.epoch, c.value, c.reason, LABELS.get(c.name, c.name))
                     for c in criteria)
    chosen = next((c for c in criteria if c.name in ("holdout_loss", "estimated_risk",
                                                     "divergence_acceleration")
                   and c.epoch is not None), None)
    guarantee = next(c for c in criteria if c.name == "guarantee")
    if follow == "guarantee" and guarantee.epoch is not None:
        chosen = guarantee
    why_none = _unchosen(criteria, broken)
    reason = _follow_sentence(chosen, guarantee, bound_name, target, why_none)
    last = ordered[-1]
    needed = _shadows_needed(last)
    verdict = verdict_lines(ordered, rows, chosen=chosen, guarantee=guarantee,
                            bound_name=bound_name, target=target, target_source=target_source,
                            certified=certified, bound_reason=bound_reason, follow=reason,
                            shadows_needed=needed, why_none=why_none)
    return StopAdvice(
        None if chosen is None else chosen.epoch, None if chosen is None else chosen.name,
        reason, tuple(rows), criteria, budget, bound_applies, bound_reason, certified, len(rows),
        verdict=tuple(verdict), target=target, target_source=target_source,
        trivial_loss=trivial, guarantee_epoch=guarantee.epoch, guarantee_bound=bound_name,
        shadows_needed=needed)
