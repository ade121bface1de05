"""Epoch-end measurement pieces, each on its own: probe rows, divergences, audit verdict, bounds."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch.utils.data import Dataset, TensorDataset
from torch.utils.data._utils.collate import default_collate

from sgdstab import LockstepWarning, StabilityTracker
from sgdstab.shadows.lockstep import NeighbourSpec, Shadow
from sgdstab.theory.history import StepHistory
from sgdstab.tracking import measure

from ._toy import mlp, pebbles


class Numbered(Dataset):
    """Example i is (i, a draw from torch's RNG): reading it consumes randomness."""

    def __init__(self, count: int, offset: int = 0) -> None:
        self.count, self.offset = count, offset

    def __len__(self) -> int:
        return self.count

    def __getitem__(self, i: int):
        return torch.tensor(float(self.offset + i)), torch.rand(())


def _shadow(index: int, replacement, origin: str, label: str = "s") -> Shadow:
    return Shadow(NeighbourSpec(index, replacement, origin), None, None, None, label)


def test_default_probe_size_is_n_over_16_within_128_and_256_and_at_most_n():
    assert measure.default_probe_size(10) == 10
    assert measure.default_probe_size(100) == 100
    assert measure.default_probe_size(1200) == 128
    assert measure.default_probe_size(2048) == 128
    assert measure.default_probe_size(3200) == 200
    assert measure.default_probe_size(100_000) == 256


def test_probe_rows_are_the_swaps_then_seeded_samples_and_leave_the_rng_alone():
    train, held = Numbered(40), Numbered(10, offset=1000)
    shadows = [_shadow(3, held[0], "holdout"), _shadow(17, held[4], "holdout")]
    before = torch.get_rng_state()
    probe = measure.build_probe(shadows, train, n=40, probe_set=None, replacements=held,
                                size=8, seed=5, collate=default_collate)
    assert torch.equal(torch.get_rng_state(), before)
    kinds = probe.kinds.tolist()
    assert kinds == ["out", "in"] * 2 + ["train"] * 8 + ["holdout"] * 8
    assert probe.owner.tolist() == [0, 0, 1, 1] + [-1] * 16
    values = torch.cat([chunk[0] for chunk in probe.chunks]).tolist()
    assert values[:4] == [3.0, 1000.0, 17.0, 1004.0]
    sampled = values[4:12]
    assert sampled == sorted(sampled) and len(set(sampled)) == 8
    assert all(0 <= v < 40 for v in sampled)
    assert all(1000 <= v < 1010 for v in values[12:])
    again = measure.build_probe(shadows, train, n=40, probe_set=None, replacements=held,
                                size=8, seed=5, collate=default_collate)
    assert torch.cat([chunk[0] for chunk in again.chunks]).tolist() == values
    other = measure.build_probe(shadows, train, n=40, probe_set=None, replacements=held,
                                size=8, seed=6, collate=default_collate)
    assert torch.cat([chunk[0] for chunk in other.chunks]).tolist()[4:12] != sampled


def test_a_given_probe_set_is_listed_whole_after_the_swaps():
    train = Numbered(20)
    probe = measure.build_probe([_shadow(2, train[5], "train")], train, n=20,
                                probe_set=Numbered(3, offset=500), replacements=None, size=4,
                                seed=0, collate=default_collate)
    assert probe.kinds.tolist() == ["out", "in", "probe", "probe", "probe"] + ["train"] * 4
    assert torch.cat([c[0] for c in probe.chunks]).tolist()[2:5] == [500.0, 501.0, 502.0]


def test_only_held_out_replacements_count_as_fresh_draws():
    assert measure.fresh_replacements([_shadow(1, None, "holdout")] * 2) == (True, "")
    fresh, reason = measure.fresh_replacements([_shadow(1, None, "holdout"),
                                                _shadow(2, None, "train")])
    assert not fresh and "duplicates" in reason
    fresh, reason = measure.fresh_replacements([_shadow(1, None, "explicit")])
    assert not fresh and "unknown" in reason
    assert measure.fresh_replacements([]) == (False, "no shadows")


def _tracker(**options) -> StabilityTracker:
    model = mlp(dropout=0.0)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    return StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=pebbles(),
                            engine="per_shadow", **options)


