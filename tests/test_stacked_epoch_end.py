"""The stacked engine's epoch end: probe losses of all stacked runs through one batched product
per layer, and the finiteness check of every slot at once.

Reference for the probe losses: each run evaluated as its own module (``model_losses`` over the
engine's module for that run, i.e. torch's unbatched ``F.linear``). The two differ only by the
rounding of batched against unbatched products; float32's unit roundoff is 2**-24 ~ 6e-8
(IEEE 754 binary32; common practice), so a relative 1e-5 on a loss of order one leaves room for
other BLAS builds, while a wrong slot, a dropout mask left on or a wrong row moves a loss by far
more (the checks below compare slot by slot, so a swapped slot would fail them).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

from sgdstab.shadows.stacked import StackedEngine
from sgdstab.shadows.stacking import _Stack
from sgdstab.tracking.probe import model_losses

from .test_stacked import _parcels, _run

RELATIVE = 1e-5


@pytest.mark.parametrize(("loss", "regression", "dropout"),
                         [(F.cross_entropy, False, 0.3), (F.mse_loss, True, 0.0)])
def test_probe_losses_through_the_stack_match_each_runs_own_module(loss, regression, dropout):
    _, tracker, _ = _run("stacked", loss=loss, data=_parcels(regression=regression),
                         dropout=dropout, shadows=4)
    engine = tracker.engine
    assert isinstance(engine, StackedEngine) and engine._stack is not None
    probe = tracker._probe
    got = engine.probe_losses(probe.chunks, loss)
    assert got is not None
    members = engine._stack.members
    assert set(got) == {id(m) for m in members} and len(members) >= 3
    for member in members:
        module = engine.module_of(member)
        own = model_losses(module, probe, tracker._per_example)
        assert got[id(member)].shape == own.shape == (sum(probe.lengths),)
        np.testing.assert_allclose(got[id(member)], own, rtol=RELATIVE, atol=1e-7)
    # the shadows differ from the reference: a comparison that could not tell slots apart
    # would pass trivially
    reference = got[id(engine.reference)]
    assert any(np.abs(got[id(m)] - reference).max() > 1e-4 for m in members[1:])


def test_the_readings_agree_with_module_by_module_evaluation(monkeypatch):
    calls = []
    original = StackedEngine.probe_losses

    def spy(self, chunks, loss_fn):
        found = original(self, chunks, loss_fn)
        calls.append(found is not None)
        return found

    monkeypatch.setattr(StackedEngine, "probe_losses", spy)
    _, _, stacked = _run("stacked", dropout=0.2, optimizer="sgd")
    assert calls and all(calls)
    monkeypatch.setattr(StackedEngine, "probe_losses", lambda self, chunks, loss_fn: None)
    _, _, one_by_one = _run("stacked", dropout=0.2, optimizer="sgd")
    for a, b in zip(stacked, one_by_one):
        assert a.divergence == b.divergence   # the training itself is the same
        for field in ("loss_difference_max", "loss_difference_mean", "train_loss"):
            x, y = getattr(a, field), getattr(b, field)
            assert x is not None and math.isclose(x, y, rel_tol=1e-4, abs_tol=1e-6), field
        assert a.loss_difference_max > 1e-4


def test_the_stacked_probe_declines_what_it_would_evaluate_differently():
    _, tracker, _ = _run("stacked", shadows=3, epochs=1)
    engine, chunks = tracker.engine, tracker._probe.chunks
    assert engine.probe_losses(chunks, F.cross_entropy) is not None
    # a loss other than the one the engine steps with
    assert engine.probe_losses(chunks, lambda out, y, reduction="mean": F.nll_loss(out, y)) \
        is None
    # class probabilities as targets take another cross-entropy path
    soft = [(x, F.one_hot(y, 3).float()) for x, y in chunks]
    assert engine.probe_losses(soft, F.cross_entropy) is None


def test_every_slot_is_checked_for_finite_parameters_at_once():
    weights = torch.zeros(5, 3, 4)
    bias = torch.zeros(5, 3)
    weights[1, 0, 0] = math.nan
    bias[2, 1] = -math.inf
    weights[3] = 3e38   # finite entries whose sum overflows
    stack = _Stack([object()] * 5, {"w": weights, "b": bias},   # type: ignore[list-item]
                   torch.optim.SGD([nn.Parameter(torch.zeros(1))], lr=0.1))
    assert stack.finite_slots() == [True, False, False, True, True]
