"""Batched shadows: every forked shadow stepped together as one stacked computation.

The forked runs' trainable parameters and optimizer state are held as stacked tensors, one slot
per run (``stacking``), and stepped together with ``vmap``, each slot on its own substituted batch
(``stackstep``). Slot 0 is a *reference* run with no swap: batched kernels need not round like the
main model's unbatched ones, so each shadow is measured against the reference, which shares its
arithmetic. A shadow forked mid-run copies the reference, which before its swapped example is
drawn is exactly what it would be.

Whatever the batched path cannot follow exactly makes the engine fall back, once and with a
warning, to per-shadow stepping; the runs' states move over unchanged.
"""

from __future__ import annotations

import copy
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import torch
from torch import nn

from .fallback import (
    EngineFallbackWarning,
    adopt,
    fall_back,
    fallback_fork,
    fallback_step,
    load_into_module,
)
from .lockstep import LockstepError, LossOf, NeighbourSpec, PerShadowEngine, Shadow, StepGroup
from .restack import restack, restack_in_place
from .stacking import (
    SlotState,
    _CannotBatch,
    _layout,
    _module_over,
    _Stack,
    _state_from_module,
    after_each_run,
    why_not_batched,
)
from .stackstep import _StackStepper

__all__ = ["BatchedEngine", "BatchedShadow", "EngineFallbackWarning", "SlotState"]


class BatchedShadow(Shadow):
    """A shadow of the batched engine: its state lives in a stack slot or, when out of it, here.

    ``model`` is a module over the shadow's current state (``engine.module_of``) until the engine
    falls back to per-shadow stepping; from then on it is the shadow's own module.
    """

    def __init__(self, spec: NeighbourSpec, row: Any, label: str,
                 engine: BatchedEngine | None = None) -> None:
        self._engine = engine
        self._own_model: nn.Module | None = None
        super().__init__(spec, None, None, row, label)  # type: ignore[arg-type]
        self.state: SlotState | None = None

    @property  # type: ignore[override]
    def model(self) -> nn.Module | None:  # type: ignore[override]
        if self._own_model is not None or self._engine is None or \
                self._engine._fallback is not None:
            return self._own_model
        return self._engine.module_of(self)

    @model.setter
    def model(self, value: nn.Module | None) -> None:
        self._own_model = value


