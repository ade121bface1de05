"""Loop shapes users write: each gives correct numbers or a clear refusal, never a silent one."""

from __future__ import annotations

import io
import json
import warnings

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, Dataset, SubsetRandomSampler, TensorDataset

from sgdstab import Constants, LockstepWarning, ShadowFaultWarning, StabilityTracker
from sgdstab.outputs.reading import read_history
from sgdstab.outputs.sinks import JsonlSink
from sgdstab.shadows.lockstep import LockstepError
from sgdstab.tracking.probe import PerExampleLoss

from ._toy import flat, loader, mlp, pebbles, train


def _sgd(model, lr=0.1, **options):
    return torch.optim.SGD(model.parameters(), lr=lr, **options)


def _self_swaps(data, indices=(3, 17, 40, 77)):
    return [(i, data[i]) for i in indices]


# -- 1. a break with a yielded, unstepped batch ---------------------------------------------------
def _budget_loop(model, opt, batches, tracker=None, epochs=3, budget=3):
    """A step budget checked at the top of the loop: the batch yielded last is never stepped."""
    readings = []
    for _ in range(epochs):
        source = tracker.batches(batches) if tracker is not None else batches
        for k, (x, y) in enumerate(source):
            if k == budget:
                break
            opt.zero_grad()
            F.cross_entropy(model(x), y).backward()
            opt.step()
        if tracker is not None:
            readings.append(tracker.finish_epoch())
    return readings


def test_a_batch_yielded_before_a_break_is_dropped_and_self_swaps_stay_at_zero():
    data = pebbles()
    plain = mlp(dropout=0.3)
    torch.manual_seed(1)
    _budget_loop(plain, _sgd(plain, momentum=0.9), loader(data, seed=4))
    model = mlp(dropout=0.3)
    opt = _sgd(model, momentum=0.9)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               swap=_self_swaps(data), lazy_fork=False, engine="per_shadow")
    torch.manual_seed(1)
    readings = _budget_loop(model, opt, loader(data, seed=4), tracker)
    # self swaps: exactly 0 (the pending batch used to be replayed at the next epoch's first step)
    assert [r.divergence for r in readings] == [(0.0, 0.0, 0.0, 0.0)] * 3
    assert all(any("never stepped" in note for note in r.notes) for r in readings)
    assert torch.equal(flat(plain), flat(model))
    assert tracker.steps == 9 and tracker.history.steps == 9


def test_an_audit_that_never_ran_reads_none_not_zero():
    data = pebbles()
    model = mlp()
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1)
    reading = _budget_loop(model, opt, loader(data), tracker, epochs=1, budget=0)[0]
    assert reading.audit_divergence is None
    assert "null-swap audit inconclusive: its example was never drawn" in reading.notes


# -- 2. a sampler over part of the training set --------------------------------------------------
def _subset_run(tracker_options=None, epochs=2, track=True):
    data = pebbles(count=128)
    model = mlp(dropout=0.0)
    opt = _sgd(model)
    sampler = SubsetRandomSampler(range(64), generator=torch.Generator().manual_seed(3))
    batches = DataLoader(data, batch_size=16, sampler=sampler)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               **(tracker_options or {})) if track else None
    readings = train(model, opt, batches, epochs=epochs, tracker=tracker)
    return model, opt, tracker, readings, batches


