"""Stacked shadows for models made of Linear layers: batched matrix products, explicit backward.

For a model that is a chain of ``nn.Linear`` layers and element-wise activations (inside
``nn.Sequential``), every run's weights are held stacked (``stacking``) and each layer is one
batched matrix product over all runs (``torch.bmm``); a run whose swapped example is not in the
batch reads the main batch's inputs as they are (a broadcast view, not a copy). The backward pass
is written out by hand (the transposed products and torch's own activation derivatives), the
loss's derivative comes from autograd on the stacked outputs only, and the update is one
optimizer step over the stacked tensors (foreach where the optimizer offers it). Where one step's
gradients and activations would exceed ``STEP_MEMORY_BUDGET``, forward, backward and update run a
chunk of slots at a time (the same values, bit for bit), so a step holds one chunk's share.

Why no single product of the shared inputs against all runs' concatenated first-layer weights:
that matrix product does not round every run's block of columns alike (measured on this torch:
4 of 60 shapes gave a block differing from the first in the last bits with equal weights), so a
null swap would drift from its reference; ``bmm`` over equal slots rounded them alike in every
shape tried, which keeps the null-swap audit exact. It costs no more arithmetic.

Like the vmap engine (``batched``), it steps a no-swap reference run beside the shadows and
measures them against it (stacked products do not round like the main model's unbatched
ones), keeps an unbatched twin of the null-swap audit, and falls back to per-shadow stepping,
with a warning, when a step cannot be followed. ``stacked_refusal`` says which models it takes
(``chain``, re-exported here); the step itself is in ``handstep`` (``STEP_MEMORY_BUDGET``
re-exported here).

In ``engine="auto"`` mode it also makes the choice between itself and per-shadow stepping, by
timing both on the run's own batch at the first step after the shadows fork (``AutoChoice``).
"""

from __future__ import annotations

import math
import os
import statistics
import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
import torch
from torch import nn

from .batched import BatchedEngine
from .chain import stacked_refusal
from .fallback import move_to_per_shadow
from .handstep import STEP_MEMORY_BUDGET, _HandStepper
from .lockstep import LossOf, NeighbourSpec, PerShadowEngine, Shadow, StepGroup

__all__ = ["StackedEngine", "stacked_refusal", "AUTO_OVERRIDE_VARIABLE", "AUTO_TIMED_STEPS",
           "STEP_MEMORY_BUDGET"]

# Environment variable fixing what engine="auto" picks ("stacked" or "per_shadow") instead of
# timing them (tests, and anyone who needs the same engine in every process).
AUTO_OVERRIDE_VARIABLE = "SGDSTAB_AUTO_ENGINE"
# Steps of each candidate timed by engine="auto", after one warm-up step each.
AUTO_TIMED_STEPS = 3


