"""Hostile inputs, numerical faults and interrupted runs: clear errors, nothing lost."""

from __future__ import annotations

import math
import warnings

import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import TensorDataset

from sgdstab import (
    Constants,
    LockstepError,
    LockstepWarning,
    ShadowFaultWarning,
    StabilityTracker,
    read_history,
)

from ._toy import DictPebbles, flat, loader, mlp, pebbles, train


def _make(model=None, data=None, **options):
    model = model if model is not None else mlp()
    data = data if data is not None else pebbles()
    opt = options.pop("optimizer", None) or torch.optim.SGD(model.parameters(), lr=0.1)
    options.setdefault("loss_fn", F.cross_entropy)
    return StabilityTracker(model, opt, train_set=data, **options)


def test_nan_in_one_shadow_freezes_it_and_leaves_the_rest_and_the_main_run_alone():
    data = pebbles()
    bad = (torch.full((5,), float("nan")), torch.tensor(1))
    good = pebbles(count=3, seed=6)[0]
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.2)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               swap=[(5, bad), (9, good)])
    with pytest.warns(ShadowFaultWarning, match="shadow_0.*step"):
        readings = train(model, opt, loader(data), epochs=2, tracker=tracker)
    plain = mlp()
    plain_opt = torch.optim.SGD(plain.parameters(), lr=0.2)
    train(plain, plain_opt, loader(data), epochs=2)
    assert torch.equal(flat(plain), flat(model))          # main run untouched
    last = readings[-1]
    assert math.isnan(last.divergence[0]) and last.divergence[1] > 0
    assert last.shadow_faults[0] is not None and last.shadow_faults[1] is None
    assert math.isfinite(last.loss_difference_max)
    assert any("frozen" in note for note in last.notes)


@pytest.mark.parametrize("engine", ["per_shadow", "batched"])
@pytest.mark.parametrize("when", ["mid_epoch", "epoch_end"])
def test_parameters_gone_non_finite_with_a_finite_loss_are_caught(when, engine):
    # The per-step check reads the loss only; parameters that turn non-finite are caught by the
    # next step's loss or, after the epoch's last step, by the check in finish_epoch.
    data = pebbles()
    model = mlp(dropout=0.0)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2,
                               lazy_fork=False, audit=False, engine=engine)
    steps = len(loader(data))
    poison_after = 2 if when == "mid_epoch" else steps - 1
    with pytest.warns(ShadowFaultWarning) as caught:
        for k, (x, y) in enumerate(tracker.batches(loader(data))):
            opt.zero_grad()
            F.cross_entropy(model(x), y).backward()
            opt.step()
            if k == poison_after:
                with torch.no_grad():
                    # NaN reaches the next loss; +inf behind tanh saturates and leaves the loss
                    # finite, so only the epoch-end check sees it
                    next(tracker.shadows[1].model.parameters())[0, 0] = \
                        float("nan") if when == "mid_epoch" else float("inf")
        reading = tracker.finish_epoch()
    message = str(caught[0].message)
    if when == "mid_epoch":
        assert f"non-finite loss at step {poison_after + 1}" in message
    else:
        assert f"non-finite parameters found after step {poison_after}" in message
    assert reading.shadow_faults[0] is None and reading.shadow_faults[1] is not None
    assert math.isnan(reading.divergence[1]) and math.isfinite(reading.divergence[0])
    assert tracker.engine.name == engine


def test_interrupted_run_keeps_completed_epochs_and_closes_the_writer(tmp_path):
    data = pebbles()
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    with pytest.raises(KeyboardInterrupt):
        with StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1,
                              log_dir=tmp_path) as tracker:
            train(model, opt, loader(data), epochs=1, tracker=tracker)
            for k, (x, y) in enumerate(tracker.batches(loader(data))):
                if k == 2:
                    raise KeyboardInterrupt
                opt.zero_grad()
                F.cross_entropy(model(x), y).backward()
                opt.step()
    assert [r["epoch"] for r in read_history(tmp_path)] == [1]
    assert tracker.sinks.tensorboard.closed
    tracker.close()   # closing twice is harmless