@pytest.mark.filterwarnings("ignore::sgdstab.AssumptionWarning")   # the MLP is not convex
def test_a_subset_sampler_sets_n_and_the_swaps_to_the_examples_it_draws():
    constants = Constants(lipschitz=1.0, smoothness=1.0, convex=True)
    model, _, tracker, readings, _ = _subset_run({"shadows": 4, "constants": constants})
    plain, _, _, _, _ = _subset_run(track=False)
    assert torch.equal(flat(plain), flat(model))   # the main run is unchanged
    assert tracker.n == 64 and tracker.dataset_size == 128
    assert all(s.spec.index < 64 for s in tracker.shadows)
    assert all(d > 0 for d in readings[-1].divergence)   # every swapped example was drawn
    # HRS 2016 convex expected bound 2 L^2 / n * sum(alpha_t) (closed form from memory) with
    # n = 64 drawable examples: 8 steps of 0.1, L = 1 -> 2 * 0.8 / 64 = 0.025 (n = 128: half)
    assert readings[-1].expected_bound == pytest.approx(2 * 0.8 / 64, rel=1e-12)
    assert any("draws 64 of the 128 examples" in note for note in readings[-1].notes)
    assert tracker.history.flat_indices().max() < 64   # positions among the drawable examples
    probe_train = tracker._probe.kinds == "train"
    assert probe_train.sum() == 64   # the probe's training sample is the drawable part


def test_a_subset_sampler_refuses_swaps_it_never_draws_and_a_changed_subset():
    data = pebbles(count=128)
    with pytest.raises(LockstepError, match="never drawn"):
        _subset_run({"swap": [(100, data[100])]})
    model, opt, tracker, _, _ = _subset_run({"shadows": 2}, epochs=1)
    other = DataLoader(data, batch_size=16, shuffle=True)
    with pytest.raises(LockstepError, match="another part of train_set"):
        next(iter(tracker.batches(other)))


def test_a_subset_sampler_run_resumes_exactly():
    model, opt, tracker, _, batches = _subset_run({"shadows": 3}, epochs=1)
    buffer = io.BytesIO()
    torch.save({"model": model.state_dict(), "opt": opt.state_dict(),
                "tracker": tracker.state_dict(), "rng": batches.sampler.generator.get_state()},
               buffer)
    uninterrupted = train(model, opt, batches, epochs=1, tracker=tracker)[0]
    buffer.seek(0)
    saved = torch.load(buffer, weights_only=True)
    data = batches.dataset
    model2 = mlp(dropout=0.0)
    model2.load_state_dict(saved["model"])
    opt2 = _sgd(model2)
    opt2.load_state_dict(saved["opt"])
    resumed = StabilityTracker(model2, opt2, loss_fn=F.cross_entropy, train_set=data, shadows=3)
    resumed.load_state_dict(saved["tracker"])
    assert resumed.n == 64
    sampler = SubsetRandomSampler(range(64), generator=torch.Generator())
    sampler.generator.set_state(saved["rng"])
    again = train(model2, opt2, DataLoader(data, batch_size=16, sampler=sampler), epochs=1,
                  tracker=resumed)[0]
    assert again.to_dict() == uninterrupted.to_dict()


class _TooShort(Dataset):
    """Says it holds 50 examples but serves 100 (a stale __len__)."""

    def __init__(self) -> None:
        self.base = pebbles(count=100)

    def __len__(self) -> int:
        return 50

    def __getitem__(self, i):
        return self.base[i]


def test_a_dataset_whose_len_is_too_small_is_a_clear_error():
    data = _TooShort()
    model = mlp()
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1)
    beyond = DataLoader(data, batch_size=8, sampler=SubsetRandomSampler(range(80)))
    with pytest.raises(LockstepError, match=r"len\(train_set\) is 50"):
        next(iter(tracker.batches(beyond)))
    custom = DataLoader(data, batch_sampler=[[1, 2, 3], [60, 4, 5]])
    source = tracker.batches(custom)
    next(source)
    with pytest.raises(LockstepError, match=r"drew training index 60"):
        next(source)
    # a negative index would silently read from the end of the dataset; one unsigned maximum
    # catches it with the too-large ones
    other = mlp()
    fresh = StabilityTracker(other, _sgd(other), loss_fn=F.cross_entropy, train_set=data,
                             shadows=1)
    negative = fresh.batches(DataLoader(data, batch_sampler=[[1, 2, 3], [4, -2, 5]]))
    next(negative)
    with pytest.raises(LockstepError, match=r"drew training index -2"):
        next(negative)