class StackedEngine(BatchedEngine):
    """Steps the forked shadows (and a no-swap reference) of a Linear/activation chain as
    stacked tensors with batched products and an explicit backward (module docstring).

    With ``auto=True`` the engine times itself against per-shadow stepping at the first step
    after the shadows fork and keeps the faster one (``choice`` says which and why)."""

    name = "stacked"

    def __init__(self, main_model: nn.Module, main_optimizer: torch.optim.Optimizer,
                 loss_of: LossOf, before_step: Callable[[nn.Module], Any] | None, *,
                 loss_fn: Callable[..., torch.Tensor], auto: bool = False) -> None:
        super().__init__(main_model, main_optimizer, loss_of, before_step)
        self.loss_fn = loss_fn
        self._stepper = _HandStepper(main_model, main_optimizer, loss_of, self._skeleton,
                                     self._stepped, loss_fn)
        self.auto = auto
        self.choice = ("stacked: engine='stacked' was asked for" if not auto else
                       "auto: not chosen yet (timed at the first step after the shadows fork)")
        self.decided = not auto
        self.pending_notes: list[str] = []

    # -- the auto choice ------------------------------------------------------------------------
    def step(self, shadows: Sequence[Shadow], group: StepGroup, step: int) -> list[Shadow]:
        if not self.decided and self.reference.forked and shadows and self._fallback is None:
            self._decide(group, step)
        return super().step(shadows, group, step)

    def _decide(self, group: StepGroup, step: int) -> None:
        self.decided = True
        runs = [s for s in self.shadows if s.spec.origin != "self"]
        override = os.environ.get(AUTO_OVERRIDE_VARIABLE, "").strip()
        if override in ("stacked", "per_shadow"):
            kind, why = override, f"set by the environment variable {AUTO_OVERRIDE_VARIABLE}"
        elif not runs:
            kind, why = "per_shadow", "no shadows remain after the null-swap audit"
        elif self.gradient_sync is not None:
            kind, why = "stacked", ("data-parallel run: not timed, so that every process makes "
                                    "the same choice")
        else:
            stacked_s, per_shadow_s, refused = self._time_candidates(group, step, runs)
            kind = "stacked" if stacked_s < per_shadow_s else "per_shadow"
            why = f"the stacked engine cannot step this run: {refused}" if refused else (
                f"timed on this run's batch with {torch.get_num_threads()} torch thread(s): "
                f"stacked {stacked_s * 1e3:.2f} ms per step for {len(runs)} shadow(s) and its "
                f"reference, per-shadow {per_shadow_s * 1e3:.2f} ms, medians of "
                f"{AUTO_TIMED_STEPS} steps after a warm-up")
        self.choice = f"{kind}: {why}"
        self.pending_notes.append(f"engine auto chose {self.choice}")
        if kind == "per_shadow":
            self.use_per_shadow()

    def _time_candidates(self, group: StepGroup, step: int, runs: Sequence[Shadow]
                         ) -> tuple[float, float, str]:
        """Seconds per step of the stacked engine over ``runs`` (plus a reference) and of the
        per-shadow engine over ``runs``, interleaved, on copies forked from the main run now:
        the run's own shadows are not touched, so the readings do not depend on the timing.
        The third value is why the stacked engine could not step this run ('' when it could)."""
        stacked = StackedEngine(self.main_model, self.main_optimizer, self.loss_of, None,
                                loss_fn=self.loss_fn)
        per_shadow = PerShadowEngine(self.main_model, self.main_optimizer, self.loss_of, None)
        trial = [stacked.add_shadow(NeighbourSpec(s.spec.index, None, s.spec.origin), s.row,
                                    s.label) for s in runs]
        # every run as its own model: one model stepped over and over would stay in the cache
        # and flatter per-shadow stepping (measured: chosen at batch 256, where it was slower)
        singles = [per_shadow.add_shadow(NeighbourSpec(s.spec.index, None, s.spec.origin),
                                         s.row, s.label) for s in runs]
        for shadow in trial:
            stacked.fork(shadow, step, group.buffers)
        for single in singles:
            per_shadow.fork(single, step, group.buffers)
        times: dict[str, list[float]] = {"stacked": [], "per_shadow": []}
        clock = time.perf_counter
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")   # the trial's own fallback is reported as the choice
            for round_ in range(AUTO_TIMED_STEPS + 1):
                order = (("stacked", stacked, trial), ("per_shadow", per_shadow, singles))
                for name, engine, members in order if round_ % 2 else order[::-1]:
                    start = clock()
                    engine.step(members, group, step)
                    if round_:
                        times[name].append(clock() - start)
                    if engine is stacked and stacked.fallback_reason is not None:
                        return math.inf, 0.0, stacked.fallback_reason
        return statistics.median(times["stacked"]), statistics.median(times["per_shadow"]), \
            ""

    def use_per_shadow(self) -> None:
        """Step every run one by one from now on (auto chose it, or a checkpoint made with it is
        loaded); no stacked step has been taken, so the runs move over exactly."""
        if self._fallback is not None:
            return
        if self._twin is not None:   # the audit itself is now stepped as the main run is
            self._twin_engine.remove_shadow(self._twin)
            self._twin = None
        self._switch()
        self.name = "per_shadow"

    def _switch(self) -> None:
        keep_reference = self.reference.forked and self._stepper.updates > 0
        assert not keep_reference, "the choice is made before any stacked step"
        move_to_per_shadow(self)   # without a stacked step the reference is dropped

    # -- the epoch end ------------------------------------------------------------------------
    def probe_losses(self, chunks: Sequence[Any], loss_fn: Callable[..., torch.Tensor] | None
                     ) -> dict[int, np.ndarray] | None:
        """Per-example losses of every stacked run (the reference included) on the probe's
        ``chunks``, by ``id`` of the run: one batched product per layer for all runs, in
        evaluation mode, instead of one forward pass per run. Only when the readings' losses
        are ``loss_fn(outputs, targets, reduction="none")`` of the loss this engine steps with;
        None otherwise (and with per-shadow stepping), so the runs are evaluated one by one."""
        stack, stepper = self._stack, self._stepper
        if loss_fn is not self.loss_fn or self._fallback is not None or stack is None or \
                not isinstance(stepper, _HandStepper):
            return None
        parts = []
        for chunk in chunks:
            values = stepper.evaluate(stack.parameters, chunk)
            if values is None:
                return None
            parts.append(values)
        joined = np.concatenate(parts, axis=1) if parts else np.zeros((len(stack.members), 0))
        return {id(member): joined[j] for j, member in enumerate(stack.members)}

    # -- the choice travels with a checkpoint ---------------------------------------------------
    def shadow_state(self, shadow: Shadow) -> dict[str, Any]:
        state = super().shadow_state(shadow)
        state["engine_choice"] = self.choice if self.decided else None
        state["engine_kind"] = self.name if self.decided else None
        return state

    def load_shadow_state(self, shadow: Shadow, state: Mapping[str, Any]) -> None:
        kind = state.get("engine_kind")
        if kind is not None and not self.decided:
            self.decided = True
            self.choice = state["engine_choice"]
            if kind == "per_shadow":
                self.use_per_shadow()
        super().load_shadow_state(shadow, state)
