"""The verdict: a few lines a practitioner reads first, each with a status.

Built from the readings and the advice table by ``verdict_lines`` (pure): the lockstep audit, the
pathwise-bound audit, the guarantee, the measured stop, the two gaps and which stop to follow.
Every statement is a value from the readings, so tests can check it against them.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

from .reading import LOST_LOCKSTEP, EpochReading
from .trends import finite_or_none

if TYPE_CHECKING:
    from .criteria import AdviceRow, Criterion

__all__ = ["VerdictLine", "verdict_lines", "lockstep_line", "STATUSES"]

STATUSES = ("ok", "warn", "fail", "info")


@dataclass(frozen=True)
class VerdictLine:
    """One statement of the verdict: ``topic``, ``status`` (ok, warn, fail, info) and ``text``."""

    topic: str
    status: str
    text: str


def verdict_lines(ordered: Sequence[EpochReading], rows: Sequence[AdviceRow], *,
                  chosen: Criterion | None, guarantee: Criterion, bound_name: str,
                  target: float | None, target_source: str, certified: bool, bound_reason: str,
                  follow: str, shadows_needed: int | None, why_none: str
                  ) -> list[VerdictLine]:
    """The verdict for a run (see the module docstring)."""
    return [
        lockstep_line(ordered),
        _pathwise(ordered, rows),
        _guarantee(rows, guarantee, bound_name, target, target_source, certified, bound_reason),
        _measured(chosen, why_none),
        _gaps(ordered[-1], shadows_needed),
        VerdictLine("Which stop to follow", "info", follow),
    ]


def lockstep_line(ordered: Sequence[EpochReading]) -> VerdictLine:
    """Whether the shadows followed the main run: the null-swap audit, or a step they skipped."""
    topic = "Lockstep audit"
    lost = next((r for r in ordered if any(n.startswith(LOST_LOCKSTEP) for n in r.notes)), None)
    if lost is not None:   # whatever the audit read: it may have ended before the skipped step
        return VerdictLine(topic, "fail", f"BROKEN at epoch {lost.epoch}: optimizer.step() ran "
                           "without a batch from tracker.batches(), so the shadows skipped a step "
                           "of the main run and no longer follow it; the divergences from then "
                           "on are not trustworthy.")
    for reading in ordered:
        value = finite_or_none(reading.audit_divergence)
        if reading.audit_divergence is not None and value == 0.0:
            return VerdictLine(topic, "ok", "exact: the null-swap shadow (an example swapped with "
                               f"itself) read 0.0 after epoch {reading.epoch}.")
        if reading.audit_divergence is not None:
            shown = "not finite" if value is None else f"{value:.3e}"
            return VerdictLine(topic, "fail", f"BROKEN: the null-swap shadow drifted {shown} at "
                               f"epoch {reading.epoch}, where it must read exactly 0; the "
                               "divergences are not trustworthy.")
        if any("null-swap audit inconclusive" in note for note in reading.notes):
            return VerdictLine(topic, "warn", "inconclusive: the null-swap example was never "
                               "drawn in the first epoch.")
    return VerdictLine(topic, "info", "not run (audit=False, or no reading of the first epoch).")


def _pathwise(ordered: Sequence[EpochReading], rows: Sequence[AdviceRow]) -> VerdictLine:
    topic = "Divergence vs pathwise bound"
    broken = next((r for r in ordered if r.assumption_violated), None)
    if broken is not None:
        detail = next((n for n in broken.notes if n.startswith("assumption audit failed")),
                      "a measured divergence exceeded its pathwise bound")
        return VerdictLine(topic, "fail", f"exceeded at epoch {broken.epoch} ({detail}): an "
                           "assumption fails for this run, so its bounds do not hold. Likely "
                           "causes, in order: a sum-reduced or rescaled loss, parameter groups "
                           "with different settings, declared constants too small for the "
                           "data, a non-convex model (see the AssumptionWarning).")
    ratios = [r.path_ratio for r in rows if r.path_ratio is not None]
    checks = sum(1 for reading in ordered for b in reading.path_bound
                 if finite_or_none(b) is not None)
    if not ratios:
        reason = next((str(r.bounds.get("path_reason")) for r in reversed(ordered)
                       if isinstance(r.bounds, dict) and r.bounds.get("path_reason")), "")
        return VerdictLine(topic, "info", "not checked: "
                           + (reason or "no pathwise bound was computed (no constants, or no "
                              "shadow has been hit yet)") + ".")
    regime = next((r.bounds.get("regime") for r in reversed(ordered)
                   if isinstance(r.bounds, dict) and r.bounds.get("regime")), None)
    if regime not in ("convex", "strongly_convex"):
        return VerdictLine(topic, "info", f"largest measured/bound ratio {max(ratios):.3g} over "
                           f"{checks} checks; in the {regime or 'declared'} regime this is not "
                           "a test of the assumptions.")
    return VerdictLine(topic, "ok", f"every measured divergence is within its pathwise bound: "
                       f"{checks} checks, largest measured/bound ratio {max(ratios):.3g}.")


def _guarantee(rows: Sequence[AdviceRow], guarantee: Criterion, bound_name: str,
               target: float | None, target_source: str, certified: bool,
               bound_reason: str) -> VerdictLine:
    topic = "Guarantee"
    if not bound_name:
        return VerdictLine(topic, "info", "none: no stability bound applies"
                           + (f" ({bound_reason})" if bound_reason else "") + ".")
    if target is None:
        return VerdictLine(topic, "info", f"{guarantee.reason}")
    status = "ok" if guarantee.epoch is not None and (certified or "certified" in bound_name) \
        else "warn"
    vacuous = [r.epoch for r in rows if r.expected_vacuous or r.certified_vacuous]
    text = f"{guarantee.reason} The target is {target_source}."
    if vacuous:
        text += (f" The bound is vacuous (no better than the trivial loss) from epoch "
                 f"{vacuous[0]} on.")
    if not certified:
        text += " Estimated constants: indicative, not certified."
    elif not bound_name.startswith("certified"):
        text += (" This bound is on the gap expected over training sets, not on this run's own "
                 "(that needs a convex loss, declared constants and a declared loss bound M).")
    return VerdictLine(topic, status, text)


def _measured(chosen: Criterion | None, why_none: str) -> VerdictLine:
    topic = "Measured stop"
    if chosen is None or chosen.name == "guarantee":
        return VerdictLine(topic, "warn" if chosen is None else "info",
                           f"none: there is {why_none}." if chosen is None else
                           "see the guarantee.")
    return VerdictLine(topic, "ok", f"epoch {chosen.epoch}: {chosen.reason}")


def _gaps(last: EpochReading, shadows_needed: int | None) -> VerdictLine:
    topic = "Two different gaps"
    parts = []
    gap, error = finite_or_none(last.gap_estimate), finite_or_none(last.gap_stderr)
    shadows = len(last.divergence)
    if gap is not None:
        spread = f" +/- {error:.2g} (standard error over {shadows} shadows)" \
            if error is not None else " (one shadow: no standard error)"
        need = ""
        if shadows_needed is not None and error is not None:
            need = ("; its +/- 2 standard errors already exclude 0" if shadows_needed <= shadows
                    else f"; about {shadows_needed} shadows would make +/- 2 standard errors "
                         "exclude 0 at this spread")
        parts.append(f"expected gap over training sets (replace-one estimate) {gap:.4g}{spread}"
                     + need)
    else:
        parts.append("expected gap: not estimated (it needs replacements from a held-out set)")
    run_gap = finite_or_none(last.run_gap)
    if run_gap is not None:
        low, high = finite_or_none(last.run_gap_low), finite_or_none(last.run_gap_high)
        interval = f", 95 % interval [{low:.4g}, {high:.4g}]" if low is not None \
            and high is not None else ""
        parts.append(f"this run's gap (held-out - training loss, {last.holdout_count} held-out "
                     f"examples) {run_gap:.4g}{interval}")
    else:
        parts.append("this run's gap: not measured (no held-out set)")
    return VerdictLine(topic, "info", f"at epoch {last.epoch}: " + "; ".join(parts)
                       + ". They estimate different quantities and need not agree.")

