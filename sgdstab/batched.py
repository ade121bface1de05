"""Batched shadows: every forked shadow stepped together as one stacked computation.

The trainable parameters of the forked shadows are held as stacked tensors (one leading slot per
run, as ``torch.func.stack_module_state`` builds them) and stepped together: ``vmap`` over
``functional_call`` + ``grad``, each slot with its own substituted batch, then one optimizer of the
user's class over the stacked tensors (exact for element-wise optimizers). Slot 0 is a *reference*
run with no swap: batched kernels need not round like the main model's unbatched ones, so each
shadow is measured against the reference, which shares its arithmetic. A shadow forked mid-run
copies the reference, which before its swapped example is drawn is exactly what it would be.

Whatever the batched path cannot follow exactly makes the engine fall back, once and with a
warning, to per-shadow stepping; the runs' states move over unchanged.
"""

from __future__ import annotations

import copy
import functools
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.func import functional_call, grad_and_value, vmap
from torch.utils._pytree import tree_flatten, tree_unflatten

from .lockstep import (
    LockstepError,
    LossOf,
    NeighbourSpec,
    PerShadowEngine,
    Shadow,
    StepGroup,
    substitute_rows,
)

__all__ = ["BatchedEngine", "BatchedShadow", "EngineFallbackWarning", "SlotState"]

# State entries that are one value for the whole tensor (step counters and the like); they are
# shared by all slots, which is right because every slot descends from the same reference run.
SHARED_STATE_KEYS = frozenset({"step", "eta", "mu", "mu_product"})
# Above this relative gap between the reference slot's gradient and an unbatched gradient of the
# same parameters on the same batch and RNG state, the batched forward is not the main run's
# computation (a different dropout mask, say); rounding alone stays near 1e-6 in float32.
VERIFY_TOLERANCE = 1e-3


class EngineFallbackWarning(UserWarning):
    """The batched engine cannot follow this run exactly; shadows are stepped one by one."""


class _CannotBatch(Exception):
    """The batched path cannot follow this step exactly (the message says why)."""


@dataclass
class SlotState:
    """One run's own state: trainable parameters and optimizer state, by parameter name."""

    parameters: dict[str, torch.Tensor]
    optimizer: dict[str, dict[str, Any]] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"parameters": self.parameters, "optimizer": self.optimizer}

    @classmethod
    def from_dict(cls, state: Mapping[str, Any]) -> SlotState:
        return cls({k: v.detach().clone() for k, v in state["parameters"].items()},
                   {k: {key: _clone(v) for key, v in entry.items()}
                    for k, entry in state["optimizer"].items()})


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

    @property
    def model(self) -> nn.Module | None:  # type: ignore[override]
        if self._own_model is not None or self._engine is None or \
                self._engine._fallback is not None:
            return self._own_model
        return self._engine.module_of(self)

    @model.setter
    def model(self, value: nn.Module | None) -> None:
        self._own_model = value


def _clone(value: Any) -> Any:
    return value.detach().clone() if isinstance(value, torch.Tensor) else copy.deepcopy(value)


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, torch.Tensor) or isinstance(b, torch.Tensor):
        return (isinstance(a, torch.Tensor) and isinstance(b, torch.Tensor)
                and a.shape == b.shape and bool(torch.equal(a, b)))
    return bool(a == b)


def _per_element(key: str, value: Any, shape: torch.Size) -> bool:
    """Whether a single run's optimizer-state entry has one value per parameter element."""
    return (isinstance(value, torch.Tensor) and value.shape == shape
            and (len(shape) > 0 or key not in SHARED_STATE_KEYS))


class _LossModule(nn.Module):
    """Wraps the user's loss so ``functional_call`` can run it over substituted parameters."""

    def __init__(self, model: nn.Module, loss_of: LossOf) -> None:
        super().__init__()
        self.model = model
        self.loss_of = loss_of

    def forward(self, batch: Any) -> torch.Tensor:
        return self.loss_of(self.model, batch)