# -- 3. the epoch-end evaluation and buffers updated in eval mode --------------------------------
class _Centring(nn.Module):
    """Subtracts a running mean of its inputs, updated in train AND eval mode."""

    def __init__(self, features: int) -> None:
        super().__init__()
        self.register_buffer("mean", torch.zeros(features))

    def forward(self, x):
        with torch.no_grad():
            self.mean.mul_(0.9).add_(0.1 * x.mean(dim=0))
        return x - self.mean


def _centring_model():
    torch.manual_seed(0)
    return nn.Sequential(_Centring(5), nn.Linear(5, 8), nn.Tanh(), nn.Linear(8, 2))


def test_the_epoch_end_evaluation_leaves_buffers_updated_in_eval_mode_alone():
    data = pebbles()
    plain = _centring_model()
    plain_opt = _sgd(plain)
    train(plain, plain_opt, loader(data), epochs=3)
    model = _centring_model()
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               swap=_self_swaps(data), engine="per_shadow")
    readings = train(model, opt, loader(data), epochs=3, tracker=tracker)
    assert torch.equal(flat(plain), flat(model))
    assert torch.equal(plain[0].mean, model[0].mean)
    assert all(r.divergence == (0.0,) * 4 for r in readings)   # shadows evaluated alike


def _quantized(qconfig):
    import torch.ao.quantization as quantization

    torch.manual_seed(0)
    model = nn.Sequential(quantization.QuantStub(), nn.Linear(5, 8), nn.ReLU(), nn.Linear(8, 2),
                          quantization.DeQuantStub())
    model.qconfig = qconfig
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        quantization.prepare_qat(model, inplace=True)
    return model


def test_per_channel_quantization_aware_training_is_refused_and_per_tensor_is_exact():
    import torch.ao.quantization as quantization

    data = pebbles()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        per_channel = _quantized(quantization.get_default_qat_qconfig("fbgemm"))
    with pytest.raises(LockstepError, match="per channel"):
        StabilityTracker(per_channel, _sgd(per_channel), loss_fn=F.cross_entropy,
                         train_set=data, shadows=1)
    plain = _quantized(quantization.default_qat_qconfig)
    train(plain, _sgd(plain), loader(data), epochs=2)
    model = _quantized(quantization.default_qat_qconfig)
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2,
                               engine="per_shadow")
    train(model, opt, loader(data), epochs=2, tracker=tracker)
    assert torch.equal(flat(plain), flat(model))
    for a, b in zip(plain.buffers(), model.buffers()):   # observers' ranges included
        assert torch.equal(a, b)


# -- 4. persistent workers ------------------------------------------------------------------------
class _Noisy(Dataset):
    """Each example gets noise drawn in the worker (so the workers' seeds matter)."""

    def __init__(self) -> None:
        self.base = pebbles(count=48)

    def __len__(self) -> int:
        return len(self.base)

    def __getitem__(self, i):
        x, y = self.base[i]
        return x + 0.1 * torch.randn(x.shape), y


def test_persistent_workers_give_the_run_it_would_have_had():
    data = _Noisy()
    make = lambda: loader(data, batch_size=8, seed=2, num_workers=2,  # noqa: E731
                          persistent_workers=True)
    plain = mlp(dropout=0.0)
    train(plain, _sgd(plain), make(), epochs=3)
    model = mlp(dropout=0.0)
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1)
    batches = make()
    readings = train(model, opt, batches, epochs=3, tracker=tracker)
    assert torch.equal(flat(plain), flat(model))
    assert readings[0].audit_divergence == 0.0
    assert len(tracker._siblings) == 1   # one sibling, kept over the three passes
    tracker.close()
    assert tracker._siblings == {}


def test_a_persistent_worker_loader_built_each_epoch_does_not_pile_up_workers():
    # the kept sibling goes with the user's loader: before, every epoch's sibling (and its two
    # worker processes) stayed alive, 8 workers after 4 epochs
    import gc
    import multiprocessing

    data = _Noisy()
    model = mlp(dropout=0.0)
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1)
    workers, audits = [], []
    for epoch in range(4):
        batches = loader(data, batch_size=8, seed=epoch, num_workers=2, persistent_workers=True)
        audits.append(train(model, opt, batches, epochs=1, tracker=tracker)[0].audit_divergence)
        del batches
        gc.collect()
        workers.append(len(multiprocessing.active_children()))
        assert len(tracker._siblings) <= 1
    assert audits[0] == 0.0
    assert max(workers) <= 2
    tracker.close()


