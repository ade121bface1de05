"""The stacked engine stepping a few slots at a time (bounded step memory) against the whole stack.

Reference: the same engine stepping every slot in one chunk. Each slot's products, loss and
element-wise update read only that slot's tensors, so chunking must not move a single bit:
parameters, optimizer state and every reading are compared with ``torch.equal`` / ``==``.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import StabilityTracker
from sgdstab.shadows import handstep as handstep_module
from sgdstab.shadows.batched import BatchedEngine
from sgdstab.shadows.lockstep import StepGroup
from sgdstab.shadows.stacked import StackedEngine
from sgdstab.shadows.stacking import _move_slots

from ._optimizers import _optimizer

WHOLE = 2**62   # a budget no test model reaches: one chunk


def _parcels(count: int = 96, features: int = 10, seed: int = 0) -> TensorDataset:
    """Generated sensor readings of parcels and their chute (invented scenario)."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, features, generator=g)
    y = (x[:, 0] + x[:, 1] * x[:, 2] > 0).long() + (x[:, 3] > 1).long()
    return TensorDataset(x, y)


def _run(budget: int, monkeypatch, *, optimizer: str = "momentum_decay", dropout: float = 0.2,
         loss=F.cross_entropy, epochs: int = 2, accumulate: bool = False, shadows: int = 5):
    monkeypatch.setattr(handstep_module, "STEP_MEMORY_BUDGET", budget)
    data = _parcels()
    torch.manual_seed(1)
    model = nn.Sequential(nn.Linear(10, 24), nn.ReLU(), nn.Dropout(dropout), nn.Linear(24, 16),
                          nn.Tanh(), nn.Linear(16, 3))
    torch.manual_seed(11)   # the dropout masks' stream
    opt = _optimizer(optimizer, model)
    tracker = StabilityTracker(model, opt, loss_fn=loss, train_set=data, engine="stacked",
                               shadows=shadows)
    batches = DataLoader(data, batch_size=16, shuffle=True,
                         generator=torch.Generator().manual_seed(3))
    readings, sizes = [], []
    for _ in range(epochs):
        for number, (x, y) in enumerate(tracker.batches(batches)):
            if not accumulate or number % 2 == 0:
                opt.zero_grad()
            loss(model(x), y).backward()
            if not accumulate or number % 2 == 1:
                opt.step()
            stack = tracker.engine._stack
            if stack is not None:
                sizes.append(len(stack.chunks))
        readings.append(tracker.finish_epoch())
    return model, tracker, readings, sizes


def _state(tracker) -> list[torch.Tensor]:
    """Every stacked parameter and optimizer-state tensor, and the reference's parameters."""
    engine = tracker.engine
    stack = engine._stack
    found = [t.clone() for t in stack.parameters.values()]
    for t in stack.parameters.values():
        for value in stack.optimizer.state.get(t, {}).values():
            if isinstance(value, torch.Tensor):
                found.append(value.clone())
    found += [t.clone() for t in engine.reference_parameters().values()]
    return found


_WHOLE_RUNS: dict[str, tuple] = {}


@pytest.mark.parametrize(("optimizer", "budget"), [
    ("momentum_decay", 1), ("momentum_decay", 40_000), ("nesterov", 1), ("dampening", 40_000),
    ("adam", 1), ("adamw", 40_000)])
def test_chunked_steps_are_bit_identical_to_the_whole_stack(optimizer, budget, monkeypatch):
    # budget 1: one slot per chunk; 40_000 bytes: three slots (see test_chunk_size_...)
    if optimizer not in _WHOLE_RUNS:
        _WHOLE_RUNS[optimizer] = _run(WHOLE, monkeypatch, optimizer=optimizer)
    whole_model, whole, expected, whole_sizes = _WHOLE_RUNS[optimizer]
    model, chunked, got, sizes = _run(budget, monkeypatch, optimizer=optimizer)
    assert isinstance(chunked.engine, StackedEngine) and chunked.engine.name == "stacked"
    assert max(whole_sizes) == 0            # the whole stack in one step: no chunk optimizers
    assert max(sizes) >= 2                  # and here it really was stepped in chunks
    assert chunked.engine._stepper.updates == whole.engine._stepper.updates > 0
    assert all(torch.equal(a, b) for a, b in zip(_state(whole), _state(chunked)))
    assert len(_state(whole)) == len(_state(chunked))
    for a, b in zip(expected, got):
        assert a.divergence == b.divergence
        assert a.audit_divergence == b.audit_divergence
    assert got[0].audit_divergence == 0.0
    assert all(d > 1e-4 for d in got[-1].divergence)   # the shadows did move apart
    assert all(torch.equal(p, q) for p, q in zip(whole_model.parameters(), model.parameters()))