class _Stack:
    """The runs stepped together: slot ``j`` of every stacked tensor belongs to ``members[j]``."""

    def __init__(self, members: list[BatchedShadow], parameters: dict[str, torch.Tensor],
                 optimizer: torch.optim.Optimizer) -> None:
        self.members = members
        self.slot = {id(m): j for j, m in enumerate(members)}
        self.parameters = parameters
        self.optimizer = optimizer
        self.views: list[nn.Module] | None = None

    def slice(self, j: int, copy: bool = True) -> SlotState:
        """Slot ``j``'s own state: copies, or (``copy=False``) views into the stack."""
        parameters = {name: t[j].clone() if copy else t[j] for name, t in self.parameters.items()}
        optimizer = {}
        for name, stacked in self.parameters.items():
            entry = self.optimizer.state.get(stacked)
            if entry:
                optimizer[name] = {key: (v[j].clone() if copy else v[j])
                                   if isinstance(v, torch.Tensor) and v.shape == stacked.shape
                                   else (_clone(v) if copy else v)
                                   for key, v in entry.items()}
        return SlotState(parameters, optimizer)


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
        self.shadows: list[BatchedShadow] = []
        self.fallback_reason: str | None = None
        self._fallback: PerShadowEngine | None = None
        names = {id(p): name for name, p in main_model.named_parameters()}
        self._group_names: list[list[str]] = []
        for group in main_optimizer.param_groups:
            try:
                self._group_names.append([names[id(p)] for p in group["params"]])
            except KeyError:
                raise LockstepError("the optimizer holds parameters that are not the model's: "
                                    "pass the optimizer built over model.parameters()") from None
        in_optimizer = {name for group in self._group_names for name in group}
        self._stepped = [name for name, p in main_model.named_parameters()
                         if p.requires_grad and name in in_optimizer]
        self._shapes = {name: p.shape for name, p in main_model.named_parameters()}
        # Parameters outside the optimizer (or frozen) and buffers: one copy shared by all slots.
        self._constant_names = [name for name, _ in main_model.named_parameters()
                                if name not in self._stepped]
        self._constant_names += [name for name, _ in main_model.named_buffers()]
        self._constants: dict[str, torch.Tensor] = {}
        self._buffer_backup: dict[str, torch.Tensor] = {}
        tensors = [*main_model.parameters(), *main_model.buffers()]
        with torch.no_grad():  # shares the main model's tensors: costs no memory, never written
            self._skeleton = copy.deepcopy(main_model, {id(t): t for t in tensors})
        self._main_modules = list(main_model.modules())
        self._module_lists: dict[int, tuple[nn.Module, list[nn.Module]]] = {}
        self._loss_module = _LossModule(self._skeleton, loss_of)
        self.reference = BatchedShadow(NeighbourSpec(-1, None, "reference"), None, "reference",
                                       self)
        self._stack: _Stack | None = None
        # The null-swap audit shadow also gets an unbatched twin, stepped like a per-shadow
        # shadow: it must stay bit-identical to the main run, which checks that the shadows (and
        # the reference) repeat the user's step; the batched audit checks the stacked machinery.
        self._twin_engine = PerShadowEngine(main_model, main_optimizer, loss_of, before_step)
        self._twin: Shadow | None = None
        self._batched_steps = 0
        self._verified = False

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
            self._fallback.shadows.remove(shadow)
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
        return self._module_over(self.parameters_of(shadow), self._constants)

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
        parameters = {name: main[name].detach().clone() for name in self._stepped}
        optimizer = {}
        for name in self._stepped:
            entry = self.main_optimizer.state.get(main[name])
            if entry:
                optimizer[name] = {key: _clone(v) for key, v in entry.items()}
        self.reference.state = SlotState(parameters, optimizer)
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
            self._twin_engine.step([twin], group, step)
        if self._fallback is not None:
            return self._fallback_step(shadows, group, step)
        if not self.reference.forked:
            return []
        if not shadows and all(s.forked for s in self.shadows):
            return []   # nothing is, or will be, measured against the reference any more
        members = [self.reference, *shadows]
        ids = [id(m) for m in members]
        if self._stack is None or [id(m) for m in self._stack.members] != ids or \
                any(i not in self._stack.slot for i in ids):
            self._restack(members)  # type: ignore[arg-type]
        stack = self._stack
        assert stack is not None
        versions = [t._version for t in self._constants.values()]
        try:
            gradients, finite = self._gradients(stack, group)
            if [t._version for t in self._constants.values()] != versions:
                raise _CannotBatch("the model changes its buffers in the forward pass")
            finite = self._hooks(stack, gradients, finite)
        except LockstepError:
            raise
        except Exception as error:  # noqa: BLE001 - any failure of the batched path falls back
            for name, backup in self._buffer_backup.items():
                self._constants[name].copy_(backup)
            self._fall_back(_reason(error))
            return self._fallback_step(shadows, group, step)
        return self._apply(stack, gradients, finite, step)

    def freeze_non_finite(self, shadows: Sequence[Shadow], steps: int) -> list[Shadow]:
        """Freeze the active shadows whose parameters are no longer finite; returns them (see
        ``PerShadowEngine.freeze_non_finite``)."""
        if self._fallback is not None:
            return self._fallback.freeze_non_finite(shadows, steps)
        stack = self._stack
        faulted: list[Shadow] = []
        if stack is None:
            return faulted
        with torch.no_grad():
            for shadow in shadows:
                if not shadow.active or id(shadow) not in stack.slot:
                    continue
                j = stack.slot[id(shadow)]
                if all(bool(torch.isfinite(t[j]).all()) for t in stack.parameters.values()):
                    continue
                shadow.state = stack.slice(j)  # type: ignore[attr-defined]
                stack.slot.pop(id(shadow))
                shadow.fault = f"non-finite parameters found after step {steps - 1}"
                faulted.append(shadow)
        return faulted

    def _sync_modes(self, modules: Sequence[nn.Module]) -> None:
        modes = [module.training for module in self._main_modules]
        for model in modules:
            for module, mode in zip(self._modules_of(model), modes):
                module.training = mode   # follow the user's train()/eval() choices per module

    def _modules_of(self, model: nn.Module) -> list[nn.Module]:
        found = self._module_lists.get(id(model))
        if found is None or found[0] is not model:
            found = (model, list(model.modules()))
            self._module_lists[id(model)] = found
        return found[1]

    def _gradients(self, stack: _Stack, group: StepGroup
                   ) -> tuple[dict[str, torch.Tensor], torch.Tensor]:
        """Per-slot gradients summed over the group's batches, and which slots stayed finite."""
        self._sync_modes([self._skeleton])
        finite = torch.ones(len(stack.members), dtype=torch.bool)
        total: dict[str, torch.Tensor] | None = None
        constants = {f"model.{k}": v for k, v in self._constants.items()}
        for number, (batch, indices, rng_state) in enumerate(
                zip(group.batches, group.indices, group.rng_states)):
            hits = {}
            for j, member in enumerate(stack.members):
                positions = np.flatnonzero(indices == member.spec.index)
                if positions.size:
                    hits[j] = substitute_rows(batch, member.row, positions.tolist(),
                                              len(indices))
            tensors, dims, rebuild = _stacked_leaves(batch, len(stack.members), hits)
            torch.set_rng_state(rng_state)
            with torch.enable_grad():
                loss = functools.partial(self._slot_loss, context=(rebuild, constants))
                gradients, losses = vmap(grad_and_value(loss), in_dims=(0, dims),
                                         randomness="same")(stack.parameters, tensors)
            if not self._verified and number == 0:
                self._verify(stack, batch, rng_state, gradients)
            finite &= torch.isfinite(losses.detach())
            if total is None:
                total = gradients
            else:
                for name in total:
                    total[name] += gradients[name]
        assert total is not None
        return total, finite

    def _slot_loss(self, parameters: dict[str, torch.Tensor], leaves: list[torch.Tensor],
                   context: tuple[Callable[[list[Any]], Any], dict[str, torch.Tensor]]
                   ) -> torch.Tensor:
        """One slot's loss: the user's loss of the model over ``parameters`` on its batch."""
        rebuild, constants = context
        values = {f"model.{k}": v for k, v in parameters.items()}
        return functional_call(self._loss_module, {**values, **constants}, (rebuild(leaves),))

    def _verify(self, stack: _Stack, batch: Any, rng_state: torch.Tensor,
                gradients: Mapping[str, torch.Tensor]) -> None:
        """Once: the reference slot's gradient must match an unbatched gradient of the same
        parameters on the same batch with the same RNG state (dropout masks included)."""
        module = self._views()[0]
        self._sync_modes([module])
        own = dict(module.named_parameters())
        torch.set_rng_state(rng_state)
        with torch.enable_grad():
            loss = self.loss_of(module, batch)
            plain = torch.autograd.grad(loss, [own[name] for name in self._stepped],
                                        allow_unused=True)
        gap = norm = 0.0
        for name, value in zip(self._stepped, plain):
            value = torch.zeros_like(own[name]) if value is None else value
            gap += float(((gradients[name][0].double() - value.double()) ** 2).sum())
            norm += float((value.double() ** 2).sum())
        relative = (gap ** 0.5) / max(norm ** 0.5, 1e-30)
        if relative > VERIFY_TOLERANCE and gap ** 0.5 > 1e-12:
            raise _CannotBatch(
                f"the batched forward does not reproduce the unbatched one (relative gradient "
                f"gap {relative:.1e}): random ops vmap draws differently (in-place dropout, "
                "bernoulli) or a model that is not a pure function of its parameters")
        self._verified = True

    def _hooks(self, stack: _Stack, gradients: dict[str, torch.Tensor], finite: torch.Tensor
               ) -> torch.Tensor:
        """Run gradient_sync and before_step on a module over each slot, as the per-shadow
        engine does on each shadow; their in-place or replaced gradients go back into the stack."""
        if self.gradient_sync is None and self.before_step is None:
            return finite
        views = self._views()
        self._sync_modes(views)
        for j, view in enumerate(views):
            own = dict(view.named_parameters())
            given = {}
            for name in self._stepped:
                given[name] = gradients[name][j]
                own[name].grad = given[name]
            ok = bool(finite[j])
            if self.gradient_sync is not None:
                ok = bool(self.gradient_sync(view, ok))
            if ok and self.before_step is not None:
                self.before_step(view)
            for name in self._stepped:
                current = own[name].grad
                if current is None:
                    raise _CannotBatch(f"before_step removed the gradient of {name}")
                if current is not given[name]:
                    gradients[name][j].copy_(current)
                own[name].grad = None
                if own[name].data_ptr() != stack.parameters[name][j].data_ptr():
                    raise _CannotBatch(f"before_step replaced the tensor of {name}")
            finite[j] = ok
        return finite

    def _apply(self, stack: _Stack, gradients: dict[str, torch.Tensor], finite: torch.Tensor,
               step: int) -> list[Shadow]:
        """The optimizer step over the stack; slots whose loss was not finite keep their state."""
        held = {} if bool(finite.all()) else \
            {j: stack.slice(j) for j in range(len(stack.members)) if not finite[j]}
        for name, stacked in stack.parameters.items():
            stacked.grad = gradients[name]
        for main_group, group in zip(self.main_optimizer.param_groups,
                                     stack.optimizer.param_groups):
            for key, value in main_group.items():
                if key != "params":
                    group[key] = value
        stack.optimizer.step()
        for stacked in stack.parameters.values():
            stacked.grad = None
        self._batched_steps += 1
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

    def _restack(self, members: list[BatchedShadow]) -> None:
        """Stack ``members`` afresh (after forks, faults or removals); no per-run copies are made
        on the way, so the peak is the old stack plus the new one."""
        old = self._stack
        states = [old.slice(old.slot[id(m)], copy=False) if old is not None and id(m) in old.slot
                  else m.state if m.state is not None else self._state_of(m) for m in members]
        parameters = {name: torch.stack([s.parameters[name] for s in states])
                      for name in self._stepped}
        groups = []
        for main_group, names in zip(self.main_optimizer.param_groups, self._group_names):
            settings = {key: value for key, value in main_group.items() if key != "params"}
            groups.append({**settings,
                           "params": [parameters[n] for n in names if n in parameters]})
        optimizer = type(self.main_optimizer)(groups)
        for name in self._stepped:
            keys = [tuple(s.optimizer.get(name, {})) for s in states]
            if len(set(keys)) > 1:
                raise LockstepError(f"optimizer state of {name} differs in kind between runs")
            entry = {}
            for key in keys[0]:
                values = [s.optimizer[name][key] for s in states]
                if _per_element(key, values[0], self._shapes[name]):
                    entry[key] = torch.stack(values)
                else:
                    if not all(_same(values[0], v) for v in values[1:]):
                        raise LockstepError(f"optimizer state {key!r} of {name} differs between "
                                            "runs that should share it")
                    entry[key] = _clone(values[0])
            if entry:
                optimizer.state[parameters[name]] = entry
        for member in members:
            member.state = None
        del states, old
        self._stack = _Stack(list(members), parameters, optimizer)

    def _views(self) -> list[nn.Module]:
        stack = self._stack
        assert stack is not None
        if stack.views is None:
            stack.views = [self._module_over({n: t[j] for n, t in stack.parameters.items()},
                                             self._constants)
                           for j in range(len(stack.members))]
        return stack.views

    def _module_over(self, parameters: Mapping[str, torch.Tensor],
                     constants: Mapping[str, torch.Tensor]) -> nn.Module:
        """A copy of the model whose parameters and buffers alias the given tensors."""
        memo: dict[int, Any] = {}
        for name, p in self._skeleton.named_parameters():
            tensor = parameters[name] if name in parameters else constants[name]
            memo[id(p)] = nn.Parameter(tensor, requires_grad=p.requires_grad)
        for name, b in self._skeleton.named_buffers():
            memo[id(b)] = constants[name]
        with torch.no_grad():
            return copy.deepcopy(self._skeleton, memo)

    # -- falling back to per-shadow stepping ----------------------------------------------------
    def _fall_back(self, reason: str) -> None:
        """Move every run into its own module and optimizer and step them one by one from now."""
        warnings.warn(f"batched shadows: stepping shadows one by one instead, because {reason}",
                      EngineFallbackWarning, stacklevel=4)
        inner = PerShadowEngine(self.main_model, self.main_optimizer, self.loss_of,
                                self.before_step)
        inner.gradient_sync = self.gradient_sync
        # Before any batched step the reference equals the main run exactly: drop it.
        keep_reference = self.reference.forked and self._batched_steps > 0
        members = [*self.shadows, *([self.reference] if keep_reference else [])]
        states = {id(m): self._state_of(m) for m in members if m.forked and self._has_state(m)}
        self._stack = None
        for member in members:
            self._adopt(inner, member)
            if id(member) in states:
                self._load_into_module(member, states[id(member)], self._constants)
        inner.shadows = list(self.shadows)
        if not keep_reference:
            self.reference.forked = False
        self._fallback = inner
        self.fallback_reason = reason
        self.name = "per_shadow"

    def _adopt(self, inner: PerShadowEngine, member: Shadow) -> None:
        made = inner.add_shadow(member.spec, member.row, member.label)
        inner.shadows.remove(made)
        member.model, member.optimizer = made.model, made.optimizer

    def _load_into_module(self, member: Shadow, state: SlotState,
                          constants: Mapping[str, torch.Tensor]) -> None:
        named = {**dict(member.model.named_parameters()), **dict(member.model.named_buffers())}
        with torch.no_grad():
            for name, value in state.parameters.items():
                named[name].copy_(value)
            for name, value in constants.items():
                named[name].copy_(value)
        saved = member.optimizer.state_dict()
        flat = [name for names in self._group_names for name in names]
        saved["state"] = {k: {key: _clone(v) for key, v in state.optimizer[name].items()}
                          for k, name in enumerate(flat) if name in state.optimizer}
        member.optimizer.load_state_dict(saved)

    def _fallback_fork(self, shadow: Shadow, step: int,
                       buffers: Mapping[str, torch.Tensor] | None) -> None:
        assert self._fallback is not None
        if shadow.spec.origin == "self":
            self._fork_twin(shadow, step, buffers)
        if not self.reference.forked:
            self._fallback.fork(shadow, step, buffers)
            return
        self._load_into_module(shadow, self._state_of(self.reference),
                               self._constants_of(self.reference))
        shadow.forked = True
        shadow.forked_at = step

    def _fallback_step(self, shadows: Sequence[Shadow], group: StepGroup, step: int
                       ) -> list[Shadow]:
        assert self._fallback is not None
        self._fallback.gradient_sync = self.gradient_sync
        runs = [*([self.reference] if self.reference.forked else []), *shadows]
        faulted = self._fallback.step(runs, group, step)
        return [s for s in faulted if s is not self.reference]