# -- 5. history.jsonl under faults ----------------------------------------------------------------
def test_a_torn_last_line_does_not_take_the_next_record_with_it(tmp_path):
    path = tmp_path / "history.jsonl"
    path.write_text('{"epoch": 1}\n{"epoch": 2, "divergence": [0.1')   # torn by a crash
    JsonlSink(path).write({"epoch": 3})
    with pytest.warns(UserWarning, match="line 2 is damaged"):
        records = read_history(path)
    assert records == [{"epoch": 1}, {"epoch": 3}]


def _tracked_run(log_dir, model=None, opt=None):
    data = pebbles()
    model = model if model is not None else mlp()
    opt = opt if opt is not None else _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1,
                               log_dir=log_dir)
    return data, model, opt, tracker


def test_a_failed_write_warns_keeps_the_reading_and_writes_it_later(tmp_path):
    data, model, opt, tracker = _tracked_run(tmp_path)
    sink = tracker.sinks.history
    real = sink._append
    failures = iter([True, True, False, False, False])

    def flaky(line):
        if next(failures):
            with open(sink.path, "ab") as handle:   # a partial line, then the disk is full
                handle.write(line[:20].encode())
            raise OSError(28, "No space left on device")
        real(line)

    sink._append = flaky
    with pytest.warns(UserWarning, match="kept in memory"):
        train(model, opt, loader(data), epochs=1, tracker=tracker)
    assert len(sink.pending) == 1
    with pytest.warns(UserWarning, match="kept in memory"):
        train(model, opt, loader(data), epochs=1, tracker=tracker)
    train(model, opt, loader(data), epochs=1, tracker=tracker)   # space is back
    assert sink.pending == []
    with pytest.warns(UserWarning, match="damaged"):
        records = read_history(tmp_path)
    assert [r["epoch"] for r in records] == [1, 2, 3]
    assert records[0]["divergence"] == list(tracker.readings[0].divergence)
    tracker.close()


def test_a_kill_between_finish_epoch_and_the_checkpoint_leaves_no_duplicate_epoch(tmp_path):
    data, model, opt, tracker = _tracked_run(tmp_path)
    train(model, opt, loader(data, seed=1), epochs=1, tracker=tracker)
    checkpoint = {"model": {k: v.clone() for k, v in model.state_dict().items()},
                  "opt": opt.state_dict(), "tracker": tracker.state_dict()}
    train(model, opt, loader(data, seed=2), epochs=1, tracker=tracker)   # killed after this
    tracker.close()
    model2 = mlp()
    model2.load_state_dict(checkpoint["model"])
    opt2 = _sgd(model2)
    opt2.load_state_dict(checkpoint["opt"])
    data, _, _, resumed = _tracked_run(tmp_path, model2, opt2)   # the same generated data
    resumed.load_state_dict(checkpoint["tracker"])
    with pytest.warns(UserWarning, match=r"already held epoch\(s\) 2"):
        train(model2, opt2, loader(data, seed=2), epochs=1, tracker=resumed)
    records = read_history(tmp_path)
    assert [r["epoch"] for r in records] == [1, 2]
    assert records[1]["divergence"] == list(resumed.readings[-1].divergence)
    resumed.close()


def test_read_history_keeps_the_resumed_runs_records_of_a_repeated_epoch(tmp_path):
    path = tmp_path / "history.jsonl"
    path.write_text("\n".join(json.dumps({"epoch": e, "run": run})
                              for e, run in [(1, "a"), (2, "a"), (3, "a"), (2, "b"), (3, "b")]))
    with pytest.warns(UserWarning, match="repeats epoch 2"):
        records = read_history(path)
    assert [(r["epoch"], r["run"]) for r in records] == [(1, "a"), (2, "b"), (3, "b")]


