"""Epoch-end measurement: divergences, probe losses, the null-swap verdict, constants and bounds.

The tracker owns the run's state and calls these at the end of every epoch with the pieces each
needs; nothing here steps a model, and only ``settle_audit`` changes an engine (it drops the
audit shadow once its verdict is in). The constants, the bounds and their audit live in
``tracking.bounding``; their names are re-exported here.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, cast

import numpy as np
import torch
from torch import nn

from ..outputs.reading import LOST_LOCKSTEP, EpochReading
from ..shadows.lockstep import Shadow, preserved_rng, squared_distance, trainable_parameters
from .bounding import (
    ESTIMATE_ANYWAY,
    audit_assumptions,
    breach_causes,
    constants_rows,
    epoch_bounds,
    estimate_constants,
    estimation_skipped,
)
from .probe import (
    PerExampleLoss,
    ProbeRows,
    ProbeSummary,
    mean_and_error,
    model_losses,
    summarise_probe,
)

if TYPE_CHECKING:
    from ..shadows.batched import BatchedEngine
    from ..shadows.lockstep import PerShadowEngine

__all__ = ["divergences", "divergence", "masked_faults", "default_probe_size", "build_probe",
           "fresh_replacements", "build_holdout", "held_out_summary", "largest_loss",
           "HeldOutSummary", "probe_summary", "settle_audit", "lost_lockstep_note",
           "constants_rows", "estimate_constants", "estimation_skipped", "ESTIMATE_ANYWAY",
           "epoch_bounds", "audit_assumptions", "breach_causes", "epoch_reading"]


# -- divergences --------------------------------------------------------------------------------
def divergences(engine: PerShadowEngine | BatchedEngine, model: nn.Module,
                shadows: Sequence[Shadow], audit_shadow: Shadow | None
                ) -> tuple[list[float], dict[str, float], float | None]:
    """Each shadow's parameter distance to the main run, the largest per layer, and the audit's.

    With the batched engine the shadows are measured against its no-swap reference run, which
    shares their rounding; the audit is measured against the main run unless the reference
    follows it exactly.
    """
    main = trainable_parameters(model)
    audited_against = main
    reference = getattr(engine, "reference_parameters", lambda: None)()
    if reference is not None:
        main = [(name, reference[name]) for name, _ in main]
        if cast(Any, engine).reference_follows_main():   # else: the gap to the main run
            audited_against = main
    layer: dict[str, float] = {name: 0.0 for name, _ in main}
    values = [divergence(engine, shadow, main, layer) for shadow in shadows]
    audit = None
    if audit_shadow is not None:
        audit = divergence(engine, audit_shadow, audited_against, None)
    return values, layer, audit


def divergence(engine: PerShadowEngine | BatchedEngine, shadow: Shadow,
               main: list[tuple[str, nn.Parameter]], layer: dict[str, float] | None) -> float:
    """``||w_shadow - w_main||_2`` over the trainable parameters (0 for an unforked shadow);
    raises ``layer[name]`` to each layer's own distance when given."""
    if not shadow.forked:
        return 0.0
    total = 0.0
    theirs = engine.parameters_of(shadow)
    with torch.no_grad():
        for name, p in main:
            square = squared_distance(p, theirs[name])
            total += square
            if layer is not None:
                layer[name] = max(layer[name], math.sqrt(square))
    return math.sqrt(total)


def masked_faults(values: Sequence[float], shadows: Sequence[Shadow]) -> list[float]:
    """``values`` with NaN in place of every frozen (faulted) shadow's entry."""
    return [math.nan if s.fault is not None else d for s, d in zip(shadows, values)]


