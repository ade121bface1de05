"""Checkpoint and resume for StabilityTracker.

The state is made of tensors, lists, dicts and plain values only, so ``torch.save`` /
``torch.load(weights_only=True)`` round-trip it. Take it at an epoch's end (between optimizer
steps), save it beside the model's and optimizer's own state, and resume in a fresh process by
building the model, optimizer and tracker as before and loading all three.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

from ..outputs.reading import EpochReading
from ..shadows.lockstep import LockstepError, NeighbourSpec
from ..theory.assessment import GroupSettings
from ..theory.history import StepHistory

if TYPE_CHECKING:  # pragma: no cover
    from .tracker import StabilityTracker

__all__ = ["tracker_state", "restore_tracker", "STATE_VERSION"]

STATE_VERSION = 1


def _shapes(tracker: StabilityTracker) -> list[list[Any]]:
    return [[name, list(p.shape)] for name, p in tracker.model.named_parameters()]


def _spec_state(spec: NeighbourSpec) -> dict[str, Any]:
    return {"index": spec.index, "replacement": spec.replacement, "origin": spec.origin,
            "source_index": spec.source_index}


_SIGNED = {np.dtype(np.uint16): np.int16, np.dtype(np.uint32): np.int32,
           np.dtype(np.uint64): np.int64}


def _history_state(history: StepHistory) -> dict[str, Any]:
    """The step record with its indices as a tensor of their compact type (unsigned types are
    saved as the signed type of the same width, bit for bit, and ``indices_dtype`` names it)."""
    state = history.state_dict()
    indices = np.ascontiguousarray(state["indices"])
    state["indices_dtype"] = indices.dtype.name
    state["indices"] = torch.from_numpy(indices.view(_SIGNED.get(indices.dtype, indices.dtype)))
    state["hits"] = [[list(pair) for pair in pairs] for pairs in state["hits"]]
    return state


def tracker_state(tracker: StabilityTracker) -> dict[str, Any]:
    """Everything needed to continue the tracked run exactly."""
    if tracker._group.batches:
        raise LockstepError("take the tracker's state between optimizer steps (e.g. after "
                            "finish_epoch()), not with batches pending")
    engine = tracker.engine
    audit = tracker.audit_shadow
    estimated = tracker._estimated
    return {
        "version": STATE_VERSION,
        "n": tracker.n,
        "train_set_size": tracker.dataset_size,
        "drawable": None if tracker.drawable is None else torch.from_numpy(tracker.drawable),
        "shadows": len(tracker.shadows),
        "parameter_shapes": _shapes(tracker),
        "engine": engine.name,
        "specs": [_spec_state(s.spec) for s in tracker.shadows],
        "shadow_states": [engine.shadow_state(s) for s in tracker.shadows],
        "audit": None if audit is None else {
            "spec": _spec_state(audit.spec), "row": audit.row, "state": engine.shadow_state(audit)},
        "history": _history_state(tracker.history),
        "epoch": tracker.epoch,
        "steps": tracker.steps,
        "readings": [r.to_dict() for r in tracker.readings],
        "warned": sorted(tracker._warned),
        "assumption_violated": tracker._assumption_violated,
        "host_rng_used": tracker.host_rng.used,
        "estimated_constants": None if estimated is None else estimated.to_dict(),
        "groups": tracker.groups.state_dict(),
        "loss_seen": tracker.loss_seen,
        "initial_loss": tracker.initial_loss,
        "lockstep_lost": tracker._lockstep_lost,
        "skipped_steps": tracker._skipped_steps,
    }


def _mismatch(what: str, saved: Any, here: Any) -> LockstepError:
    return LockstepError(f"the saved tracker state does not fit this tracker: {what} is {saved} in "
                         f"the checkpoint but {here} here")


def restore_tracker(tracker: StabilityTracker, state: Mapping[str, Any]) -> None:
    """Load ``state`` (from ``tracker_state``) into a freshly built tracker."""
    if state.get("version") != STATE_VERSION:
        raise LockstepError(f"unknown tracker state version {state.get('version')!r}")
    size = state.get("train_set_size", state["n"])
    if size != tracker.dataset_size:
        raise _mismatch("the training-set size len(train_set)", size, tracker.dataset_size)
    if state.get("drawable") is not None:
        tracker._set_part(state["drawable"].numpy().astype(np.int64))
    if state["n"] != tracker.n:
        raise _mismatch("the training-set size", state["n"], tracker.n)
    if state["shadows"] != len(tracker.shadows):
        raise _mismatch("the number of shadows K", state["shadows"], len(tracker.shadows))
    here = _shapes(tracker)
    if [list(x) for x in state["parameter_shapes"]] != here:
        saved_names = [name for name, _ in state["parameter_shapes"]]
        raise _mismatch("the model architecture (parameter names and shapes)",
                        f"{len(saved_names)} tensors starting {saved_names[:3]}",
                        f"{len(here)} tensors starting {[n for n, _ in here[:3]]}")
    from ..theory.constants import Constants

    engine = tracker.engine
    for shadow, spec, shadow_state in zip(tracker.shadows, state["specs"],
                                          state["shadow_states"]):
        shadow.spec = NeighbourSpec(int(spec["index"]), spec["replacement"], spec["origin"],
                                    spec["source_index"])
        engine.load_shadow_state(shadow, shadow_state)
    tracker.specs = [s.spec for s in tracker.shadows]
    tracker._swapped = None   # recomputed from the restored specs
    audit = state["audit"]
    if audit is None and tracker.audit_shadow is not None:
        engine.remove_shadow(tracker.audit_shadow)
        tracker.audit_shadow = None
    elif audit is not None:
        if tracker.audit_shadow is None:
            raise _mismatch("the null-swap audit", "running", "switched off")
        spec = audit["spec"]
        tracker.audit_shadow.spec = NeighbourSpec(int(spec["index"]), None, "self",
                                                  spec["source_index"])
        tracker.audit_shadow.row = audit["row"]
        engine.load_shadow_state(tracker.audit_shadow, audit["state"])
    history = dict(state["history"])
    history["indices"] = history["indices"].numpy().view(
        np.dtype(history.get("indices_dtype", "int64")))
    tracker.history = StepHistory.from_state_dict(history)
    tracker.epoch = int(state["epoch"])
    tracker.steps = int(state["steps"])
    tracker.readings = [EpochReading.from_dict(r) for r in state["readings"]]
    tracker._warned = set(state["warned"])
    tracker._assumption_violated = bool(state["assumption_violated"])
    tracker.host_rng.used = bool(state.get("host_rng_used", False))
    estimated = state["estimated_constants"]
    tracker._estimated = None if estimated is None else Constants.from_dict(estimated)
    if state.get("groups") is not None:
        tracker.groups = GroupSettings.from_state_dict(state["groups"])
    tracker.loss_seen = state.get("loss_seen")
    tracker.initial_loss = state.get("initial_loss")
    lost = state.get("lockstep_lost")
    tracker._lockstep_lost = None if lost is None else (int(lost[0]), int(lost[1]))
    tracker._skipped_steps = int(state.get("skipped_steps", 0))
    tracker._collate_rows_for = None   # rows are rebuilt from the specs at the next batches()
    tracker._probe = None
    tracker._holdout = None
    tracker._sampling_fixed = True   # the next pass must draw from the same examples
    tracker._step_reason = tracker.history.reasons[-1][1] if tracker.history.reasons else None
    tracker._steps_at_finish = tracker.steps
    tracker._passes = 0