def test_divergences_measure_the_parameter_distance_per_shadow_and_per_layer():
    tracker = _tracker(shadows=2, lazy_fork=False, audit=False)
    first, second = tracker.shadows
    with torch.no_grad():
        tracker.engine.parameters_of(first)["0.weight"][0, 0] += 0.3
        tracker.engine.parameters_of(first)["3.bias"][1] -= 0.4
    values, layer, audit = measure.divergences(tracker.engine, tracker.model, tracker.shadows,
                                               None)
    assert values[0] == pytest.approx(0.5, rel=1e-6)
    assert values[1] == 0.0
    assert layer["0.weight"] == pytest.approx(0.3, rel=1e-6)
    assert layer["3.bias"] == pytest.approx(0.4, rel=1e-6)
    assert layer["0.bias"] == 0.0 and audit is None
    assert measure.masked_faults(values, tracker.shadows) == values
    second.fault = "non-finite loss"
    masked = measure.masked_faults(values, tracker.shadows)
    assert masked[0] == values[0] and math.isnan(masked[1])
    tracker.close()


def test_an_unforked_shadow_is_at_distance_zero():
    tracker = _tracker(shadows=1)
    values, _, audit = measure.divergences(tracker.engine, tracker.model, tracker.shadows,
                                           tracker.audit_shadow)
    assert values == [0.0] and audit == 0.0
    tracker.close()


def test_the_audit_verdict_notes_warns_and_drops_the_audit_shadow():
    tracker = _tracker(shadows=1)
    shadow, engine = tracker.audit_shadow, tracker.engine
    notes: list[str] = []
    assert measure.settle_audit(engine, None, 0.0, notes, LockstepWarning) is None
    assert measure.settle_audit(engine, shadow, None, notes, LockstepWarning) is None
    assert shadow in engine.shadows and notes == []
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        # never forked: the audit never ran, so no value (None), never a reassuring 0.0
        assert measure.settle_audit(engine, shadow, 0.0, notes, LockstepWarning) is None
    assert notes == ["null-swap audit inconclusive: its example was never drawn"]
    assert shadow not in engine.shadows

    tracker = _tracker(shadows=1)
    shadow, engine = tracker.audit_shadow, tracker.engine
    engine.fork(shadow, 0, None)
    notes = []
    with pytest.warns(LockstepWarning, match="LOCKSTEP BROKEN"):
        assert measure.settle_audit(engine, shadow, 2e-3, notes, LockstepWarning) == 2e-3
    assert notes == ["lockstep broken: null-swap divergence 2.000e-03"]
    assert shadow not in engine.shadows
    tracker.close()


def test_without_constants_the_bounds_are_skipped_with_a_note():
    tracker = _tracker(shadows=1)
    notes: list[str] = []
    fields, violated = measure.epoch_bounds(
        None, [0.0], notes, history=StepHistory(shadows=1), n=96, delta=0.05,
        groups=None, optimizer_reason="", model=tracker.model, warned=False,
        category=UserWarning)
    assert fields == {} and violated is False
    assert notes and notes[0].startswith("bounds not computed")
    tracker.close()


def test_constants_are_estimated_on_a_seeded_sample_and_merged_as_running_maxima():
    rows = measure.constants_rows(96, 32, seed=4)
    assert len(set(rows.tolist())) == 32 and np.array_equal(rows, measure.constants_rows(96, 32, 4))
    assert len(measure.constants_rows(10, 32, 4)) == 10
    data = pebbles()
    model = mlp(dropout=0.0)
    batch = (data.tensors[0][rows], data.tensors[1][rows])
    first = measure.estimate_constants(model, batch, None, loss_fn=F.cross_entropy,
                                       step_loss=None, loss_bound=None, options={})
    small = TensorDataset(data.tensors[0][:4] * 0.01, data.tensors[1][:4])
    smaller = measure.estimate_constants(model, small.tensors, None, loss_fn=F.cross_entropy,
                                         step_loss=None, loss_bound=None, options={})
    merged = measure.estimate_constants(model, small.tensors, first, loss_fn=F.cross_entropy,
                                        step_loss=None, loss_bound=None, options={})
    assert merged.lipschitz == max(first.lipschitz, smaller.lipschitz)
