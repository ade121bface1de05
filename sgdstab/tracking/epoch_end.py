"""The epoch's end: measure the shadows, compute the bounds, write the sinks.

Each function here is a ``StabilityTracker`` method (assigned in its class body, so the
``stacklevel`` of measure's warnings still counts from the method the user called).
"""

from __future__ import annotations

import time
import warnings
from typing import TYPE_CHECKING

import numpy as np

from ..outputs.reading import EpochReading
from ..shadows.lockstep import StepGroup
from ..theory.constants import Constants
from . import measure
from .notices import AssumptionWarning, LockstepWarning
from .probe import ProbeRows, model_losses

if TYPE_CHECKING:  # pragma: no cover
    from .tracker import StabilityTracker

__all__ = ["finish_epoch", "probe_summary", "held_out_rows", "held_out_summary", "see_losses",
           "measure_start", "divergences", "current_constants"]


def finish_epoch(tracker: StabilityTracker) -> EpochReading:
    """Close the epoch: measure the shadows, compute the bounds, write the sinks."""
    if tracker._passes == 0 and tracker.steps == tracker._steps_at_finish and tracker.readings and \
            not tracker._group.batches:
        warnings.warn(f"finish_epoch() called again with no pass over tracker.batches() and "
                      f"no step since the last call: epoch {tracker.epoch} is not counted "
                      "twice; its reading is returned again", UserWarning, stacklevel=2)
        return tracker.readings[-1]
    start = time.perf_counter()
    notes: list[str] = [] if tracker._part_note is None else [tracker._part_note]
    if tracker._passes > 1:
        notes.append(f"this epoch spans {tracker._passes} passes over tracker.batches() "
                     "(finish_epoch() was not called between them)")
    if tracker._group.batches:
        notes.append(f"{len(tracker._group.batches)} batch(es) yielded after the last "
                     "optimizer.step() were never stepped (a break in the loop?): dropped, "
                     "the shadows do not replay them")
        tracker._group = StepGroup([], [], [])
    if tracker._lockstep_lost is not None:
        notes.append(measure.lost_lockstep_note(*tracker._lockstep_lost, tracker._skipped_steps))
        tracker._skipped_steps = 0
    tracker._passes = 0
    tracker._steps_at_finish = tracker.steps
    tracker.epoch += 1
    notes += getattr(tracker.engine, "pending_notes", [])   # e.g. what engine="auto" chose
    getattr(tracker.engine, "pending_notes", []).clear()
    tracker._report_faults(tracker.engine.freeze_non_finite(tracker.shadows, tracker.steps))
    divergence, layer, audit = tracker._divergences()
    divergence = measure.masked_faults(divergence, tracker.shadows)
    # the audit's verdict is read from the divergences alone: settled (and its runs freed)
    # before the probe's evaluation, which would otherwise hold both at once
    audit = measure.settle_audit(tracker.engine, tracker.audit_shadow, audit, notes,
                                 LockstepWarning)
    if tracker.audit_shadow is not None and tracker.audit_shadow not in tracker.engine.shadows:
        tracker.audit_shadow = None   # its verdict is in and the engine dropped it
    if tracker._probe is None:
        tracker._probe = measure.build_probe(
            tracker.shadows, tracker.train_set, n=tracker.n, probe_set=tracker.probe_set,
            replacements=tracker.replacements, size=tracker.probe_size, seed=tracker.seed,
            collate=tracker._collate, drawable=tracker.drawable)
    summary, train_losses, largest = tracker._probe_summary()
    notes += [*summary.notes, *tracker._per_example.notes()]
    held_out = tracker._held_out_summary(train_losses)
    tracker._see_losses(largest)
    constants = tracker.current_constants()
    if constants is not None and tracker.engine.after_step is not None:
        notes.append("after_step: the bounds hold only if it projects the parameters onto a "
                     "convex set, such as clamping to a box or rescaling into a ball (a "
                     "projection is non-expansive); the tool cannot check this")
    bound_fields, violated = measure.epoch_bounds(
        constants, divergence, notes, history=tracker.history, n=tracker.n,
        delta=tracker.delta, groups=tracker.groups, optimizer_reason=tracker._bounds_reason(),
        model=tracker.model, warned=tracker._assumption_violated, category=AssumptionWarning,
        loss_seen=tracker.loss_seen)
    tracker._assumption_violated = tracker._assumption_violated or violated
    reading = measure.epoch_reading(tracker.epoch, tracker.steps, tracker.shadows, divergence,
                                    audit, layer, summary, bound_fields, notes, held_out,
                                    tracker.trivial_loss(), tracker.loss_seen)
    tracker.readings.append(reading)
    if tracker.sinks is not None:
        tracker.sinks.write(reading)
    tracker.time_spent.epoch_end += time.perf_counter() - start
    return reading


