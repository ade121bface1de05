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
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn

from .parameters import parameters_finite, squared_distance, trainable_parameters
from .rng import HostRngGuard, preserved_rng

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

# Optimizers (exact classes) whose foreach step over many runs' parameters at once was checked to
# give every parameter the very bits that stepping each run with its own optimizer gives, with
# either kernel path (tests/test_grouped_step.py steps both side by side over several steps). On CPU
# torch's foreach ops loop over the tensors with the same per-tensor kernels.
# NAdam, RAdam and ASGD are left out: their foreach steps differed in the last bits (2.6e-7,
# 7.5e-9 and 1.5e-7 after six steps of a small CNN, torch 2.13 CPU).
GROUPED_OPTIMIZERS: tuple[type[torch.optim.Optimizer], ...] = (
    torch.optim.SGD, torch.optim.Adam, torch.optim.AdamW, torch.optim.RMSprop,
    torch.optim.Adagrad, torch.optim.Adamax, torch.optim.Adadelta, torch.optim.Rprop,
)

# The per-shadow engine steps shadows together only while their gradients, all alive at once
# until the one step, stay within this many bytes: the saving is Python and call overhead per
# optimizer call, which matters for small models only.
GROUPED_STEP_BYTES = 4 << 20


class LockstepError(ValueError):
    """An input the lockstep engine cannot follow exactly (a clear refusal, never a guess)."""


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


def batch_length(batch: Any) -> int | None:
    """The number of rows of a collated batch (dim 0 of its first tensor), or None."""
    if isinstance(batch, torch.Tensor):
        return int(batch.shape[0]) if batch.dim() > 0 else None
    if isinstance(batch, Mapping):
        for value in batch.values():
            length = batch_length(value)
            if length is not None:
                return length
        return None
    if isinstance(batch, (list, tuple)):
        for value in batch:
            length = batch_length(value)
            if length is not None:
                return length
        return None
    return None


def _is_leaf_list(value: Any) -> bool:
    """A list or tuple of plain values (e.g. collated strings), one per row."""
    return isinstance(value, (list, tuple)) and all(
        not isinstance(item, (torch.Tensor, Mapping, list, tuple)) for item in value
    )


def substitute_rows(batch: Any, row: Any, positions: Sequence[int], rows: int, path: str = "batch"
                    ) -> Any:
    """Return ``batch`` with rows ``positions`` replaced by row 0 of the one-row batch ``row``.

    Only the leaves that change are copied (cloned); everything else is shared with ``batch``.
    ``rows`` is the batch's number of rows. Structures that do not line up raise LockstepError.
    """
    if isinstance(batch, torch.Tensor):
        if not isinstance(row, torch.Tensor):
            raise LockstepError(f"{path}: the batch holds a tensor but the replacement holds "
                                f"{type(row).__name__}")
        if batch.dim() == 0 or batch.shape[0] != rows:
            raise LockstepError(f"{path}: tensor of shape {tuple(batch.shape)} has no row "
                                f"dimension of size {rows}; cannot substitute a row")
        if row.dim() == 0 or row.shape[0] != 1 or row.shape[1:] != batch.shape[1:]:
            raise LockstepError(f"{path}: replacement row of shape {tuple(row.shape)} does not fit "
                                f"batch rows of shape {tuple(batch.shape[1:])}")
        out = batch.clone()
        replacement = row[0].to(dtype=batch.dtype, device=batch.device)
        for position in positions:
            out[position] = replacement
        return out
    if isinstance(batch, Mapping):
        if not isinstance(row, Mapping) or set(row.keys()) != set(batch.keys()):
            raise LockstepError(f"{path}: replacement keys do not match the batch keys "
                                f"{sorted(map(str, batch.keys()))}")
        changed = {key: substitute_rows(value, row[key], positions, rows, f"{path}[{key!r}]")
                   for key, value in batch.items()}
        try:
            return type(batch)(changed)  # type: ignore[call-arg]  # dict-like classes take a dict
        except TypeError:
            return changed
    if isinstance(batch, (list, tuple)):
        if _is_leaf_list(batch) and len(batch) == rows and isinstance(row, (list, tuple)) \
                and len(row) == 1 and _is_leaf_list(row):
            out_list = list(batch)
            for position in positions:
                out_list[position] = row[0]
            return type(batch)(out_list) if isinstance(batch, tuple) else out_list
        if not isinstance(row, (list, tuple)) or len(row) != len(batch):
            raise LockstepError(f"{path}: replacement structure (length "
                                f"{len(row) if isinstance(row, (list, tuple)) else 'n/a'}) does "
                                f"not match the batch (length {len(batch)})")
        items = [substitute_rows(value, other, positions, rows, f"{path}[{number}]")
                 for number, (value, other) in enumerate(zip(batch, row))]
        if isinstance(batch, tuple):
            if hasattr(batch, "_fields"):  # namedtuple
                return type(batch)(*items)
            return tuple(items)
        return items
    # A plain value shared by the whole batch (e.g. a flag): it must agree with the replacement.
    if batch != row:
        raise LockstepError(f"{path}: non-tensor value {batch!r} differs from the replacement's "
                            f"{row!r} and is not one value per row")
    return batch


