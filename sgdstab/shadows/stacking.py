"""Runs held as stacked tensors: one run's state, the stack of runs, and pure helpers over them
(the model's layout, restacking, modules over a run's tensors, a batch's leaves stacked per slot).

Slot ``j`` of every stacked tensor (trainable parameters and per-element optimizer state) belongs
to one run, as ``torch.func.stack_module_state`` lays them out. Nothing here steps a run
(``stackstep`` does); which runs are stacked, and when, is the batched engine's business.
"""

from __future__ import annotations

import copy
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import torch
from torch import nn
from torch.utils._pytree import tree_flatten, tree_unflatten

from .lockstep import LockstepError

if TYPE_CHECKING:
    from .batched import BatchedShadow

__all__ = ["SHARED_STATE_KEYS", "SlotState", "after_each_run", "why_not_batched"]

# State entries that are one value for the whole tensor (step counters and the like); they are
# shared by all slots, which is right because every slot descends from the same reference run.
SHARED_STATE_KEYS = frozenset({"step", "eta", "mu", "mu_product"})


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


class _Stack:
    """The runs stepped together: slot ``j`` of every stacked tensor belongs to ``members[j]``."""

    def __init__(self, members: list[BatchedShadow], parameters: dict[str, torch.Tensor],
                 optimizer: torch.optim.Optimizer) -> None:
        self.members = members
        self.slot = {id(m): j for j, m in enumerate(members)}
        self.parameters = parameters
        self.optimizer = optimizer
        self.views: list[nn.Module] | None = None
        # optimizers of the stack's class over slots [start, stop) (views), by (start, stop)
        self.chunks: dict[tuple[int, int], tuple[torch.optim.Optimizer,
                                                 dict[str, torch.Tensor]]] = {}
        # the tensors with room for ``capacity`` slots that ``parameters`` and the per-element
        # optimizer state are the first len(members) slots of, by name and (name, state key)
        self.buffers: dict[Any, torch.Tensor] = {}

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

    def finite_slots(self) -> list[bool]:
        """Whether each slot's parameters are all finite: one sum per stacked tensor decides it
        for every slot (an entry that is NaN or infinite makes its slot's sum so); only a slot
        whose sum is not finite is looked at entry by entry (finite entries can overflow a
        sum)."""
        slots = len(self.members)
        finite = [True] * slots
        with torch.no_grad():
            for stacked in self.parameters.values():
                sums = stacked.detach().reshape(slots, -1).sum(1)
                for j in torch.nonzero(~torch.isfinite(sums)).flatten().tolist():
                    finite[j] = finite[j] and bool(torch.isfinite(stacked[j]).all())
        return finite

    def modules(self, skeleton: nn.Module, constants: Mapping[str, torch.Tensor]
                ) -> list[nn.Module]:
        """A module over each slot, aliasing the stack's tensors (built once per stack)."""
        if self.views is None:
            self.views = [_module_over(skeleton, {n: t[j] for n, t in self.parameters.items()},
                                       constants)
                          for j in range(len(self.members))]
        return self.views


def _layout(model: nn.Module, optimizer: torch.optim.Optimizer
            ) -> tuple[list[list[str]], list[str], dict[str, torch.Size], list[str]]:
    """Parameter names by optimizer group, the names a run steps (trainable and in the optimizer),
    every parameter's shape, and the constants: parameters outside the optimizer (or frozen) and
    buffers, one copy shared by all slots."""
    names = {id(p): name for name, p in model.named_parameters()}
    group_names: list[list[str]] = []
    for group in optimizer.param_groups:
        try:
            group_names.append([names[id(p)] for p in group["params"]])
        except KeyError:
            raise LockstepError("the optimizer holds parameters that are not the model's: "
                                "pass the optimizer built over model.parameters()") from None
    in_optimizer = {name for group in group_names for name in group}
    stepped = [name for name, p in model.named_parameters()
               if p.requires_grad and name in in_optimizer]
    shapes = {name: p.shape for name, p in model.named_parameters()}
    constant_names = [name for name, _ in model.named_parameters() if name not in stepped]
    constant_names += [name for name, _ in model.named_buffers()]
    return group_names, stepped, shapes, constant_names


def _into_buffer(values: Sequence[torch.Tensor], capacity: int) -> torch.Tensor:
    """``torch.stack(values)`` as the first slots of a tensor with room for ``capacity``."""
    buffer = torch.empty((max(capacity, len(values)), *values[0].shape), dtype=values[0].dtype)
    for j, value in enumerate(values):
        buffer[j].copy_(value)
    return buffer


