"""The training loop's side: recorded batches and the optimizer step hooks that step the shadows.

Each function here is a ``StabilityTracker`` method (assigned in its class body, so a warning's
``stacklevel`` counts the same frames as before and subclasses still override them).
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
from torch.utils.data import DataLoader

from ..shadows.errors import LockstepError
from ..shadows.loaders import check_batch_device, check_drawn, recording_loader
from ..shadows.lockstep import NeighbourSpec, StepGroup, select_rows, trainable_parameters
from .notices import LockstepWarning
from .optimizer_rule import optimizer_reason

if TYPE_CHECKING:  # pragma: no cover
    from .tracker import StabilityTracker

__all__ = ["tracked_batches", "sibling_loader", "on_batch", "before_main_step", "after_main_step",
           "step_shadows", "run_engine", "hit_counts"]


def tracked_batches(tracker: StabilityTracker, loader: DataLoader) -> Iterator[Any]:
    """The loader's batches, each one's training indices and RNG state recorded."""
    clock, spent = time.perf_counter, tracker.time_spent
    start = clock()
    tracker._fix_sampling(loader)
    sibling, recorder = tracker._sibling(loader)
    tracker._set_rows(loader.collate_fn)
    if tracker._passes:
        tracker._warn_once("passes", "a new pass over tracker.batches() started without "
                           "finish_epoch() after the last one: epochs are counted by "
                           "finish_epoch() calls, so the next reading covers both passes",
                           UserWarning)
    tracker._passes += 1
    spent.recording += clock() - start
    for batch in sibling:
        start = clock()
        indices = recorder.drawn.popleft()
        tracker._on_batch(batch, indices)
        spent.recording += clock() - start
        yield batch


def sibling_loader(tracker: StabilityTracker, loader: DataLoader) -> tuple[DataLoader, Any]:
    """The recording sibling of ``loader``: a new one per pass, except for a loader with
    persistent workers, whose sibling is kept while ``loader`` lives (its workers and seed
    persist like the user's loader's would, and go when it goes)."""
    if isinstance(loader, DataLoader) and loader.num_workers > 0 and \
            loader.persistent_workers:
        kept = tracker._siblings.get(loader)
        if kept is None:
            kept = tracker._siblings[loader] = recording_loader(loader, tracker.train_set)
        kept[1].drawn.clear()
        return kept
    return recording_loader(loader, tracker.train_set)


def on_batch(tracker: StabilityTracker, batch: Any, indices: np.ndarray) -> None:
    """Record one yielded batch for the next step (and check the first one)."""
    # in Python: right after the models' kernels a NumPy reduction over these few indices
    # took ~45 us, the list's max and min ~5 us
    drawn = indices.tolist()
    if drawn and (max(drawn) >= tracker.dataset_size or min(drawn) < 0):
        check_drawn(indices, tracker.dataset_size)
    if not tracker._checked_batch:
        check_batch_device(batch, next(p for _, p in trainable_parameters(tracker.model)).device)
        tracker._checked_batch = True
    if tracker.steps == 0 and tracker.initial_loss is None:
        tracker._measure_start()
    if tracker.audit_shadow is not None and tracker.audit_shadow.spec.index < 0:
        index = int(indices[0])
        row = select_rows(batch, [0], len(indices))
        tracker.audit_shadow.spec = NeighbourSpec(index, None, "self", index)
        tracker.audit_shadow.row = row
    group = tracker._group
    if tracker._has_buffers and not group.batches and \
            any(not s.forked for s in tracker.engine.shadows):
        group.buffers = {name: b.detach().clone() for name, b in tracker.model.named_buffers()}
    group.batches.append(batch)
    group.indices.append(indices)
    if tracker.engine.shadows:   # replayed by the shadows' steps only: none held, none kept
        group.rng_states.append(torch.get_rng_state())


def before_main_step(tracker: StabilityTracker, optimizer: torch.optim.Optimizer, args: Any,
                     kwargs: Any) -> None:
    """Start (fork) the waiting shadows whose swapped example this step draws."""
    start = time.perf_counter()
    group = tracker._group
    waiting = [s for s in tracker.engine.shadows if not s.forked]
    if group.batches and waiting:
        drawn = tracker._drawn_indices(group)
        for shadow in waiting:
            if shadow.spec.index in drawn:
                try:
                    tracker.engine.fork(shadow, tracker.steps, group.buffers)
                except RuntimeError as error:
                    raise LockstepError(
                        f"cannot start {shadow.label} as a copy of the main run ({error}); "
                        "a module whose buffers change shape during training (per-channel "
                        "observers of quantization-aware training) cannot be mirrored"
                    ) from error
    tracker.time_spent.step_hooks += time.perf_counter() - start


def after_main_step(tracker: StabilityTracker, optimizer: torch.optim.Optimizer, args: Any,
                    kwargs: Any) -> None:
    """Step the shadows after the main step, timing the hook and the engine apart."""
    start = time.perf_counter()
    stepping = tracker._step_shadows(optimizer)
    tracker.time_spent.shadow_steps += stepping
    tracker.time_spent.step_hooks += time.perf_counter() - start - stepping


def step_shadows(tracker: StabilityTracker, optimizer: torch.optim.Optimizer) -> float:
    """Step the shadows after the main step and record it; returns the seconds spent inside
    the engine's step."""
    group, tracker._group = tracker._group, StepGroup([], [], [])
    if not group.batches:
        tracker._warn_once("unrecorded", "optimizer.step() ran without a batch from "
                           "tracker.batches(): the shadows skipped this step and no longer "
                           "follow the main run", LockstepWarning)
        tracker._skipped_steps += 1   # every later reading says so (``lost_lockstep_note``)
        if tracker._lockstep_lost is None:
            tracker._lockstep_lost = (tracker.epoch + 1, tracker.steps)
        return 0.0
    stepping = tracker._run_engine(group) if tracker.engine.shadows else 0.0
    drawn = tracker._drawn_indices(group)
    reason = optimizer_reason(optimizer)   # the settings as this step used them
    if reason != tracker._step_reason:
        tracker._step_reason = reason
        tracker.history.note_optimizer(tracker.steps, reason)
    step_size = tracker.groups.observe(optimizer.param_groups)
    hits = tracker._hit_counts(drawn)
    if tracker.drawable is not None:   # positions among the drawable examples, 0..n-1
        drawn = tracker._position[drawn]
    tracker.history.record(step_size, len(drawn), drawn, hits)
    tracker.steps += 1
    return stepping