def test_one_slot_chunks_and_gradient_accumulation(monkeypatch):
    # two batches per optimizer step: each chunk sums its own gradients over both batches
    _, whole, expected, _ = _run(WHOLE, monkeypatch, accumulate=True, optimizer="nesterov")
    _, chunked, got, sizes = _run(1, monkeypatch, accumulate=True, optimizer="nesterov")
    slots = len(chunked.engine._stack.members)
    assert max(sizes) == slots + 1          # epoch 1: reference, audit and 5 shadows, one each
    assert all(torch.equal(a, b) for a, b in zip(_state(whole), _state(chunked)))
    assert [r.divergence for r in expected] == [r.divergence for r in got]


def test_dropout_masks_stay_the_main_runs_in_chunks(monkeypatch):
    # null swaps in separate one-slot chunks read exactly 0: every chunk used the main run's
    # masks (a chunk drawing its own would move the null swaps off the reference)
    monkeypatch.setattr(handstep_module, "STEP_MEMORY_BUDGET", 1)
    data = _parcels()
    torch.manual_seed(1)
    model = nn.Sequential(nn.Linear(10, 24), nn.ReLU(), nn.Dropout(0.5), nn.Linear(24, 3))
    torch.manual_seed(11)
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               engine="stacked", swap=[(4, data[4]), (40, data[40])])
    batches = DataLoader(data, batch_size=16, shuffle=True,
                         generator=torch.Generator().manual_seed(3))
    for _ in range(2):
        for x, y in tracker.batches(batches):
            opt.zero_grad()
            F.cross_entropy(model(x), y).backward()
            opt.step()
        reading = tracker.finish_epoch()
        assert reading.divergence == (0.0, 0.0)
    assert len(tracker.engine._stack.chunks) == 3   # reference and the two null swaps
    assert tracker.engine.reference_follows_main() is True


def test_chunk_size_follows_the_budget(monkeypatch):
    _, tracker, _, _ = _run(WHOLE, monkeypatch, epochs=1)
    engine = tracker.engine
    stepper, stack = engine._stepper, engine._stack
    x, y = _parcels()[:16]
    group = StepGroup([(x, y)], [np.arange(16)], [torch.get_rng_state()], None)
    # per slot: gradients (24*10+24 + 16*24+16 + 3*16+3 = 715 floats) + 16 rows x (Linear outputs
    # 24+16+3, twice the widest 24, one Dropout at 24, the 10 inputs) = 16 x 125 floats
    per_slot = (715 + 16 * 125) * 4
    for budget, expected in [(1, 1), (per_slot - 1, 1), (per_slot, 1), (3 * per_slot, 3)]:
        monkeypatch.setattr(handstep_module, "STEP_MEMORY_BUDGET", budget)
        assert stepper.chunk_size(stack, group) == expected


@pytest.mark.parametrize("moves", [
    {},                                  # nothing moves
    {0: 1, 1: 2, 2: 0},                  # one cycle
    {1: 0, 2: 1, 3: 2},                  # a chain (slot 0 dropped, the rest compacted)
    {0: 3, 3: 0, 1: 4, 4: 5, 5: 1},      # a swap and a three-cycle
    {2: 5, 3: 6, 6: 2},                  # a chain ending in a cycle's slot, and a new slot 5
])
def test_slots_move_in_place_as_a_gather_would(moves):
    # reference: the same moves done by gathering from a copy of the untouched tensor
    buffer = torch.arange(7 * 3, dtype=torch.float32).reshape(7, 3)
    expected = buffer.clone()
    for dest, source in moves.items():
        expected[dest] = buffer[source]
    _move_slots(buffer, moves)
    assert torch.equal(buffer, expected)


