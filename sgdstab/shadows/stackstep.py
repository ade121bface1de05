"""One step of a stack of runs: per-slot gradients by vmap, per-slot hooks, one optimizer update.

The model runs as a function of each slot's parameters (``vmap`` over ``functional_call`` +
``grad``), each slot on its own substituted batch; the gradients then pass through the user's hooks
on a module over each slot and into one optimizer of the user's class over the stacked tensors
(exact for element-wise optimizers). Which runs are stacked is the batched engine's business.
"""

from __future__ import annotations

import functools
import weakref
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import torch
from torch import nn
from torch.func import functional_call, grad_and_value, vmap

from .lockstep import LossOf, StepGroup, substitute_rows
from .stacking import SlotState, _CannotBatch, _clone, _Stack, _stacked_leaves, _summed
from .stacksgd import stacked_sgd_step

# Above this relative gap between the reference slot's gradient and an unbatched gradient of the
# same parameters on the same batch and RNG state, the batched forward is not the main run's
# computation (a different dropout mask, say); rounding alone stays near 1e-6 in float32.
VERIFY_TOLERANCE = 1e-3

Views = Callable[[], list[nn.Module]]


class _LossModule(nn.Module):
    """Wraps the user's loss so ``functional_call`` can run it over substituted parameters."""

    def __init__(self, model: nn.Module, loss_of: LossOf) -> None:
        super().__init__()
        self.model = model
        self.loss_of = loss_of

    def forward(self, batch: Any) -> torch.Tensor:
        return self.loss_of(self.model, batch)


