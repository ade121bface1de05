"""Restacking the batched engine's runs after forks, faults or removals (``BatchedEngine``'s
``_restack`` and ``_restack_in_place``): in place within the stacked tensors where they have room,
otherwise afresh without ever holding two whole stacks."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import torch

from .stacking import _move_slots, _same, _Stack, _stack_states

if TYPE_CHECKING:
    from .batched import BatchedEngine, BatchedShadow

__all__ = ["restack", "restack_in_place"]


def restack(engine: BatchedEngine, members: list[BatchedShadow]) -> None:
    """Stack ``members`` afresh (after forks, faults or removals). No per-run copies are
    made on the way, and each of the old stack's tensors is let go as soon as its successor
    is built, so the peak is the old stack plus one parameter's new tensors, not two whole
    stacks."""
    old = engine._stack
    if old is not None and engine._restack_in_place(old, members):
        return
    states = [old.slice(old.slot[id(m)], copy=False) if old is not None and id(m) in old.slot
              else m.state if m.state is not None else engine._state_of(m) for m in members]
    borrowed = [s for m, s in zip(members, states) if old is not None and id(m) in old.slot]

    pending: dict[str, dict[str, Any]] = {}   # old state entries whose tensor is let go

    def release(name: str, key: str | None) -> None:
        if old is None:
            return
        if key is None:
            for state in borrowed:   # views into the old stack, made above for this only
                state.parameters.pop(name, None)
            tensor = old.parameters.pop(name)
            pending[name] = old.optimizer.state.pop(tensor, {})
            for group in old.optimizer.param_groups:
                group["params"] = [p for p in group["params"] if p is not tensor]
            return
        for state in borrowed:
            state.optimizer.get(name, {}).pop(key, None)
        pending[name].pop(key, None)

    if old is not None:
        old.views = None   # modules over the old slots alias its tensors
        old.chunks.clear()   # so do the optimizers over runs of its slots
    # room for every run the engine holds (the reference and each shadow), so that later
    # forks and removals move slots in place (``_restack_in_place``)
    stack = _stack_states(members, states, engine._stepped, engine._shapes, engine._group_names,
                          engine.main_optimizer, release, capacity=len(engine.shadows) + 1)
    for member in members:
        member.state = None
    del states
    engine._stack = stack


def restack_in_place(engine: BatchedEngine, old: _Stack, members: list[BatchedShadow]
                     ) -> bool:
    """Restack within the old stack's tensors, which have room for ``members``: the kept
    runs' slots move in place, a newly forked run's state is copied into its slot, so no
    second stacked tensor is ever built (building one beside the old one was the peak of
    epoch 1 while the shadows fork). False, with nothing changed, when the old stack's
    tensors cannot take ``members`` (too few slots, state the buffers do not hold, or a new
    run's optimizer state of another kind); ``_restack`` then builds new tensors."""
    count = len(members)
    sources = [old.slot.get(id(m)) for m in members]
    entries = {name: old.optimizer.state.get(t, {}) for name, t in old.parameters.items()}
    buffered: list[tuple[Any, torch.Tensor]] = []
    for name, stacked in old.parameters.items():
        buffer = old.buffers.get(name)
        if buffer is None or buffer.shape[0] < count or \
                buffer.data_ptr() != stacked.data_ptr():
            return False
        buffered.append((name, buffer))
        for key, value in entries[name].items():
            if isinstance(value, torch.Tensor) and value.shape == stacked.shape:
                buffer = old.buffers.get((name, key))
                if buffer is None or buffer.data_ptr() != value.data_ptr():
                    return False
                buffered.append(((name, key), buffer))
    incoming = {}
    for j, (member, source) in enumerate(zip(members, sources)):
        if source is not None:
            continue
        state = member.state if member.state is not None else engine._state_of(member)
        for name, entry in entries.items():
            own = state.optimizer.get(name, {})
            if tuple(own) != tuple(entry) or not all(
                    (name, key) in old.buffers if isinstance(value, torch.Tensor) and
                    value.shape == old.parameters[name].shape else _same(own[key], value)
                    for key, value in entry.items()):
                return False
        incoming[j] = state
    moves = {j: source for j, source in enumerate(sources)
             if source is not None and source != j}
    old.views = None
    old.chunks.clear()
    for key, buffer in buffered:
        _move_slots(buffer, moves)
        for j, state in incoming.items():
            value = state.parameters[key] if isinstance(key, str) else \
                state.optimizer[key[0]][key[1]]
            buffer[j].copy_(value)
    parameters = {name: old.buffers[name][:count] for name in old.parameters}
    groups = []
    for main_group, names in zip(engine.main_optimizer.param_groups, engine._group_names):
        settings = {key: value for key, value in main_group.items() if key != "params"}
        groups.append({**settings,
                       "params": [parameters[n] for n in names if n in parameters]})
    optimizer = type(engine.main_optimizer)(groups)  # type: ignore[call-arg]
    for name, entry in entries.items():
        if entry:
            optimizer.state[parameters[name]] = {
                key: old.buffers[(name, key)][:count] if (name, key) in old.buffers
                and isinstance(value, torch.Tensor) and
                value.shape == old.parameters[name].shape else value
                for key, value in entry.items()}
    stack = _Stack(list(members), parameters, optimizer)
    stack.buffers = old.buffers
    old.parameters, old.buffers = {}, {}
    old.optimizer.state.clear()
    for member in members:
        member.state = None
    engine._stack = stack
    return True