# -- 6. a DistributedDataParallel model given to the plain tracker --------------------------------
def test_a_ddp_model_given_to_the_plain_tracker_fails_at_once(tmp_path):
    import torch.distributed as dist
    from torch.nn.parallel import DistributedDataParallel

    dist.init_process_group("gloo", init_method=f"file://{tmp_path / 'store'}", rank=0,
                            world_size=1)
    try:
        model = DistributedDataParallel(mlp())
        with pytest.raises(LockstepError, match="DataParallelStabilityTracker"):
            StabilityTracker(model, _sgd(model), loss_fn=F.cross_entropy, train_set=pebbles())
    finally:
        dist.destroy_process_group()


# -- 7. the smaller ones -------------------------------------------------------------------------
@pytest.mark.filterwarnings("ignore::sgdstab.AssumptionWarning")   # the MLP is not convex
def test_momentum_switched_on_after_construction_makes_the_bounds_not_applicable():
    data = pebbles()
    model = mlp(dropout=0.0)
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1,
                               constants=Constants(lipschitz=1.0, smoothness=1.0, convex=True))
    first = train(model, opt, loader(data), epochs=1, tracker=tracker)[0]
    assert first.expected_bound is not None
    opt.param_groups[0]["momentum"] = 0.9
    second = train(model, opt, loader(data), epochs=1, tracker=tracker)[0]
    assert second.expected_bound is None
    reason = second.bounds["expected"]["reason"]
    assert "from step 7" in reason and "momentum 0.9" in reason
    assert tracker.history.reasons == [(0, ""), (6, tracker.history.reasons[1][1])]


def test_finish_epoch_twice_or_skipped_warns_and_keeps_epochs_right():
    data = pebbles()
    model = mlp()
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1)
    first = train(model, opt, loader(data), epochs=1, tracker=tracker)[0]
    with pytest.warns(UserWarning, match="called again"):
        again = tracker.finish_epoch()
    assert again is first and tracker.epoch == 1 and len(tracker.readings) == 1
    batches = loader(data)
    for _ in tracker.batches(batches):
        pass
    with pytest.warns(UserWarning, match="without finish_epoch"):
        for _ in tracker.batches(batches):
            pass
    reading = tracker.finish_epoch()
    assert reading.epoch == 2
    assert any("spans 2 passes" in note for note in reading.notes)


def test_the_nan_warning_says_when_the_main_run_itself_went_nan():
    base = pebbles()
    x, y = base.tensors[0].clone(), base.tensors[1]
    x[5] = float("nan")
    data = TensorDataset(x, y)
    model = mlp()
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               swap=[(9, data[9])], lazy_fork=False, engine="per_shadow")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        reading = train(model, opt, loader(data), epochs=1, tracker=tracker)[0]
    faults = [str(w.message) for w in caught if w.category is ShadowFaultWarning]
    assert faults and all("YOUR MAIN RUN" in message for message in faults)
    assert "main run go on" not in " ".join(faults)
    # the audit followed the NaN main run: inconclusive, not "lockstep broken"
    assert not any(w.category is LockstepWarning for w in caught)
    assert reading.audit_divergence is None


def test_a_replacement_label_of_another_dtype_is_refused_up_front():
    data = pebbles()
    model = mlp()
    tracker = StabilityTracker(model, _sgd(model), loss_fn=F.cross_entropy, train_set=data,
                               swap=[(3, (data[3][0], 1.0))])
    with pytest.raises(LockstepError, match="torch.float64 where the training examples hold "
                                            "torch.int64"):
        next(iter(tracker.batches(loader(data))))
    assert tracker.steps == 0