# -- the probe ----------------------------------------------------------------------------------
def default_probe_size(n: int) -> int:
    """The sampled probe's size when none is given: n/16 within [128, 256] (at most n).

    Each model evaluates the probe at every epoch's end; n/16 rows in eval mode cost about 2 % of
    an epoch's training compute (a forward pass being about a third of a training step: common
    practice). Below n = 2048 the floor of 128 rows costs more than that, in exchange for a mean
    training loss (used by the stop advice) that is not too noisy; 256 rows are plenty."""
    return min(n, 256, max(128, n // 16))


def build_probe(shadows: Sequence[Shadow], train_set: Any, *, n: int, probe_set: Any,
                replacements: Any, size: int, seed: int,
                collate: Callable[[list[Any]], Any],
                drawable: np.ndarray | None = None) -> ProbeRows:
    """The rows every model is evaluated on: each shadow's swapped-out and swapped-in example,
    then the probe set if given, a seeded sample of ``size`` training examples (of the
    ``drawable`` ones when the sampler draws only those; n is their number) and, with
    ``replacements``, a seeded sample of those."""
    with preserved_rng():   # once for all rows (a dataset may draw random transforms)
        return _gather_probe(shadows, train_set, n, probe_set, replacements, size, seed, collate,
                             drawable)


def _gather_probe(shadows: Sequence[Shadow], train_set: Any, n: int, probe_set: Any,
                  replacements: Any, size: int, seed: int,
                  collate: Callable[[list[Any]], Any],
                  drawable: np.ndarray | None = None) -> ProbeRows:
    examples, kinds, owners = [], [], []
    for k, shadow in enumerate(shadows):
        examples += [train_set[shadow.spec.index], shadow.spec.replacement]
        kinds += ["out", "in"]
        owners += [k, k]
    if probe_set is not None:
        for j in range(len(probe_set)):
            examples.append(probe_set[j])
            kinds.append("probe")
            owners.append(-1)
    sample_rng = np.random.default_rng(seed + 1)
    for j in np.sort(sample_rng.choice(n, size=min(size, n), replace=False)):
        examples.append(train_set[int(j if drawable is None else drawable[j])])
        kinds.append("train")
        owners.append(-1)
    if replacements is not None:
        available = len(replacements)
        for j in np.sort(sample_rng.choice(available, size=min(size, available),
                                           replace=False)):
            examples.append(replacements[int(j)])
            kinds.append("holdout")
            owners.append(-1)
    return ProbeRows.build(examples, kinds, owners, collate)


def fresh_replacements(shadows: Sequence[Shadow]) -> tuple[bool, str]:
    """Whether the swapped-in examples are fresh draws (all from a held-out set), and if not why."""
    origins = {s.spec.origin for s in shadows}
    if not shadows:
        return False, "no shadows"
    if origins == {"holdout"}:
        return True, ""
    if "train" in origins:
        return False, ("the swapped-in examples are other training examples (duplicates), "
                       "not fresh draws; pass replacements=<held-out set>")
    return False, ("explicit swap replacements: their independence from the training set is "
                   "unknown")


@dataclass(frozen=True)
class HeldOutSummary:
    """The main model on every held-out example not used as a replacement, and this run's gap.

    ``run_gap`` = held-out mean loss - the probe's mean training loss: this run's own
    generalization gap, an estimate of ``R(A(S)) - R_S(A(S))`` for this ``S``, with a 95 %
    normal-approximation interval from both means' standard errors (common practice). It is a
    different quantity from the replace-one estimate of the *expected* gap over training sets.
    """

    count: int
    loss: float | None
    stderr: float | None
    run_gap: float | None
    run_gap_low: float | None
    run_gap_high: float | None


def build_holdout(shadows: Sequence[Shadow], replacements: Any,
                  collate: Callable[[list[Any]], Any]) -> ProbeRows | None:
    """Every replacement-set example that no shadow swapped in (None without a held-out set)."""
    if replacements is None or not fresh_replacements(shadows)[0]:
        return None
    used = {s.spec.source_index for s in shadows}
    rows = [j for j in range(len(replacements)) if j not in used]
    if not rows:
        return None
    with preserved_rng():
        examples = [replacements[j] for j in rows]
    return ProbeRows.build(examples, ["holdout"] * len(rows), [-1] * len(rows), collate)


def held_out_summary(losses: np.ndarray | None, train_losses: np.ndarray) -> HeldOutSummary:
    """Summarise the main model's held-out losses against its training-probe losses."""
    if losses is None:
        return HeldOutSummary(0, None, None, None, None, None)
    loss, error = mean_and_error(losses)
    train, train_error = mean_and_error(train_losses)
    if loss is None or train is None:
        return HeldOutSummary(int(losses.size), loss, error, None, None, None)
    gap = loss - train
    if error is None or train_error is None:
        return HeldOutSummary(int(losses.size), loss, error, gap, None, None)
    half = 1.959963984540054 * math.hypot(error, train_error)   # normal 97.5 % quantile
    return HeldOutSummary(int(losses.size), loss, error, gap, gap - half, gap + half)


def largest_loss(*arrays: np.ndarray | None) -> float | None:
    """The largest finite per-example loss among ``arrays`` (None when there is none)."""
    values = [float(np.max(a[np.isfinite(a)])) for a in arrays
              if a is not None and np.isfinite(a).any()]
    return max(values) if values else None


def probe_summary(model: nn.Module, engine: PerShadowEngine | BatchedEngine,
                  shadows: Sequence[Shadow], probe: ProbeRows, per_example: PerExampleLoss, *,
                  has_probe_set: bool) -> tuple[ProbeSummary, np.ndarray, float | None]:
    """Per-example losses of the main run, the reference run (batched engine) and every shadow
    on ``probe``, summarised: loss differences, the gap estimate, train and held-out loss.

    A frozen shadow contributes NaN losses; an unforked one has the main (or reference) run's.
    Also returns the main model's training-row losses and the largest finite per-example loss.
    """
    main_losses = model_losses(model, probe, per_example)
    # the stacked engine's runs all at once, when they are evaluated as the main run was
    stacked = getattr(engine, "probe_losses", lambda *_: None)(
        probe.chunks, per_example.loss_fn) if per_example.vectorised else None
    stacked = stacked or {}
    reference_losses = stacked.get(id(getattr(engine, "reference", None)))
    if reference_losses is None:
        reference_module = getattr(engine, "reference_module", lambda: None)()
        reference_losses = None if reference_module is None else \
            model_losses(reference_module, probe, per_example)
    base_losses = main_losses if reference_losses is None else reference_losses
    shadow_losses = []
    for shadow in shadows:
        found = stacked.get(id(shadow))
        if shadow.fault is not None:
            shadow_losses.append(np.full_like(main_losses, np.nan))
        elif shadow.forked:
            shadow_losses.append(found if found is not None else
                                 model_losses(engine.module_of(shadow), probe, per_example))
        else:
            shadow_losses.append(base_losses)
    fresh, reason = fresh_replacements(shadows)
    kinds = ("out", "in", "probe") if has_probe_set else ("out", "in", "train", "holdout")
    summary = summarise_probe(main_losses, shadow_losses, probe, fresh, reason, kinds,
                              reference=reference_losses)
    train_rows = main_losses[np.isin(probe.kinds, ["out", "train"])]
    return summary, train_rows, largest_loss(main_losses, reference_losses, *shadow_losses)


# -- the null-swap audit ------------------------------------------------------------------------
def lost_lockstep_note(epoch: int, replayed: int, skipped: int) -> str:
    """The note on every reading after an optimizer step the shadows could not replay (it ran
    without a batch from tracker.batches()): from then on they do not follow the main run."""
    this_epoch = (f"optimizer.step() ran {skipped} time(s) this epoch without a batch from "
                  "tracker.batches(), and the shadows skipped those steps; ") if skipped else ""
    return (f"{LOST_LOCKSTEP}: {this_epoch}the first such step was in epoch {epoch}, after "
            f"{replayed} replayed step(s). From then on the shadows do not follow the main run, "
            "so the divergences and loss differences are not trustworthy")


def settle_audit(engine: PerShadowEngine | BatchedEngine, shadow: Shadow | None,
                 audit: float | None, notes: list[str], category: type[Warning]
                 ) -> float | None:
    """The null-swap shadow's verdict: a note if its example was never drawn, a ``category``
    warning if it drifted at all. The shadow is then removed from ``engine``; the result is
    ``audit``, or None when the audit never ran (its example was never drawn: removed, with the
    note) or there is no audit shadow or value (nothing removed).

    Warns with ``stacklevel=3``: call it straight from the method the user called.
    """
    if shadow is None or audit is None:
        return None
    if not shadow.forked:
        notes.append("null-swap audit inconclusive: its example was never drawn")
        audit = None
    elif shadow.fault is not None:   # reported when it happened (the main run too, if NaN)
        notes.append(f"null-swap audit inconclusive: it was frozen ({shadow.fault})")
        audit = None
    elif audit != 0.0:
        warnings.warn(
            f"LOCKSTEP BROKEN: the null-swap shadow (example {shadow.spec.index} swapped with "
            f"itself) drifted {audit:.3e} from the main run, where it must stay at exactly 0. "
            "The divergences are not trustworthy. Likely causes: a non-deterministic op, RNG "
            "consumed outside the replayed region (between batches, or in code the shadows do "
            "not run: use step_loss for in-loop augmentation), a batch mutated in place, a "
            "loss or clipping the shadows do not repeat (see before_step), parameters changed "
            "after optimizer.step() (a projection: see after_step).",
            category, stacklevel=3)
        notes.append(f"lockstep broken: null-swap divergence {audit:.3e}")
    engine.remove_shadow(shadow)
    return audit


# -- the reading --------------------------------------------------------------------------------
def epoch_reading(epoch: int, steps: int, shadows: Sequence[Shadow], divergence: Sequence[float],
                  audit: float | None, layer: dict[str, float], summary: ProbeSummary,
                  bound_fields: dict[str, Any], notes: list[str],
                  held_out: HeldOutSummary | None = None, trivial_loss: float | None = None,
                  loss_seen: float | None = None) -> EpochReading:
    """Assemble the epoch's reading; a note is added for every frozen shadow.

    With ``held_out`` (the full held-out evaluation) its mean replaces the probe's held-out loss.
    """
    faults = tuple(s.fault for s in shadows)
    for k, fault in enumerate(faults):
        if fault is not None:
            notes.append(f"shadow_{k} frozen: {fault}")
    held = held_out if held_out is not None and held_out.count else None
    # without the full evaluation, the probe's held-out rows (none without a held-out set)
    count, error = (held.count, held.stderr) if held is not None else \
        (summary.holdout_rows, summary.holdout_stderr)
    if held is None and held_out is not None and summary.holdout_loss is not None:
        notes.append(f"held-out loss on the probe's {summary.holdout_rows} held-out row(s): every "
                     "held-out example is a shadow's replacement (never trained on by the main "
                     "run); a larger held-out set gives a steadier stop")
    return EpochReading(
        epoch=epoch, steps=steps, divergence=tuple(divergence),
        audit_divergence=audit, layer_divergence=layer,
        loss_difference_max=summary.loss_difference_max,
        loss_difference_mean=summary.loss_difference_mean,
        gap_estimate=summary.gap_estimate, gap_stderr=summary.gap_stderr,
        train_loss=summary.train_loss,
        holdout_loss=summary.holdout_loss if held is None else held.loss,
        holdout_count=count, holdout_stderr=error,
        run_gap=None if held is None else held.run_gap,
        run_gap_low=None if held is None else held.run_gap_low,
        run_gap_high=None if held is None else held.run_gap_high,
        trivial_loss=trivial_loss, loss_seen=loss_seen,
        shadow_faults=faults, notes=tuple(notes), **bound_fields)
