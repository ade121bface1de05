"""The shadow engine: neighbour specs, row substitution in a batch, RNG replay (``rng``), lazy fork.

A *shadow* is a copy of the user's model trained on a neighbouring dataset: the training set with
one example swapped. It sees the very batches the main run saw, in the same order, with the swapped
example's row substituted, and it replays the torch RNG state captured when each batch was yielded,
so dropout masks and in-loop augmentation match the main run.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from torch import nn

from .errors import LockstepError
from .grouped import (
    GROUPED_OPTIMIZERS,
    GROUPED_STEP_BYTES,
    _optimizer_hooks,
    _OwnersState,
    _plain_setting,
    grouped_step_refusal,
)
from .parameters import parameters_finite, squared_distance, trainable_parameters
from .rng import HostRngGuard, preserved_rng
from .rows import batch_length, select_rows, substitute_rows

__all__ = [
    "NeighbourSpec",
    "LockstepError",
    "HostRngGuard",
    "preserved_rng",
    "substitute_rows",
    "select_rows",
    "batch_length",
    "Shadow",
    "PerShadowEngine",
    "StepGroup",
    "squared_distance",
    "parameters_finite",
    "trainable_parameters",
    "GROUPED_OPTIMIZERS",
    "GROUPED_STEP_BYTES",
    "grouped_step_refusal",
]

@dataclass(frozen=True)
class NeighbourSpec:
    """One neighbouring dataset: training example ``index`` replaced by ``replacement``.

    ``origin`` says where the replacement came from: ``"holdout"`` (drawn from the replacement set,
    index ``source_index``), ``"train"`` (another training example, a duplicate), ``"explicit"``
    (given by the user) or ``"self"`` (the null swap of the audit).
    """

    index: int
    replacement: Any
    origin: str
    source_index: int | None = None

    def describe(self) -> dict[str, Any]:
        return {"index": self.index, "origin": self.origin, "source_index": self.source_index}


@dataclass
class StepGroup:
    """What the main run did between two optimizer steps: one or more yielded batches."""

    batches: list[Any]
    indices: list[np.ndarray]
    rng_states: list[torch.Tensor]
    buffers: dict[str, torch.Tensor] | None = None  # main buffers before the group's first forward
    _drawn: list[set[int]] | None = field(default=None, repr=False, compare=False)

    def positions(self, number: int, index: int) -> list[int]:
        """Where training example ``index`` sits in batch ``number`` (mostly nowhere: one look-up
        in a set of the batch's indices, built once per batch, decides that; comparing against
        the index array for every shadow cost ~9 us a shadow right after the models' kernels)."""
        if self._drawn is None or len(self._drawn) != len(self.indices):
            self._drawn = [set(part.tolist()) for part in self.indices]
        if index not in self._drawn[number]:
            return []
        return np.flatnonzero(self.indices[number] == index).tolist()

    def all_indices(self) -> np.ndarray:
        if not self.indices:
            return np.zeros(0, dtype=np.int64)
        if len(self.indices) == 1:
            return self.indices[0]
        return np.concatenate(self.indices)


LossOf = Callable[[nn.Module, Any], torch.Tensor]


class Shadow:
    """One neighbouring run: its own model, optimizer and BatchNorm buffers."""

    def __init__(self, spec: NeighbourSpec, model: nn.Module, optimizer: torch.optim.Optimizer,
                 row: Any, label: str) -> None:
        self.spec = spec
        self.model = model
        self.optimizer = optimizer
        self.row = row              # the replacement collated as a one-row batch
        self.label = label
        self.forked = False
        self.forked_at: int | None = None
        self.fault: str | None = None   # set when the shadow hit NaN/inf and was frozen
        self.modes: list[bool] | None = None   # training flags last copied from the main model
        self._cached_for: Any = None
        self._modules: list[nn.Module] = []
        self._params: list[nn.Parameter] = []

    def _refresh(self) -> None:
        model = self.model
        if model is not self._cached_for:
            self._cached_for = model
            self._modules = list(model.modules()) if model is not None else []
            self._params = list(model.parameters()) if model is not None else []
            self.modes = None

    @property
    def modules(self) -> list[nn.Module]:
        """The shadow model's modules (cached while the model object stays the same)."""
        self._refresh()
        return self._modules

    @property
    def params(self) -> list[nn.Parameter]:
        """The shadow model's parameters (cached while the model object stays the same)."""
        self._refresh()
        return self._params

    @property
    def active(self) -> bool:
        return self.forked and self.fault is None


class PerShadowEngine:
    """Steps each shadow as its own module with its own optimizer (exact for any optimizer).

    For the optimizers in ``GROUPED_OPTIMIZERS``, small models' shadows are stepped by one call of
    the optimizer's foreach step over all their parameters (``grouped_steps``), which gives the
    same values as one call per shadow at a fraction of the Python.
    """

    name = "per_shadow"

    def __init__(self, main_model: nn.Module, main_optimizer: torch.optim.Optimizer,
                 loss_of: LossOf, before_step: Callable[[nn.Module], Any] | None) -> None:
        self.main_model = main_model
        self.main_optimizer = main_optimizer
        self.loss_of = loss_of
        self.before_step = before_step
        # Called as gradient_sync(shadow_model, finite) on each stepped shadow after its backward
        # passes and before before_step / its optimizer step; a data-parallel tracker sets it to
        # all-reduce the shadow's gradients. It is called even when this process's loss was not
        # finite (so every rank joins the same collectives) and returns whether all ranks' were.
        self.gradient_sync: Callable[[nn.Module, bool], bool] | None = None
        # Called as after_step(shadow_model) after each shadow's optimizer step, under no_grad:
        # the user's change of the parameters after their step (a projection), set by the tracker
        self.after_step: Callable[[nn.Module], Any] | None = None
        params = list(main_model.parameters())
        position = {id(p): k for k, p in enumerate(params)}
        self.group_positions: list[list[int]] = []
        for group in main_optimizer.param_groups:
            try:
                self.group_positions.append([position[id(p)] for p in group["params"]])
            except KeyError:
                raise LockstepError("the optimizer holds parameters that are not the model's: "
                                    "pass the optimizer built over model.parameters()") from None
        self.shadows: list[Shadow] = []
        self._main_modules = list(main_model.modules())
        self.grouped_steps = True   # False: always one optimizer call per shadow
        self.grouped_refusal = grouped_step_refusal(main_model, main_optimizer)
        trainable = {id(p): p for g in main_optimizer.param_groups for p in g["params"]}
        size = sum(p.numel() * p.element_size() for p in trainable.values())
        self.group_size = max(1, GROUPED_STEP_BYTES // max(1, size))
        self._grouped: dict[tuple[int, ...], tuple[list[torch.optim.Optimizer],
                                                   torch.optim.Optimizer]] = {}

    # -- construction ------------------------------------------------------------------------
    def _mirror_optimizer(self, model: nn.Module) -> torch.optim.Optimizer:
        params = list(model.parameters())
        groups = []
        for group, positions in zip(self.main_optimizer.param_groups, self.group_positions):
            settings = {key: value for key, value in group.items() if key != "params"}
            groups.append({**settings, "params": [params[k] for k in positions]})
        try:
            # every torch optimizer takes its parameter groups first; defaults come from them
            return type(self.main_optimizer)(groups)  # type: ignore[call-arg]
        except Exception as error:  # noqa: BLE001 - report the optimizer we cannot rebuild
            raise LockstepError(
                f"cannot mirror optimizer {type(self.main_optimizer).__name__} over a shadow's "
                f"parameters ({error}); use a torch.optim optimizer constructible from its "
                "parameter groups") from error

    def add_shadow(self, spec: NeighbourSpec, row: Any, label: str) -> Shadow:
        with torch.no_grad():
            model = copy.deepcopy(self.main_model)
        for p in model.parameters():
            p.grad = None
        shadow = Shadow(spec, model, self._mirror_optimizer(model), row, label)
        self.shadows.append(shadow)
        return shadow

    def module_of(self, shadow: Shadow) -> nn.Module:
        """A module holding the shadow's current parameters and buffers (for evaluation)."""
        return shadow.model

    def parameters_of(self, shadow: Shadow) -> dict[str, torch.Tensor]:
        """The shadow's trainable parameters by name, matching ``main_model.named_parameters()``."""
        return dict(shadow.model.named_parameters())

    def shadow_state(self, shadow: Shadow) -> dict[str, Any]:
        """Everything needed to restore ``shadow`` (parameters, buffers, optimizer state)."""
        return {"model": copy.deepcopy(shadow.model.state_dict()),
                "optimizer": copy.deepcopy(shadow.optimizer.state_dict()),
                "forked": shadow.forked, "forked_at": shadow.forked_at, "fault": shadow.fault}

    def load_shadow_state(self, shadow: Shadow, state: Mapping[str, Any]) -> None:
        shadow.model.load_state_dict(state["model"])
        shadow.optimizer.load_state_dict(copy.deepcopy(state["optimizer"]))
        shadow.forked = bool(state["forked"])
        shadow.forked_at = state["forked_at"]
        shadow.fault = state["fault"]

    def remove_shadow(self, shadow: Shadow) -> None:
        self.shadows.remove(shadow)
        # a cached grouped step over it would keep its parameters and optimizer state alive
        self._grouped = {key: entry for key, entry in self._grouped.items()
                         if all(o is not shadow.optimizer for o in entry[0])}

    # -- fork ---------------------------------------------------------------------------------
    def fork(self, shadow: Shadow, step: int, buffers: Mapping[str, torch.Tensor] | None) -> None:
        """Make ``shadow`` an exact copy of the main run as it stands before step ``step``."""
        with torch.no_grad():
            for mine, theirs in zip(shadow.model.parameters(), self.main_model.parameters()):
                mine.copy_(theirs)
            main_buffers = dict(self.main_model.named_buffers())
            for name, own in shadow.model.named_buffers():
                source = buffers[name] if buffers is not None and name in buffers else \
                    main_buffers[name]
                own.copy_(source)
        state = copy.deepcopy(self.main_optimizer.state_dict())
        shadow.optimizer.load_state_dict(state)
        shadow.forked = True
        shadow.forked_at = step

    # -- stepping -----------------------------------------------------------------------------
    def _hyperparameters(self) -> list[dict[str, Any]]:
        """The main optimizer's current settings per group (schedulers may have changed them)."""
        return [{key: value for key, value in group.items() if key != "params"}
                for group in self.main_optimizer.param_groups]

    @staticmethod
    def _sync_hyperparameters(shadow: Shadow, settings: list[dict[str, Any]]) -> None:
        for group, values in zip(shadow.optimizer.param_groups, settings):
            group.update(values)

    def _group_optimizer(self, ready: Sequence[Shadow]) -> torch.optim.Optimizer:
        """One optimizer of the main one's class over ``ready``'s parameters (foreach), whose
        state is each shadow optimizer's own; cached per set of shadow optimizers."""
        optimizers = [s.optimizer for s in ready]
        key = tuple(id(o) for o in optimizers)
        cached = self._grouped.get(key)
        if cached is not None and all(a is b for a, b in zip(cached[0], optimizers)):
            return cached[1]
        owners: dict[int, torch.optim.Optimizer] = {}
        groups = []
        for number, settings in enumerate(self._hyperparameters()):
            params = []
            for optimizer in optimizers:
                for p in optimizer.param_groups[number]["params"]:
                    owners[id(p)] = optimizer
                    params.append(p)
            groups.append({**settings, "foreach": True, "params": params})
        grouped = type(self.main_optimizer)(groups)  # type: ignore[call-arg]
        grouped.state = _OwnersState(owners)  # type: ignore[assignment]
        if len(self._grouped) >= 8:
            self._grouped.clear()
        self._grouped[key] = (optimizers, grouped)
        return grouped

    def _step_together(self, ready: Sequence[Shadow], settings: list[dict[str, Any]]) -> None:
        """One foreach optimizer step over the gradients ``ready``'s backward passes left."""
        if len(ready) == 1 or any(_optimizer_hooks(s.optimizer) for s in ready) or \
                not all(_plain_setting(values.get("lr")) for values in settings):
            for shadow in ready:
                shadow.optimizer.step()
        else:
            grouped = self._group_optimizer(ready)
            for values, target in zip(settings, grouped.param_groups):
                target.update(values)
                target["foreach"] = True
            grouped.step()
        for shadow in ready:
            for p in shadow.params:
                p.grad = None
            if self.after_step is not None:
                with torch.no_grad():
                    self.after_step(shadow.model)

    def step(self, shadows: Sequence[Shadow], group: StepGroup, step: int) -> list[Shadow]:
        """Take one optimizer step on each shadow, replaying the group's batches and RNG states.

        Returns the shadows that hit a non-finite loss or parameter at this step (now frozen).
        """
        faulted = []
        modes = [module.training for module in self._main_modules]
        settings = self._hyperparameters()
        together = 1 if not self.grouped_steps or self.grouped_refusal else self.group_size
        ready: list[Shadow] = []
        for shadow in shadows:
            if shadow.modes != modes:   # follow the user's train()/eval() choices per module
                for module, mode in zip(shadow.modules, modes):
                    module.training = mode
                shadow.modes = modes
            for p in shadow.params:
                p.grad = None
            finite = True
            with torch.enable_grad():
                for number, (batch, indices, rng_state) in enumerate(
                        zip(group.batches, group.indices, group.rng_states)):
                    positions = group.positions(number, shadow.spec.index)
                    if positions:
                        batch = substitute_rows(batch, shadow.row, positions, len(indices))
                    torch.set_rng_state(rng_state)
                    loss = self.loss_of(shadow.model, batch)
                    if not math.isfinite(float(loss.detach())):
                        finite = False
                        break
                    loss.backward()
            if self.gradient_sync is not None:
                finite = bool(self.gradient_sync(shadow.model, finite))
            if finite:
                if self.before_step is not None:
                    self.before_step(shadow.model)
                self._sync_hyperparameters(shadow, settings)
                ready.append(shadow)
                if len(ready) >= together:   # step now: only this many gradient sets alive
                    self._step_together(ready, settings)
                    ready = []
            if not finite:
                shadow.fault = f"non-finite loss at step {step}"
                faulted.append(shadow)
        if ready:
            self._step_together(ready, settings)
        return faulted

    def freeze_non_finite(self, shadows: Sequence[Shadow], steps: int) -> list[Shadow]:
        """Freeze the active shadows whose parameters are no longer finite; returns them.

        The per-step check is on the loss only (a scalar read, ~0.3 us, where checking every
        parameter cost ~20 us a step): parameters that turn non-finite with a finite loss show up
        as a non-finite loss one step later, or here, at the end of the epoch (``steps`` taken).
        """
        faulted = []
        for shadow in shadows:
            if shadow.active and not parameters_finite(shadow.params):
                shadow.fault = f"non-finite parameters found after step {steps - 1}"
                faulted.append(shadow)
        return faulted