def select_rows(batch: Any, rows: slice | Sequence[int], length: int) -> Any:
    """The sub-batch of ``rows`` (a slice or index list) of a collated batch of ``length`` rows."""
    if isinstance(batch, torch.Tensor):
        if batch.dim() > 0 and batch.shape[0] == length:
            return batch[rows] if isinstance(rows, slice) else batch[list(rows)]
        return batch
    if isinstance(batch, Mapping):
        return {key: select_rows(value, rows, length) for key, value in batch.items()}
    if isinstance(batch, (list, tuple)):
        if _is_leaf_list(batch) and len(batch) == length:
            picked = batch[rows] if isinstance(rows, slice) else [batch[i] for i in rows]
            return type(batch)(picked) if isinstance(batch, tuple) else list(picked)
        items = [select_rows(value, rows, length) for value in batch]
        if isinstance(batch, tuple):
            return type(batch)(*items) if hasattr(batch, "_fields") else tuple(items)
        return items
    return batch


@dataclass
class StepGroup:
    """What the main run did between two optimizer steps: one or more yielded batches."""

    batches: list[Any]
    indices: list[np.ndarray]
    rng_states: list[torch.Tensor]
    buffers: dict[str, torch.Tensor] | None = None  # main buffers before the group's first forward

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


class _OwnersState(dict):  # type: ignore[type-arg]
    """A grouped optimizer's state: each parameter's entry is the one its shadow's own optimizer
    holds (looked up at every access, so forks and checkpoint loads that replace a shadow
    optimizer's state are followed)."""

    def __init__(self, owners: dict[int, torch.optim.Optimizer]) -> None:
        super().__init__()
        self.owners = owners

    def __getitem__(self, p: Any) -> Any:
        return self.owners[id(p)].state[p]

    def get(self, p: Any, default: Any = None) -> Any:
        state = self.owners[id(p)].state
        return state[p] if p in state else default

    def __contains__(self, p: object) -> bool:
        owner = self.owners.get(id(p))
        return owner is not None and p in owner.state


def _plain_setting(value: Any) -> bool:
    if value is None or isinstance(value, (bool, int, float, str)):
        return True
    return isinstance(value, tuple) and all(isinstance(v, (int, float)) for v in value)


def grouped_step_refusal(model: nn.Module, optimizer: torch.optim.Optimizer) -> str:
    """Why the per-shadow engine must call each shadow's optimizer on its own ('' when one
    foreach step of the optimizer's class over all shadows' parameters gives the same bits)."""
    if type(optimizer) not in GROUPED_OPTIMIZERS:
        return f"{type(optimizer).__name__} is not checked for grouped stepping"
    for group in optimizer.param_groups:
        for key in ("fused", "differentiable", "capturable"):
            if group.get(key):
                return f"the optimizer is {key}"
        if not all(_plain_setting(v) for k, v in group.items() if k != "params"):
            return "a setting is not a plain number (a tensor step size?)"
    for module in model.modules():
        if isinstance(module, (nn.Embedding, nn.EmbeddingBag)) and module.sparse:
            return "an embedding has sparse gradients"
    return ""


def _optimizer_hooks(optimizer: torch.optim.Optimizer) -> bool:
    """Whether step hooks would run around ``optimizer.step()`` (its own or global ones)."""
    from torch.optim import optimizer as module

    return bool(getattr(module, "_global_optimizer_pre_hooks", True)) or \
        bool(getattr(module, "_global_optimizer_post_hooks", True)) or \
        bool(optimizer._optimizer_step_pre_hooks) or bool(optimizer._optimizer_step_post_hooks)


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
                for batch, indices, rng_state in zip(group.batches, group.indices,
                                                     group.rng_states):
                    if shadow.spec.index in indices:
                        positions = np.flatnonzero(indices == shadow.spec.index)
                        batch = substitute_rows(batch, shadow.row, positions.tolist(),
                                                len(indices))
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