def test_refused_models_optimizers_and_counts():
    frozen = mlp()
    for p in frozen.parameters():
        p.requires_grad_(False)
    with pytest.raises(ValueError, match="no trainable parameters"):
        _make(frozen)
    stranger = nn.Linear(5, 2)
    with pytest.raises(LockstepError, match="not the model's"):
        _make(optimizer=torch.optim.SGD(stranger.parameters(), lr=0.1))
    model = mlp()
    with pytest.raises(LockstepError, match="LBFGS"):
        _make(model, optimizer=torch.optim.LBFGS(model.parameters()))
    with pytest.raises(ValueError, match="shadows must be"):
        _make(shadows=-1)
    with pytest.raises(ValueError, match="larger than the training set"):
        _make(shadows=97)
    with pytest.raises(ValueError, match="at least 2"):
        _make(data=TensorDataset(torch.zeros(1, 5), torch.zeros(1, dtype=torch.long)))
    with pytest.raises(ValueError, match="give loss_fn"):
        _make(loss_fn=None)
    for delta in (0.0, 1.0, 1.5, float("nan")):
        with pytest.raises(ValueError, match="delta"):
            _make(delta=delta)


class NeedsExtra(torch.optim.SGD):
    def __init__(self, params, scale):   # a constructor the tracker cannot call again
        super().__init__(params, lr=0.1 * scale)


def test_an_optimizer_that_cannot_be_mirrored_is_refused():
    model = mlp()
    with pytest.raises(LockstepError, match="cannot mirror"):
        _make(model, optimizer=NeedsExtra(model.parameters(), 2.0))


def test_bad_swaps_are_refused():
    data = pebbles()
    with pytest.raises(IndexError, match="outside"):
        _make(swap=[(96, data[0])])
    with pytest.raises(ValueError, match="twice"):
        _make(swap=[(3, data[0]), (3, data[1])])
    tracker = _make(data=data, swap=[(3, (torch.zeros(4), torch.tensor(0)))])   # 4 features
    with pytest.raises(LockstepError, match="does not match the training examples"):
        next(iter(tracker.batches(loader(data))))


def test_a_dict_replacement_with_other_keys_is_refused():
    data = DictPebbles(pebbles())
    tracker = _make(data=data, loss_fn=None, step_loss=lambda m, b: F.cross_entropy(
        m(b["features"]), b["label"]), swap=[(1, {"features": torch.zeros(5)})])
    with pytest.raises(LockstepError, match="keys"):
        next(iter(tracker.batches(loader(data))))


def test_a_loss_that_is_not_a_scalar_is_refused():
    data = pebbles()
    tracker = _make(data=data, loss_fn=None, step_loss=lambda m, b: F.cross_entropy(
        m(b[0]), b[1], reduction="none"), shadows=1)
    model, opt = tracker.model, tracker.optimizer
    with pytest.raises(LockstepError, match="scalar"):
        for x, y in tracker.batches(loader(data)):
            opt.zero_grad()
            F.cross_entropy(model(x), y).backward()
            opt.step()


def test_batches_on_another_device_are_refused():
    data = TensorDataset(torch.zeros(8, 5, device="meta"), torch.zeros(8, dtype=torch.long))
    tracker = _make(data=data, shadows=1)
    with pytest.raises(LockstepError, match="is on meta but the model is on cpu"):
        next(iter(tracker.batches(loader(data, shuffle=False))))


def test_invalid_constants_are_refused():
    for bad in ({"lipschitz": 0.0, "smoothness": 1.0}, {"lipschitz": 1.0, "smoothness": -1.0},
                {"lipschitz": float("nan"), "smoothness": 1.0},
                {"lipschitz": 1.0, "smoothness": 1.0, "loss_bound": 0.0}):
        with pytest.raises(ValueError):
            Constants(**bad)
    with pytest.raises(ValueError, match="constants must be"):
        _make(constants="guess")