def _reason(error: BaseException) -> str:
    text = str(error).strip().splitlines()
    first = text[0] if text else ""
    if isinstance(error, _CannotBatch):
        return first
    return f"vmap cannot run this model or loss ({type(error).__name__}: {first[:160]})"


def _stacked_leaves(batch: Any, count: int, hits: Mapping[int, Any]
                    ) -> tuple[list[torch.Tensor], list[int | None], Callable[[list[Any]], Any]]:
    """The batch's tensor leaves for vmap over ``count`` slots, where ``hits`` holds the
    substituted batches of the slots whose example is in this batch: a leaf some hit changes is
    stacked (dim 0), any other is the main batch's own tensor, unbatched. Also returns a function
    rebuilding a batch from the leaves."""
    leaves, spec = tree_flatten(batch)
    columns = {}
    for j, other in hits.items():
        other_leaves, other_spec = tree_flatten(other)
        if other_spec != spec:
            raise _CannotBatch("a substituted batch does not have the batch's structure")
        columns[j] = other_leaves
    tensors: list[torch.Tensor] = []
    dims: list[int | None] = []
    positions: list[int] = []
    for i, leaf in enumerate(leaves):
        changed = {j: c[i] for j, c in columns.items() if c[i] is not leaf}
        if not changed:
            if isinstance(leaf, torch.Tensor):
                tensors.append(leaf)
                dims.append(None)
                positions.append(i)
        elif isinstance(leaf, torch.Tensor) and all(isinstance(v, torch.Tensor)
                                                     for v in changed.values()):
            tensors.append(torch.stack([changed.get(j, leaf) for j in range(count)]))
            dims.append(0)
            positions.append(i)
        elif not all(_same(value, leaf) for value in changed.values()):
            raise _CannotBatch("the batch holds non-tensor values that differ between shadows")

    def rebuild(values: list[Any]) -> Any:
        items = list(leaves)
        for position, value in zip(positions, values):
            items[position] = value
        return tree_unflatten(items, spec)

    return tensors, dims, rebuild


def _state_from_module(model: nn.Module, optimizer: torch.optim.Optimizer,
                       stepped: Sequence[str]) -> SlotState:
    named = dict(model.named_parameters())
    parameters = {name: named[name].detach().clone() for name in stepped}
    state = {}
    for name in stepped:
        entry = optimizer.state.get(named[name])
        if entry:
            state[name] = {key: _clone(v) for key, v in entry.items()}
    return SlotState(parameters, state)