# -- 8. the record of a long run ------------------------------------------------------------------
def test_the_index_record_is_compact_and_round_trips():
    model, opt, tracker, _, _ = _subset_run({"shadows": 2}, epochs=2)
    flat_indices = tracker.history.flat_indices()
    assert flat_indices.dtype == np.uint16 and flat_indices.size == 128
    state = tracker.state_dict()["history"]
    assert state["indices"].dtype == torch.int16 and state["indices_dtype"] == "uint16"
    big = np.array([70000, 3], dtype=np.int64)
    from sgdstab.theory.history import StepHistory

    history = StepHistory(shadows=0)
    history.record(0.1, 2, big, [])
    assert history.flat_indices().dtype == np.uint32
    assert history.flat_indices().tolist() == [70000, 3]


# -- 9. step_loss for training, loss_fn for the readings ------------------------------------------
def test_loss_fn_alongside_step_loss_gives_clean_batched_readings():
    data = pebbles()
    model = mlp(dropout=0.0)
    opt = _sgd(model)

    def step_loss(m, batch):   # noise augmentation and a 1/2 accumulation factor
        x, y = batch
        return F.cross_entropy(m(x + 0.05 * torch.randn_like(x)), y) / 2

    tracker = StabilityTracker(model, opt, step_loss=step_loss, loss_fn=F.cross_entropy,
                               train_set=data, swap=_self_swaps(data))
    for _ in range(2):
        for batch in tracker.batches(loader(data)):
            opt.zero_grad()
            step_loss(model, batch).backward()
            opt.step()
        reading = tracker.finish_epoch()
    assert reading.divergence == (0.0,) * 4
    probe = tracker._probe
    rows = np.isin(probe.kinds, ["out", "train"])
    with torch.no_grad():
        model.eval()
        x = torch.cat([chunk[0] for chunk in probe.chunks])
        y = torch.cat([chunk[1] for chunk in probe.chunks])
        clean = F.cross_entropy(model(x), y, reduction="none").double().numpy()
    assert reading.train_loss == pytest.approx(clean[rows].mean(), rel=1e-6)


def test_step_loss_alone_is_evaluated_on_all_rows_at_once():
    data = pebbles()
    model = mlp(dropout=0.0).eval()

    def step_loss(m, batch):
        x, y = batch
        return F.cross_entropy(m(x), y)

    per_example = PerExampleLoss(None, step_loss)
    x, y = data.tensors
    with torch.no_grad():
        batched = per_example(model, (x, y), len(x))
        one_by_one = [float(step_loss(model, (x[i:i + 1], y[i:i + 1]))) for i in range(len(x))]
    assert per_example.mapped is True
    np.testing.assert_allclose(batched, one_by_one, rtol=1e-6, atol=1e-7)


def test_a_torch_loss_module_gives_its_per_example_losses_in_one_call():
    # nn.CrossEntropyLoss() takes no reduction argument: its per-example losses come from its
    # reduction attribute set to "none" for the call (put back after), the values of
    # F.cross_entropy(..., reduction="none") (torch, the reference), not one forward per row
    data = pebbles()
    model = mlp(dropout=0.0)
    x, y = data.tensors
    module = torch.nn.CrossEntropyLoss(label_smoothing=0.1)
    per_example = PerExampleLoss(module, None)
    calls = []
    handle = model.register_forward_hook(lambda m, i, o: calls.append(1))
    with torch.no_grad():
        values = per_example(model, (x, y), len(x))
        expected = F.cross_entropy(model(x), y, label_smoothing=0.1, reduction="none")
    handle.remove()
    assert per_example.vectorised is True and len(calls) == 2   # one call each
    np.testing.assert_array_equal(values, expected.double().numpy())
    assert module.reduction == "mean" and per_example.notes() == []