def run_engine(tracker: StabilityTracker, group: StepGroup) -> float:
    """The engine's step for the active shadows, with the RNG states put back after it;
    returns the seconds it took."""
    active = [s for s in tracker.engine.shadows if s.active]
    after = torch.get_rng_state()
    host = tracker.host_rng.save(first_epoch=tracker.epoch == 0, step=tracker.steps)
    engine_start = time.perf_counter()
    try:
        faulted = tracker.engine.step(active, group, tracker.steps)
    finally:
        stepping = time.perf_counter() - engine_start
        torch.set_rng_state(after)
        if host is not None and tracker.host_rng.restore(host):
            tracker._warn_once("host_rng", "the shadows' steps draw from Python's random or "
                               "NumPy's global RNG; the tracker now restores both after every "
                               "step so your run is unchanged, but it replays only torch's RNG "
                               "for the shadows: draw augmentation randomness from torch",
                               UserWarning)
    tracker._report_faults(faulted)
    return stepping


def hit_counts(tracker: StabilityTracker, drawn: np.ndarray) -> list[int] | None:
    """How often each shadow's swapped index was drawn at this step, or None when no shadow's
    was (most steps: a set of the swapped indices decides that in ~14 us right after the
    models' kernels, where a look-up table read with NumPy took ~55 us there)."""
    if not tracker.shadows:
        return None
    if tracker._swapped is None:
        tracker._swapped = np.fromiter((s.spec.index for s in tracker.shadows), np.int64)
        tracker._swapped_set = set(tracker._swapped.tolist())
    if tracker._swapped_set.isdisjoint(drawn.tolist()):
        return None
    return (drawn[:, None] == tracker._swapped[None, :]).sum(axis=0).tolist()