class _StackStepper:
    """Steps stacks of runs of the main model. ``skeleton`` is a copy of the model that
    ``functional_call`` runs over each slot's tensors; ``stepped`` names the stacked parameters.
    ``views`` arguments give a module over each slot (slot 0 is the reference run)."""

    def __init__(self, main_model: nn.Module, main_optimizer: torch.optim.Optimizer,
                 loss_of: LossOf, skeleton: nn.Module, stepped: Sequence[str]) -> None:
        self.main_optimizer = main_optimizer
        self.loss_of = loss_of
        self.skeleton = skeleton
        self.stepped = stepped
        self._main_modules = list(main_model.modules())
        # each model's module list, held weakly: a strong reference here kept every stack's
        # view modules, and with them the tensors of stacks long replaced, alive
        self._module_lists: weakref.WeakKeyDictionary[nn.Module, list[nn.Module]] = \
            weakref.WeakKeyDictionary()
        self._loss_module = _LossModule(skeleton, loss_of)
        self.verified = False
        self.updates = 0   # optimizer updates taken over a stack

    def sync_modes(self, modules: Sequence[nn.Module]) -> None:
        modes = [module.training for module in self._main_modules]
        for model in modules:
            for module, mode in zip(self._modules_of(model), modes):
                module.training = mode   # follow the user's train()/eval() choices per module

    def _modules_of(self, model: nn.Module) -> list[nn.Module]:
        found = self._module_lists.get(model)
        if found is None:   # without ``model`` itself, which would keep its own key alive
            found = self._module_lists[model] = list(model.modules())[1:]
        return [model, *found]

    def gradients(self, stack: _Stack, group: StepGroup, constants: Mapping[str, torch.Tensor],
                  views: Views) -> tuple[dict[str, torch.Tensor], torch.Tensor]:
        """Per-slot gradients summed over the group's batches, and which slots stayed finite."""
        self.sync_modes([self.skeleton])
        finite = torch.ones(len(stack.members), dtype=torch.bool)
        total: dict[str, torch.Tensor] | None = None
        fixed = {f"model.{k}": v for k, v in constants.items()}
        for number, (batch, indices, rng_state) in enumerate(
                zip(group.batches, group.indices, group.rng_states)):
            hits = {}
            for j, member in enumerate(stack.members):
                positions = group.positions(number, member.spec.index)
                if positions:
                    hits[j] = substitute_rows(batch, member.row, positions, len(indices))
            tensors, dims, rebuild = _stacked_leaves(batch, len(stack.members), hits)
            torch.set_rng_state(rng_state)
            with torch.enable_grad():
                loss = functools.partial(self._slot_loss, context=(rebuild, fixed))
                gradients, losses = vmap(grad_and_value(loss), in_dims=(0, dims),
                                         randomness="same")(stack.parameters, tensors)
            if not self.verified and number == 0:
                self._verify(views, batch, rng_state, gradients)
            finite &= torch.isfinite(losses.detach())
            total = _summed(total, gradients)
        assert total is not None
        return total, finite

    def _slot_loss(self, parameters: dict[str, torch.Tensor], leaves: list[torch.Tensor],
                   context: tuple[Callable[[list[Any]], Any], dict[str, torch.Tensor]]
                   ) -> torch.Tensor:
        """One slot's loss: the user's loss of the model over ``parameters`` on its batch."""
        rebuild, constants = context
        values = {f"model.{k}": v for k, v in parameters.items()}
        return functional_call(self._loss_module, {**values, **constants}, (rebuild(leaves),))

    def _verify(self, views: Views, batch: Any, rng_state: torch.Tensor,
                gradients: Mapping[str, torch.Tensor]) -> None:
        """Once: the reference slot's gradient must match an unbatched gradient of the same
        parameters on the same batch with the same RNG state (dropout masks included)."""
        module = views()[0]
        self.sync_modes([module])
        own = dict(module.named_parameters())
        torch.set_rng_state(rng_state)
        with torch.enable_grad():
            loss = self.loss_of(module, batch)
            plain = torch.autograd.grad(loss, [own[name] for name in self.stepped],
                                        allow_unused=True)
        gap = norm = 0.0
        for name, value in zip(self.stepped, plain):
            value = torch.zeros_like(own[name]) if value is None else value
            gap += float(((gradients[name][0].double() - value.double()) ** 2).sum())
            norm += float((value.double() ** 2).sum())
        relative = (gap ** 0.5) / max(norm ** 0.5, 1e-30)
        if relative > VERIFY_TOLERANCE and gap ** 0.5 > 1e-12:
            raise _CannotBatch(
                f"the batched forward does not reproduce the unbatched one (relative gradient "
                f"gap {relative:.1e}): random ops vmap draws differently (in-place dropout, "
                "bernoulli) or a model that is not a pure function of its parameters")
        self.verified = True

    def hooks(self, stack: _Stack, gradients: dict[str, torch.Tensor], finite: torch.Tensor,
              views: Views, gradient_sync: Callable[[nn.Module, bool], bool] | None,
              before_step: Callable[[nn.Module], Any] | None) -> torch.Tensor:
        """Run gradient_sync and before_step on a module over each slot, as the per-shadow
        engine does on each shadow; their in-place or replaced gradients go back into the stack."""
        if gradient_sync is None and before_step is None:
            return finite
        modules = views()
        self.sync_modes(modules)
        for j, view in enumerate(modules):
            own = dict(view.named_parameters())
            given = {}
            for name in self.stepped:
                given[name] = gradients[name][j]
                own[name].grad = given[name]
            ok = bool(finite[j])
            if gradient_sync is not None:
                ok = bool(gradient_sync(view, ok))
            if ok and before_step is not None:
                before_step(view)
            for name in self.stepped:
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

    def update(self, stack: _Stack, gradients: dict[str, torch.Tensor], finite: torch.Tensor
               ) -> dict[int, SlotState]:
        """The optimizer step over the stack, with the main optimizer's current settings.
        Returns the state before the step of each slot whose loss was not finite."""
        held = {} if bool(finite.all()) else \
            {j: stack.slice(j) for j in range(len(stack.members)) if not finite[j]}
        for name, stacked in stack.parameters.items():
            stacked.grad = gradients[name]
        for main_group, group in zip(self.main_optimizer.param_groups,
                                     stack.optimizer.param_groups):
            for key, value in main_group.items():
                if key != "params":
                    group[key] = value
            self._tune(group)
        if not stacked_sgd_step(stack.optimizer):
            stack.optimizer.step()
        for stacked in stack.parameters.values():
            stacked.grad = None
        self.updates += 1
        return held

    # -- a few slots at a time -----------------------------------------------------------------
    def step_in_chunks(self, stack: _Stack, group: StepGroup, views: Views
                       ) -> tuple[torch.Tensor, dict[int, SlotState]] | None:
        """Gradients and update of the stack a few slots at a time, or None when this stepper
        takes the whole stack at once (the vmap stepper always does). Returns which slots
        stayed finite and the state before the step of those that did not."""
        return None

    def update_slots(self, stack: _Stack, gradients: Mapping[str, torch.Tensor],
                     finite: torch.Tensor, start: int, stop: int,
                     pending: dict[tuple[str, str], Any]) -> dict[int, SlotState]:
        """The optimizer step over slots ``start`` to ``stop`` - 1 only: an optimizer of the
        stack's class whose parameters are those slots (views into the stack), with the stack's
        per-element state viewed the same way, so it updates the stack in place. Element-wise
        optimizers compute each element from that element alone, so each slot gets the values
        the whole-stack step gives it (tested bit for bit). ``gradients`` hold these slots only,
        ``finite`` every slot. State entries the step creates or that are shared by all slots
        (step counters) are collected in ``pending`` for ``finish_slots``. Returns the state
        before the step of each of these slots whose loss was not finite."""
        held = {j: stack.slice(j) for j in range(start, stop) if not finite[j]}
        optimizer, views = self._chunk_optimizer(stack, start, stop)
        for main_group, chunk_group in zip(self.main_optimizer.param_groups,
                                           optimizer.param_groups):
            for key, value in main_group.items():
                if key != "params":
                    chunk_group[key] = value
            self._tune(chunk_group)
        for name, stacked in stack.parameters.items():
            view = views[name]
            entry = stack.optimizer.state.get(stacked, {})
            optimizer.state[view] = {
                key: value[start:stop] if _spans_slots(value, stacked) else _clone(value)
                for key, value in entry.items()}
            view.grad = gradients[name]
        if not stacked_sgd_step(optimizer):
            optimizer.step()
        for name, stacked in stack.parameters.items():
            view = views[name]
            view.grad = None
            entry = stack.optimizer.state.get(stacked, {})
            for key, value in optimizer.state.pop(view, {}).items():
                if key in entry and _spans_slots(entry[key], stacked):
                    mine = entry[key][start:stop]
                    if not (isinstance(value, torch.Tensor) and
                            value.data_ptr() == mine.data_ptr()):
                        mine.copy_(value)   # replaced rather than updated in place
                elif isinstance(value, torch.Tensor) and value.shape == view.shape:
                    # new, per element: copied into its stacked tensor at once, so that no more
                    # than one chunk's piece is held beside it
                    if (name, key) not in pending:
                        pending[(name, key)] = torch.empty(stacked.shape, dtype=value.dtype)
                    pending[(name, key)][start:stop].copy_(value)
                else:
                    pending[(name, key)] = value   # shared by all slots: every chunk's agrees
        return held

    def finish_slots(self, stack: _Stack, pending: dict[tuple[str, str], Any]) -> None:
        """After every chunk's ``update_slots``: the new per-element state and the shared state
        go into the stack's optimizer, once."""
        for (name, key), value in pending.items():
            stacked = stack.parameters[name]
            entry = stack.optimizer.state[stacked]
            entry[key] = value
        pending.clear()
        self.updates += 1

    def _chunk_optimizer(self, stack: _Stack, start: int, stop: int
                         ) -> tuple[torch.optim.Optimizer, dict[str, torch.Tensor]]:
        found = stack.chunks.get((start, stop))
        if found is None:
            views = {name: t[start:stop] for name, t in stack.parameters.items()}
            name_of = {id(t): name for name, t in stack.parameters.items()}
            groups = [{**{k: v for k, v in g.items() if k != "params"},
                       "params": [views[name_of[id(p)]] for p in g["params"]]}
                      for g in stack.optimizer.param_groups]
            optimizer = type(stack.optimizer)(groups)  # type: ignore[call-arg]
            found = stack.chunks[(start, stop)] = (optimizer, views)
        return found

    def _tune(self, group: dict[str, Any]) -> None:
        """Adjust a stacked optimizer group's kernel choice after the settings are copied (the
        vmap engine keeps torch's own)."""


def _spans_slots(value: Any, stacked: torch.Tensor) -> bool:
    """Whether a stacked state entry holds one value per element of every slot."""
    return isinstance(value, torch.Tensor) and value.shape == stacked.shape