def test_class_weights_that_cancel_on_one_row_are_said_in_the_notes():
    data = pebbles()
    model = mlp(dropout=0.0)
    opt = _sgd(model)
    weights = torch.tensor([1.0, 3.0])
    weighted = torch.nn.CrossEntropyLoss(weight=weights)
    tracker = StabilityTracker(model, opt, loss_fn=weighted, train_set=data, shadows=1)
    reading = train(model, opt, loader(data), epochs=1, tracker=tracker, loss=weighted)[0]
    assert tracker._per_example.vectorised is False   # the weights would not cancel in a batch
    note = [n for n in reading.notes if n.startswith("per-example loss:")]
    assert len(note) == 1 and "unweighted" in note[0]
    with torch.no_grad():   # each row alone: the plain cross-entropy of that row
        x, y = data.tensors
        alone = F.cross_entropy(model(x[:4]), y[:4], reduction="none").double().numpy()
        rows = tracker._per_example(model, (x[:4], y[:4]), 4)
    np.testing.assert_allclose(rows, alone, rtol=1e-6)


def test_lockstep_warning_is_still_raised_for_a_broken_lockstep():
    # guard: the refusals above did not silence the audit (a loss the shadows do not repeat)
    data = pebbles()
    model = mlp(dropout=0.0)
    opt = _sgd(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1)
    with pytest.warns(LockstepWarning):
        for x, y in tracker.batches(loader(data)):
            opt.zero_grad()
            F.cross_entropy(model(x + 0.05 * torch.randn_like(x)), y).backward()
            opt.step()
        tracker.finish_epoch()


# -- a projection after the step (after_step) -----------------------------------------------------
def _clamped(model):
    for p in model.parameters():
        p.clamp_(-0.25, 0.25)   # projection onto a box: convex, so non-expansive


def _projected_run(engine, after_step, epochs=2, constants=None):
    data = pebbles()
    model = mlp()
    opt = _sgd(model, lr=0.5, momentum=0.5)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=3,
                               engine=engine, after_step=after_step, constants=constants)
    readings = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")   # the broken runs below warn LOCKSTEP BROKEN
        for epoch in range(epochs):
            for x, y in tracker.batches(loader(data, seed=epoch)):
                opt.zero_grad()
                F.cross_entropy(model(x), y).backward()
                opt.step()
                with torch.no_grad():
                    _clamped(model)
            readings.append(tracker.finish_epoch())
    return model, tracker, readings


@pytest.mark.parametrize("engine", ["per_shadow", "stacked", "batched"])
def test_a_projection_after_the_step_is_repeated_with_after_step(engine):
    # without after_step the shadows skip the user's projection and the audit breaks; with it
    # the null swap stays exact (per-shadow and stacked; vmap is not guaranteed exact) and the
    # main run is the plain projected run
    plain = mlp()
    opt = _sgd(plain, lr=0.5, momentum=0.5)
    data = pebbles()
    for epoch in range(2):
        for x, y in loader(data, seed=epoch):
            opt.zero_grad()
            F.cross_entropy(plain(x), y).backward()
            opt.step()
            with torch.no_grad():
                _clamped(plain)
    model, tracker, readings = _projected_run(engine, _clamped)
    assert torch.equal(flat(plain), flat(model))
    assert tracker.engine.name == engine
    if engine == "batched":
        assert readings[0].audit_divergence < 1e-12
    else:
        assert readings[0].audit_divergence == 0.0
    assert all(0.0 < d for d in readings[-1].divergence)
    shadow_parameters = [tracker.engine.parameters_of(s) for s in tracker.shadows]
    assert all(float(p.detach().abs().max()) <= 0.25 for params in shadow_parameters
               for p in params.values())   # the shadows were projected too
    _, _, unprojected = _projected_run(engine, None, epochs=1)
    assert unprojected[0].audit_divergence > 1e-6   # what after_step fixes


def test_after_step_must_change_the_stack_in_place_and_puts_its_assumption_in_the_notes():
    def replacing(model):
        for p in model.parameters():
            p.data = p.data.clamp(-0.25, 0.25)   # a new tensor: cannot reach the stacked slot

    with pytest.raises(LockstepError, match="after_step replaced a parameter tensor"):
        _projected_run("stacked", replacing, epochs=1)
    _, _, readings = _projected_run("per_shadow", _clamped, epochs=1,
                                    constants=Constants(lipschitz=1.0, smoothness=1.0))
    assert any(n.startswith("after_step: the bounds hold only if it projects") for n in
               readings[0].notes)