def test_optimizer_step_outside_tracker_batches_warns():
    data = pebbles()
    tracker = _make(data=data, shadows=1)
    model, opt = tracker.model, tracker.optimizer
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for x, y in loader(data):
            opt.zero_grad()
            F.cross_entropy(model(x), y).backward()
            opt.step()
            break
    assert any("without a batch" in str(w.message) for w in caught)


def test_a_step_the_shadows_skipped_marks_every_later_reading_and_fails_the_verdict(tmp_path):
    # the null-swap audit ends with epoch 1 (exact here); an extra optimizer.step() in epoch 2,
    # on a batch not drawn through tracker.batches(), leaves the shadows a step behind: before,
    # epochs 2-4 read like any others and only a one-time warning said so
    data = pebbles()
    tracker = _make(data=data, shadows=2)
    model, opt = tracker.model, tracker.optimizer
    readings = train(model, opt, loader(data), epochs=1, tracker=tracker)
    assert readings[0].audit_divergence == 0.0
    with pytest.warns(LockstepWarning, match="without a batch"):
        for number, (x, y) in enumerate(tracker.batches(loader(data, seed=1))):
            opt.zero_grad()
            F.cross_entropy(model(x), y).backward()
            opt.step()
            if number == 2:   # one more step on the same batch, outside the replayed loop
                opt.zero_grad()
                F.cross_entropy(model(x), y).backward()
                opt.step()
    readings.append(tracker.finish_epoch())
    state = tracker.state_dict()
    tracker.close()
    resumed = _make(model=model, data=data, shadows=2, optimizer=opt)
    resumed.load_state_dict(state)
    readings += train(model, opt, loader(data, seed=2), epochs=1, tracker=resumed)
    lost = [[n for n in r.notes if n.startswith("lockstep lost")] for r in readings]
    assert lost[0] == []
    assert len(lost[1]) == 1 and "ran 1 time(s) this epoch" in lost[1][0]
    steps_before = readings[0].steps + 3   # epoch 1's steps and the three of epoch 2 before it
    assert f"first such step was in epoch 2, after {steps_before} replayed step(s)" in lost[1][0]
    assert len(lost[2]) == 1 and "this epoch" not in lost[2][0]   # carried over the resume
    line = resumed.advise().verdict[0]
    assert (line.topic, line.status) == ("Lockstep audit", "fail")
    assert "BROKEN at epoch 2" in line.text


def test_one_shadow_or_none_gives_none_with_reasons_instead_of_dividing_by_zero():
    data = pebbles()
    one = _make(data=data, shadows=1, replacements=pebbles(count=10, seed=3))
    reading = train(one.model, one.optimizer, loader(data), epochs=1, tracker=one)[0]
    assert reading.gap_estimate is not None and reading.gap_stderr is None
    assert any("at least 2 shadows" in note for note in reading.notes)
    none = _make(data=data, shadows=0, audit=False)
    reading = train(none.model, none.optimizer, loader(data), epochs=1, tracker=none)[0]
    assert reading.divergence == () and reading.loss_difference_max is None
    assert reading.train_loss is not None
    assert any("no shadows" in note for note in reading.notes)


def test_without_shadows_no_rng_state_is_kept_per_batch():
    """With nothing to replay them, the per-batch RNG captures (one 5 kB tensor each) are
    skipped; with the null-swap audit they are kept for its steps."""
    data = pebbles()
    none = _make(data=data, shadows=0, audit=False)
    batches = none.batches(loader(data))
    next(batches)
    assert none._group.indices and none._group.rng_states == []
    audited = _make(data=data, shadows=0, audit=True)
    batches = audited.batches(loader(data))
    next(batches)
    assert len(audited._group.rng_states) == 1