def test_restacking_in_place_matches_building_new_stacks(monkeypatch):
    # the in-place restack (slots moved within tensors with room for every run) against the
    # path that builds new stacked tensors at every fork and removal: every bit the same
    original, taken = BatchedEngine._restack_in_place, []

    def counted(self, old, members):
        taken.append(original(self, old, members))
        return taken[-1]

    monkeypatch.setattr(BatchedEngine, "_restack_in_place", counted)
    _, in_place, expected, _ = _run(1, monkeypatch, optimizer="adam")
    assert taken.count(True) >= 2   # later forks and the audit's removal, in place
    monkeypatch.setattr(BatchedEngine, "_restack_in_place", lambda self, old, members: False)
    _, rebuilt, got, _ = _run(1, monkeypatch, optimizer="adam")
    assert all(torch.equal(a, b) for a, b in zip(_state(in_place), _state(rebuilt)))
    assert [r.divergence for r in expected] == [r.divergence for r in got]
    assert in_place.engine._stack.buffers["0.weight"].shape[0] == 7   # reference + 6 runs


def test_the_whole_stack_keeps_its_intermediates_only_for_one_batch_steps(monkeypatch):
    """The whole-stack step writes its products into tensors kept from step to step (the
    runs above compare it bit for bit with chunks, which make theirs afresh); with two
    batches per step their gradients are summed, so nothing is kept."""
    _, whole, _, _ = _run(WHOLE, monkeypatch, epochs=1)
    kept = whole.engine._stepper._workspace
    assert {kind for kind, _ in kept} == {"out", "drop", "weight", "input"}
    places = []
    for x, y in whole.batches(DataLoader(whole.train_set, batch_size=16)):   # epoch 2
        whole.optimizer.zero_grad()
        F.cross_entropy(whole.model(x), y).backward()
        whole.optimizer.step()
        places.append({key: t.data_ptr() for key, t in kept.items()})
    assert len(places) == 6 and all(p == places[0] for p in places)   # the same memory
    _, accumulated, _, _ = _run(WHOLE, monkeypatch, epochs=1, accumulate=True)
    assert accumulated.engine._stepper._workspace == {}



@pytest.mark.parametrize("clip", [False, True])
def test_replaced_stacks_are_freed(monkeypatch, clip):
    """A stack's modules over its slots (built to verify the first step, and at every step for
    before_step) die with the stack: the stepper's cache of each module's submodules once held
    them, and with them the tensors of every replaced stack (measured: 12.6 MB more at the peak
    of the 1024-wide benchmark). Every restack here builds new tensors, so forks replace it."""
    import gc
    import weakref

    from sgdstab.shadows.stacking import _Stack

    monkeypatch.setattr(BatchedEngine, "_restack_in_place", lambda self, old, members: False)
    built: list[tuple[weakref.ref, weakref.ref]] = []
    original = _Stack.modules

    def recorded(self, skeleton, constants):
        fresh = self.views is None
        views = original(self, skeleton, constants)
        if fresh:
            built.extend((weakref.ref(self), weakref.ref(view)) for view in views)
        return views

    monkeypatch.setattr(_Stack, "modules", recorded)
    data = _parcels()
    torch.manual_seed(1)
    model = nn.Sequential(nn.Linear(10, 24), nn.ReLU(), nn.Linear(24, 3))
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    clipped = (lambda m: nn.utils.clip_grad_norm_(m.parameters(), 1.0)) if clip else None
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               engine="stacked", shadows=4, before_step=clipped)
    for x, y in tracker.batches(DataLoader(data, batch_size=16, shuffle=True,
                                           generator=torch.Generator().manual_seed(3))):
        opt.zero_grad()
        F.cross_entropy(model(x), y).backward()
        if clipped is not None:
            clipped(model)
        opt.step()
    tracker.finish_epoch()
    assert tracker.engine.name == "stacked" and built
    if clip:   # views of every stack the forks made
        assert len({id(stack()) for stack, _ in built if stack() is not None} |
                   {id(s) for s, _ in built}) >= 3
    current = tracker.engine._stack
    gc.collect()
    alive = [stack() for stack, view in built if view() is not None]
    assert all(stack is current for stack in alive)
    assert len(alive) < len(built)   # the first stack's views at least are gone