class BatchedEngine:
    """Steps the forked shadows (and a no-swap reference) together as stacked tensors."""

    name = "batched"

    def __init__(self, main_model: nn.Module, main_optimizer: torch.optim.Optimizer,
                 loss_of: LossOf, before_step: Callable[[nn.Module], Any] | None) -> None:
        self.main_model = main_model
        self.main_optimizer = main_optimizer
        self.loss_of = loss_of
        self.before_step = before_step
        # Same contract as PerShadowEngine.gradient_sync: called as gradient_sync(module, finite)
        # on each stepped run (here a module over the run's slot), returns whether all were finite.
        self.gradient_sync: Callable[[nn.Module, bool], bool] | None = None
        # Same contract as PerShadowEngine.after_step, called on a module over each stepped run
        self.after_step: Callable[[nn.Module], Any] | None = None
        self.shadows: list[BatchedShadow] = []
        self.fallback_reason: str | None = None
        self._fallback: PerShadowEngine | None = None
        self._group_names, self._stepped, self._shapes, self._constant_names = _layout(
            main_model, main_optimizer)
        self._constants: dict[str, torch.Tensor] = {}
        self._buffer_backup: dict[str, torch.Tensor] = {}
        tensors = [*main_model.parameters(), *main_model.buffers()]
        with torch.no_grad():  # shares the main model's tensors: costs no memory, never written
            self._skeleton = copy.deepcopy(main_model, {id(t): t for t in tensors})
        self._stepper = _StackStepper(main_model, main_optimizer, loss_of, self._skeleton,
                                      self._stepped)
        self.reference = BatchedShadow(NeighbourSpec(-1, None, "reference"), None, "reference",
                                       self)
        self._stack: _Stack | None = None
        # The null-swap audit shadow also gets an unbatched twin, stepped like a per-shadow
        # shadow: it must stay bit-identical to the main run, which checks that the shadows (and
        # the reference) repeat the user's step; the batched audit checks the stacked machinery.
        self._twin_engine = PerShadowEngine(main_model, main_optimizer, loss_of, before_step)
        self._twin: Shadow | None = None

    # -- construction and checkpoints ---------------------------------------------------------
    def add_shadow(self, spec: NeighbourSpec, row: Any, label: str) -> BatchedShadow:
        shadow = BatchedShadow(spec, row, label, self)
        if self._fallback is not None:
            self._adopt(self._fallback, shadow)
            self._fallback.shadows.append(shadow)
        self.shadows.append(shadow)
        return shadow

    def remove_shadow(self, shadow: Shadow) -> None:
        self.shadows.remove(shadow)  # type: ignore[arg-type]
        if shadow.spec.origin == "self" and self._twin is not None:
            self._twin_engine.remove_shadow(self._twin)
            self._twin = None
        if self._fallback is not None:
            self._fallback.remove_shadow(shadow)
        if self._stack is not None:
            self._stack.slot.pop(id(shadow), None)  # its slot is dropped at the next restack
        if isinstance(shadow, BatchedShadow):
            shadow.state = None

    def shadow_state(self, shadow: Shadow) -> dict[str, Any]:
        """Everything needed to restore ``shadow``, including the reference run it is measured
        against (the same in every shadow's state; loading it twice is harmless)."""
        reference = None
        if self.reference.forked:
            reference = {**self._state_of(self.reference).to_dict(),
                         "constants": {k: v.clone() for k, v in self._constants_of(
                             self.reference).items()}}
        own = self._state_of(shadow).to_dict() if shadow.forked and self._has_state(shadow) \
            else None
        twin = None
        if shadow.spec.origin == "self" and self._twin is not None:
            twin = self._twin_engine.shadow_state(self._twin)
        return {"state": own, "forked": shadow.forked, "forked_at": shadow.forked_at,
                "fault": shadow.fault, "reference": reference, "twin": twin}

    def load_shadow_state(self, shadow: Shadow, state: Mapping[str, Any]) -> None:
        reference = state.get("reference")
        if reference is not None:
            self._set_constants(reference["constants"])
            self.reference.forked = True
            self._put_state(self.reference, SlotState.from_dict(reference))
        shadow.forked = bool(state["forked"])
        shadow.forked_at = state["forked_at"]
        shadow.fault = state["fault"]
        if state["state"] is not None:
            self._put_state(shadow, SlotState.from_dict(state["state"]))
        if state.get("twin") is not None:
            if self._twin is None:
                self._twin = self._twin_engine.add_shadow(shadow.spec, shadow.row, "audit twin")
            self._twin_engine.load_shadow_state(self._twin, state["twin"])

    # -- reading the runs ---------------------------------------------------------------------
    def parameters_of(self, shadow: Shadow) -> dict[str, torch.Tensor]:
        """The shadow's trainable parameters by name, matching ``main_model.named_parameters()``."""
        if self._fallback is not None:
            return dict(shadow.model.named_parameters())
        if not shadow.forked:
            shadow = self.reference if self.reference.forked else None  # type: ignore[assignment]
            if shadow is None:
                return dict(self.main_model.named_parameters())
        if self._stack is not None and id(shadow) in self._stack.slot:
            j = self._stack.slot[id(shadow)]
            own = {name: t[j] for name, t in self._stack.parameters.items()}
        elif getattr(shadow, "state", None) is not None:
            own = shadow.state.parameters  # type: ignore[attr-defined]
        else:
            raise LockstepError(f"{shadow.label} has no state: it was removed")
        constants = self._constants_of(shadow)
        return {name: own[name] if name in own else constants[name]
                for name, _ in self.main_model.named_parameters()}

    def reference_parameters(self) -> dict[str, torch.Tensor] | None:
        """The no-swap reference run's parameters (what shadows are measured against), or None
        when no reference runs (nothing forked yet, or per-shadow stepping from the start)."""
        if not self.reference.forked:
            return None
        return self.parameters_of(self.reference)

    def reference_follows_main(self) -> bool:
        """Whether the shadows repeat the main run's step: the null-swap audit's unbatched twin,
        stepped as the per-shadow engine steps a shadow, is still bit-identical to the main run.
        True when there is no forked audit to tell (its verdict is read in the first epoch)."""
        twin = self._twin
        if twin is None or not twin.forked:
            return True
        own = dict(twin.model.named_parameters())
        return all(torch.equal(p, own[name]) for name, p in self.main_model.named_parameters())

    def reference_module(self) -> nn.Module | None:
        """A module holding the reference run's current state, or None when there is none."""
        return self.module_of(self.reference) if self.reference.forked else None

    def module_of(self, shadow: Shadow) -> nn.Module:
        """A module holding the shadow's current parameters and buffers (for evaluation)."""
        if self._fallback is not None:
            return shadow.model
        if not shadow.forked:
            return self.module_of(self.reference) if self.reference.forked else self.main_model
        if self._stack is not None and id(shadow) in self._stack.slot:
            return self._views()[self._stack.slot[id(shadow)]]
        return _module_over(self._skeleton, self.parameters_of(shadow), self._constants)

    # -- fork ---------------------------------------------------------------------------------
    def fork(self, shadow: Shadow, step: int, buffers: Mapping[str, torch.Tensor] | None) -> None:
        """Make ``shadow`` a copy of the reference run (started from the main run when first
        needed) as it stands before step ``step``."""
        if self._fallback is not None:
            self._fallback_fork(shadow, step, buffers)
            return
        if shadow.spec.origin == "self":
            self._fork_twin(shadow, step, buffers)
        if not self.reference.forked:
            self._start_reference(buffers)
        self._put_state(shadow, self._state_of(self.reference))
        shadow.forked = True
        shadow.forked_at = step

    def _fork_twin(self, audit: Shadow, step: int,
                   buffers: Mapping[str, torch.Tensor] | None) -> None:
        if self._twin is None:
            self._twin = self._twin_engine.add_shadow(audit.spec, audit.row, "audit twin")
        self._twin.spec, self._twin.row = audit.spec, audit.row
        self._twin_engine.fork(self._twin, step, buffers)

    def _start_reference(self, buffers: Mapping[str, torch.Tensor] | None) -> None:
        main = dict(self.main_model.named_parameters())
        constants = {name: t for name, t in self.main_model.named_buffers()}
        if buffers is not None:
            constants.update({k: v for k, v in buffers.items() if k in constants})
        constants.update({name: main[name] for name in self._constant_names if name in main})
        self._set_constants(constants)
        self.reference.state = _state_from_module(self.main_model, self.main_optimizer,
                                                  self._stepped)
        self.reference.forked = True
        self.reference.forked_at = None

    def _set_constants(self, constants: Mapping[str, torch.Tensor]) -> None:
        self._constants = {name: constants[name].detach().clone()
                           for name in self._constant_names}
        buffer_names = {name for name, _ in self.main_model.named_buffers()}
        self._buffer_backup = {name: t.clone() for name, t in self._constants.items()
                               if name in buffer_names}

    # -- stepping -----------------------------------------------------------------------------
    def step(self, shadows: Sequence[Shadow], group: StepGroup, step: int) -> list[Shadow]:
        """Take one optimizer step on the reference and each shadow, replaying the group's
        batches and RNG states. Returns the shadows that hit a non-finite loss or parameter."""
        twin = self._twin
        audits = [s for s in shadows if s.spec.origin == "self"]
        if twin is not None and twin.active and audits:
            twin.spec, twin.row = audits[0].spec, audits[0].row
            self._twin_engine.gradient_sync = self.gradient_sync
            self._twin_engine.after_step = self.after_step
            self._twin_engine.step([twin], group, step)
        if self._fallback is not None:
            return self._fallback_step(shadows, group, step)
        if not self.reference.forked:
            return []
        if not shadows and all(s.forked for s in self.shadows):
            return []   # nothing is, or will be, measured against the reference any more
        # the null-swap audit right after the reference: both then sit at the start of every
        # stacked tensor, where element-wise kernels take the same (vectorised) path for them
        members = [self.reference, *sorted(shadows, key=lambda s: s.spec.origin != "self")]
        ids = [id(m) for m in members]
        if self._stack is None or [id(m) for m in self._stack.members] != ids or \
                any(i not in self._stack.slot for i in ids):
            self._restack(members)  # type: ignore[arg-type]
        stack = self._stack
        assert stack is not None
        versions = [t._version for t in self._constants.values()]
        try:
            # a few slots at a time where the stepper can (no hooks, no constants): each chunk's
            # gradients and activations are freed before the next chunk's are made
            done = None
            if self.gradient_sync is None and self.before_step is None and not self._constants:
                done = self._stepper.step_in_chunks(stack, group, self._views)
            if done is None:
                gradients, finite = self._stepper.gradients(stack, group, self._constants,
                                                            self._views)
                if [t._version for t in self._constants.values()] != versions:
                    raise _CannotBatch("the model changes its buffers in the forward pass")
                finite = self._stepper.hooks(stack, gradients, finite, self._views,
                                             self.gradient_sync, self.before_step)
        except LockstepError:
            raise
        except Exception as error:  # noqa: BLE001 - any failure of the batched path falls back
            for name, backup in self._buffer_backup.items():
                self._constants[name].copy_(backup)
            self._fall_back(why_not_batched(error))
            return self._fallback_step(shadows, group, step)
        faulted = self._freeze_faulted(stack, *done, step) if done is not None else \
            self._apply(stack, gradients, finite, step)
        if self.after_step is not None and self._stack is not None:
            after_each_run(self._stack, self._views(), self.after_step)
        return faulted

    def freeze_non_finite(self, shadows: Sequence[Shadow], steps: int) -> list[Shadow]:
        """Freeze the active shadows whose parameters are no longer finite; returns them (see
        ``PerShadowEngine.freeze_non_finite``)."""
        if self._fallback is not None:
            return self._fallback.freeze_non_finite(shadows, steps)
        stack = self._stack
        faulted: list[Shadow] = []
        if stack is None:
            return faulted
        finite = stack.finite_slots()
        with torch.no_grad():
            for shadow in shadows:
                if not shadow.active or id(shadow) not in stack.slot or \
                        finite[j := stack.slot[id(shadow)]]:
                    continue
                shadow.state = stack.slice(j)  # type: ignore[attr-defined]
                stack.slot.pop(id(shadow))
                shadow.fault = f"non-finite parameters found after step {steps - 1}"
                faulted.append(shadow)
        return faulted

    def _apply(self, stack: _Stack, gradients: dict[str, torch.Tensor], finite: torch.Tensor,
               step: int) -> list[Shadow]:
        """The optimizer step over the stack; slots whose loss was not finite keep their state."""
        held = self._stepper.update(stack, gradients, finite)
        return self._freeze_faulted(stack, finite, held, step)

    def _freeze_faulted(self, stack: _Stack, finite: torch.Tensor, held: Mapping[int, SlotState],
                        step: int) -> list[Shadow]:
        """Slots whose loss was not finite go back to their state before the step, frozen."""
        # Per step only the losses are checked (as the per-shadow engine does); parameters that
        # turn non-finite with a finite loss are caught by the next loss or freeze_non_finite.
        if bool(finite.all()):
            return []
        faulted: list[Shadow] = []
        for j, member in enumerate(stack.members):
            if j == 0 or id(member) not in stack.slot or bool(finite[j]):
                continue  # the reference is never frozen; a removed shadow is no longer read
            member.state = held[j]
            stack.slot.pop(id(member))
            member.fault = f"non-finite loss at step {step}"
            faulted.append(member)
        return faulted

    # -- stack bookkeeping --------------------------------------------------------------------
    def _has_state(self, shadow: Shadow) -> bool:
        return (self._fallback is not None or getattr(shadow, "state", None) is not None
                or (self._stack is not None and id(shadow) in self._stack.slot))

    def _state_of(self, member: Shadow) -> SlotState:
        """A copy of the run's own state, wherever it lives."""
        if self._fallback is not None:
            return _state_from_module(member.model, member.optimizer, self._stepped)
        if self._stack is not None and id(member) in self._stack.slot:
            return self._stack.slice(self._stack.slot[id(member)])
        state = getattr(member, "state", None)
        if state is None:
            raise LockstepError(f"{member.label} has no state: it was never forked")
        return SlotState.from_dict(state.to_dict())

    def _put_state(self, member: Shadow, state: SlotState) -> None:
        if self._fallback is not None:
            if member is self.reference and self.reference.model is None:
                self._adopt(self._fallback, self.reference)
            self._load_into_module(member, state, self._constants)
            return
        if self._stack is not None:
            self._stack.slot.pop(id(member), None)
        member.state = state  # type: ignore[attr-defined]

    def _constants_of(self, member: Shadow) -> dict[str, torch.Tensor]:
        if self._fallback is not None and member.model is not None:
            named = {**dict(member.model.named_parameters()), **dict(member.model.named_buffers())}
            return {name: named[name].detach() for name in self._constant_names}
        return self._constants

    _restack = restack
    _restack_in_place = restack_in_place

    def _views(self) -> list[nn.Module]:
        assert self._stack is not None
        return self._stack.modules(self._skeleton, self._constants)

    # -- falling back to per-shadow stepping (``fallback``) -----------------------------------
    _fall_back = fall_back
    _adopt = adopt
    _load_into_module = load_into_module
    _fallback_fork = fallback_fork
    _fallback_step = fallback_step