def _stack_states(members: list[BatchedShadow], states: Sequence[SlotState],
                  stepped: Sequence[str], shapes: Mapping[str, torch.Size],
                  group_names: Sequence[Sequence[str]], main_optimizer: torch.optim.Optimizer,
                  release: Callable[[str, str | None], None] | None = None,
                  capacity: int = 0) -> _Stack:
    """A stack of ``states`` (one per member, in order): the ``stepped`` parameters stacked,
    under a new optimizer of the main one's class and groups with their state stacked alike
    (per-element entries stacked, shared ones checked equal and kept once). ``release(name,
    key)`` is called once ``name``'s parameter (key None) or its state entry ``key`` is stacked
    (everything is checked before the first call), so the caller can free what the states held
    of it before the next tensor is stacked."""
    kinds = {}
    for name in stepped:
        keys = [tuple(s.optimizer.get(name, {})) for s in states]
        if len(set(keys)) > 1:
            raise LockstepError(f"optimizer state of {name} differs in kind between runs")
        kinds[name] = keys[0]
        for key in keys[0]:
            values = [s.optimizer[name][key] for s in states]
            if not _per_element(key, values[0], shapes[name]) and \
                    not all(_same(values[0], v) for v in values[1:]):
                raise LockstepError(f"optimizer state {key!r} of {name} differs between "
                                    "runs that should share it")
    parameters = {}
    buffers: dict[Any, torch.Tensor] = {}
    count = len(states)
    entries: dict[str, dict[str, Any]] = {}
    for name in stepped:
        buffers[name] = _into_buffer([s.parameters[name] for s in states], capacity)
        parameters[name] = buffers[name][:count]
        if release is not None:
            release(name, None)
        entry = {}
        for key in kinds[name]:
            values = [s.optimizer[name][key] for s in states]
            if _per_element(key, values[0], shapes[name]):
                buffers[(name, key)] = _into_buffer(values, capacity)
                entry[key] = buffers[(name, key)][:count]
            else:
                entry[key] = _clone(values[0])
            del values
            if release is not None:
                release(name, key)
        entries[name] = entry
    groups = []
    for main_group, names in zip(main_optimizer.param_groups, group_names):
        settings = {key: value for key, value in main_group.items() if key != "params"}
        groups.append({**settings, "params": [parameters[n] for n in names if n in parameters]})
    optimizer = type(main_optimizer)(groups)  # type: ignore[call-arg]  # groups carry defaults
    for name, entry in entries.items():
        if entry:
            optimizer.state[parameters[name]] = entry
    stack = _Stack(list(members), parameters, optimizer)
    stack.buffers = buffers
    return stack


def _move_slots(buffer: torch.Tensor, moves: Mapping[int, int]) -> None:
    """Slot ``d`` of ``buffer`` takes what slot ``moves[d]`` holds, for every ``d`` at once (the
    sources are distinct), in place: a slot is overwritten only after it was read, and a cycle of
    moves sets one slot aside (one slot's copy)."""
    pending = dict(moves)
    readers = {source: dest for dest, source in pending.items()}
    aside: dict[int, torch.Tensor] = {}
    while pending:
        free = next((d for d in pending if d not in readers), None)
        if free is None:   # only cycles are left: keep one slot aside, then it is free
            free = next(iter(pending))
            aside[free] = buffer[free].clone()
            readers.pop(free)
            continue
        source = pending.pop(free)
        buffer[free].copy_(aside.pop(source) if source in aside else buffer[source])
        if readers.get(source) == free:
            readers.pop(source)


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


def _load_into(model: nn.Module, optimizer: torch.optim.Optimizer, state: SlotState,
               constants: Mapping[str, torch.Tensor], group_names: Sequence[Sequence[str]]
               ) -> None:
    """Copy ``state`` and ``constants`` into a run's own module and optimizer, whose groups hold
    the parameters named in ``group_names``."""
    named = {**dict(model.named_parameters()), **dict(model.named_buffers())}
    with torch.no_grad():
        for name, value in state.parameters.items():
            named[name].copy_(value)
        for name, value in constants.items():
            named[name].copy_(value)
    saved = optimizer.state_dict()
    flat_names = [name for names in group_names for name in names]
    saved["state"] = {k: {key: _clone(v) for key, v in state.optimizer[name].items()}
                      for k, name in enumerate(flat_names) if name in state.optimizer}
    optimizer.load_state_dict(saved)


def _module_over(skeleton: nn.Module, parameters: Mapping[str, torch.Tensor],
                 constants: Mapping[str, torch.Tensor]) -> nn.Module:
    """A copy of ``skeleton`` whose parameters and buffers alias the given tensors."""
    memo: dict[int, Any] = {}
    for name, p in skeleton.named_parameters():
        tensor = parameters[name] if name in parameters else constants[name]
        memo[id(p)] = nn.Parameter(tensor, requires_grad=p.requires_grad)
    for name, b in skeleton.named_buffers():
        memo[id(b)] = constants[name]
    with torch.no_grad():
        return copy.deepcopy(skeleton, memo)


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


def _summed(total: dict[str, torch.Tensor] | None, gradients: dict[str, torch.Tensor]
            ) -> dict[str, torch.Tensor]:
    """The running sum of per-batch stacked gradients (gradient accumulation): ``gradients``
    itself for the first batch, then added into ``total`` in place."""
    if total is None:
        return gradients
    for name in total:
        total[name] += gradients[name]
    return total


def after_each_run(stack: _Stack, views: Sequence[nn.Module],
                   after_step: Callable[[nn.Module], Any]) -> None:
    """The user's ``after_step`` (a change of the parameters after the optimizer step, such as a
    projection) on the module over each run of ``stack`` that was stepped and not frozen: it
    changes the slot's tensors in place. One that replaces a parameter could not reach the stack,
    and is refused."""
    with torch.no_grad():
        for member, view in zip(stack.members, views):
            if member.fault is not None:   # frozen, at this step or before
                continue
            before = [(p, p.data_ptr()) for p in view.parameters()]
            after_step(view)
            if any(p is not q or p.data_ptr() != ptr
                   for (q, ptr), p in zip(before, view.parameters())):
                raise LockstepError("after_step replaced a parameter tensor; it must change the "
                                    "parameters in place (p.clamp_(...), p.mul_(...))")


def why_not_batched(error: BaseException) -> str:
    """The reason a batched step failed, as the fallback warning says it."""
    text = str(error).strip().splitlines()
    first = text[0] if text else ""
    if isinstance(error, _CannotBatch):
        return first
    return f"vmap cannot run this model or loss ({type(error).__name__}: {first[:160]})"