def probe_summary(tracker: StabilityTracker
                  ) -> tuple[measure.ProbeSummary, np.ndarray, float | None]:
    """The probe's summary, the main run's training-row losses and the largest loss (a
    spread tracker gathers the shadows' losses from every rank)."""
    assert tracker._probe is not None   # finish_epoch builds it first
    return measure.probe_summary(tracker.model, tracker.engine, tracker.shadows, tracker._probe,
                                 tracker._per_example, has_probe_set=tracker.probe_set is not None)


def held_out_rows(tracker: StabilityTracker) -> ProbeRows | None:
    if tracker._holdout is None:
        tracker._holdout = measure.build_holdout(tracker.shadows, tracker.replacements,
                                                 tracker._collate)
    return tracker._holdout


def held_out_summary(tracker: StabilityTracker,
                     train_losses: np.ndarray) -> measure.HeldOutSummary:
    """The main model on every held-out example no shadow swapped in, and this run's gap."""
    rows = tracker._held_out_rows()
    losses = None if rows is None else model_losses(tracker.model, rows, tracker._per_example)
    tracker._see_losses(measure.largest_loss(losses))
    return measure.held_out_summary(losses, train_losses)


def see_losses(tracker: StabilityTracker, largest: float | None) -> None:
    if largest is not None and (tracker.loss_seen is None or largest > tracker.loss_seen):
        tracker.loss_seen = largest


def measure_start(tracker: StabilityTracker) -> None:
    """The model's mean loss before its first step (on the held-out examples, else the
    training probe): the reference a bound must beat not to be vacuous."""
    rows = tracker._held_out_rows()
    if rows is None:
        if tracker._probe is None:
            tracker._probe = measure.build_probe(
                tracker.shadows, tracker.train_set, n=tracker.n, probe_set=tracker.probe_set,
                replacements=tracker.replacements, size=tracker.probe_size, seed=tracker.seed,
                collate=tracker._collate, drawable=tracker.drawable)
        rows = tracker._probe
        keep = np.isin(rows.kinds, ["out", "train"])
    else:
        keep = None
    losses = model_losses(tracker.model, rows, tracker._per_example)
    if keep is not None:
        losses = losses[keep]
    tracker._see_losses(measure.largest_loss(losses))
    finite = losses[np.isfinite(losses)]
    tracker.initial_loss = float(finite.mean()) if finite.size else None


def divergences(tracker: StabilityTracker) -> tuple[list[float], dict[str, float], float | None]:
    """The shadows' and the audit's divergences (a data-parallel tracker compares ranks')."""
    return measure.divergences(tracker.engine, tracker.model, tracker.shadows, tracker.audit_shadow)


def current_constants(tracker: StabilityTracker) -> Constants | None:
    """The constants the bounds use now (declared, or running-maximum estimates).

    Estimates are refreshed at the end of every ``estimate_every``-th epoch (and the first),
    on a seeded sample of training examples, with ``estimate_options`` passed to
    ``Constants.estimate`` (e.g. ``iterations``, ``per_example``). Not estimated (None) when
    no bound applies to the optimizer, unless ``estimate_options`` has
    ``even_if_not_applicable=True``.
    """
    if not tracker.estimate_constants:
        return tracker.declared_constants
    if measure.estimation_skipped(tracker.optimizer_reason, tracker.estimate_options):
        return None   # no bound applies to this optimizer: the reading says so
    if tracker._estimated is None or (tracker.epoch - 1) % tracker.estimate_every == 0:
        chosen = measure.constants_rows(tracker.n, tracker.probe_size, tracker.seed)
        if tracker.drawable is not None:
            chosen = tracker.drawable[chosen]
        batch = tracker._collate([tracker._fetch(tracker.train_set, j) for j in chosen])
        tracker._estimated = measure.estimate_constants(
            tracker.model, batch, tracker._estimated, loss_fn=tracker.loss_fn,
            step_loss=None if tracker.loss_fn is not None else tracker.step_loss,
            loss_bound=tracker.loss_bound,
            options=tracker.estimate_options)
    return tracker._estimated



