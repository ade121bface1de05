"""The lockstep tracker: exactness against runs without it and against hand-built neighbours."""

from __future__ import annotations

import math
import time
import warnings

import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import LockstepWarning, StabilityTracker

from ._toy import DictPebbles, flat, loader, mlp, pebbles, train


def _run(track: bool, *, shadows=3, optimizer="sgd_momentum", seed_loader=True, epochs=3,
         **tracker_options):
    data = pebbles()
    model = mlp()
    if optimizer == "adam":
        opt = torch.optim.Adam(model.parameters(), lr=0.01)
    else:
        opt = torch.optim.SGD(model.parameters(), lr=0.2, momentum=0.9, weight_decay=1e-3)
    sched = torch.optim.lr_scheduler.StepLR(opt, step_size=1, gamma=0.7)
    torch.manual_seed(123)
    batches = loader(data, shuffle=True, seed=5) if seed_loader else \
        DataLoader(data, batch_size=16, shuffle=True)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               shadows=shadows, **tracker_options) if track else None
    readings = train(model, opt, batches, epochs=epochs, tracker=tracker, scheduler=sched)
    return model, opt, readings, torch.get_rng_state()


@pytest.mark.parametrize("seed_loader", [True, False])
@pytest.mark.parametrize("optimizer", ["sgd_momentum", "adam"])
def test_main_run_is_bit_identical_with_and_without_tracker(seed_loader, optimizer):
    plain, plain_opt, _, plain_rng = _run(False, seed_loader=seed_loader, optimizer=optimizer)
    tracked, tracked_opt, readings, tracked_rng = _run(True, seed_loader=seed_loader,
                                                       optimizer=optimizer)
    assert torch.equal(flat(plain), flat(tracked))
    assert torch.equal(plain_rng, tracked_rng)   # the global RNG continues exactly as before
    for a, b in zip(plain_opt.state.values(), tracked_opt.state.values()):
        for key in a:
            assert torch.equal(torch.as_tensor(a[key]), torch.as_tensor(b[key]))
    assert readings[0].audit_divergence == 0.0
    assert all(d > 0 for d in readings[-1].divergence)


@pytest.mark.parametrize("engine", ["per_shadow", "batched"])
def test_null_swap_is_exactly_zero_with_dropout_and_momentum(engine):
    data = pebbles()
    model = mlp(dropout=0.3)
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               swap=[(7, data[7]), (30, data[30]), (41, data[41])], engine=engine)
    assert tracker.engine.name == engine
    with warnings.catch_warnings():
        warnings.simplefilter("error", LockstepWarning)
        readings = train(model, opt, loader(data), epochs=2, tracker=tracker)
    for reading in readings:
        assert reading.divergence == (0.0, 0.0, 0.0)
        assert reading.loss_difference_max == 0.0
    assert readings[0].audit_divergence == 0.0
    assert readings[1].audit_divergence is None  # the audit runs in the first epoch only


def _neighbour_by_hand(data: TensorDataset, index: int, replacement, lr=0.2, epochs=2):
    x, y = data.tensors
    x2, y2 = x.clone(), y.clone()
    x2[index], y2[index] = replacement
    neighbour = TensorDataset(x2, y2)
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=lr, momentum=0.5)
    torch.manual_seed(99)
    train(model, opt, loader(neighbour, seed=3), epochs=epochs)
    return model


@pytest.mark.parametrize("lazy_fork", [True, False])
def test_divergence_equals_a_model_trained_by_hand_on_the_neighbouring_dataset(lazy_fork):
    data, held_out = pebbles(), pebbles(count=20, seed=1)
    replacement = held_out[4]
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.2, momentum=0.5)
    torch.manual_seed(99)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               swap=[(11, replacement)], lazy_fork=lazy_fork)
    torch.manual_seed(99)   # the tracker fetched examples under preserved RNG; re-seed anyway
    readings = train(model, opt, loader(data, seed=3), epochs=2, tracker=tracker)
    by_hand = _neighbour_by_hand(data, 11, replacement)
    expected = float((flat(model) - flat(by_hand)).norm())
    assert expected > 1e-4
    assert readings[-1].divergence[0] == pytest.approx(expected, rel=1e-6, abs=1e-9)


def test_in_loop_augmentation_without_step_loss_breaks_lockstep_and_the_audit_says_so():
    data = pebbles()
    model = mlp(dropout=0.0)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1)

    def noisy(outputs, targets):
        return F.cross_entropy(outputs, targets)

    with pytest.warns(LockstepWarning, match="LOCKSTEP BROKEN"):
        for x, y in tracker.batches(loader(data)):
            opt.zero_grad()
            # in-loop noise the shadows cannot see:
            noisy(model(x + 0.1 * torch.randn_like(x)), y).backward()
            opt.step()
        reading = tracker.finish_epoch()
    assert reading.audit_divergence > 0
    assert any("lockstep broken" in note for note in reading.notes)


def test_step_loss_with_augmentation_accumulation_and_clipping_stays_exact():
    data = DictPebbles(pebbles())
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    accumulate = 2

    def step_loss(m, batch):
        x = batch["features"] + 0.05 * torch.randn_like(batch["features"])   # in-loop augmentation
        assert len(batch["tag"]) == x.shape[0]
        return F.cross_entropy(m(x), batch["label"]) / accumulate

    def clip(m):
        torch.nn.utils.clip_grad_norm_(m.parameters(), 0.5)

    tracker = StabilityTracker(model, opt, step_loss=step_loss, train_set=data, shadows=2,
                               replacements=DictPebbles(pebbles(count=30, seed=4)),
                               before_step=clip)
    with warnings.catch_warnings():
        warnings.simplefilter("error", LockstepWarning)
        for epoch in range(2):
            for k, batch in enumerate(tracker.batches(loader(data, seed=epoch))):
                if k % accumulate == 0:
                    opt.zero_grad()
                step_loss(model, batch).backward()
                if k % accumulate == accumulate - 1:
                    clip(model)
                    opt.step()
            reading = tracker.finish_epoch()
            if epoch == 0:
                assert reading.audit_divergence == 0.0
    assert tracker.steps == 2 * (len(data) // 16 // accumulate)
    assert reading.gap_estimate is not None and reading.gap_stderr is not None


def test_per_group_learning_rates_are_followed_and_batchnorm_buffers_are_per_shadow():
    data = pebbles()
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(5, 8), nn.BatchNorm1d(8), nn.ReLU(), nn.Linear(8, 2))
    opt = torch.optim.SGD([{"params": model[0].parameters(), "lr": 0.05},
                           {"params": list(model[1].parameters()) + list(model[3].parameters()),
                            "lr": 0.2}])
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2,
                               replacements=pebbles(count=10, seed=8))
    with warnings.catch_warnings():
        warnings.simplefilter("error", LockstepWarning)
        warnings.simplefilter("ignore", UserWarning)   # the "groups differ" notice
        readings = train(model, opt, loader(data), epochs=2, tracker=tracker,
                         scheduler=torch.optim.lr_scheduler.ExponentialLR(opt, 0.5))
    assert readings[0].audit_divergence == 0.0
    shadow = tracker.shadows[0]
    assert shadow.forked
    assert not torch.equal(shadow.model[1].running_mean, model[1].running_mean)
    # the shadows used the step sizes of the last step taken (the scheduler stepped after it)
    assert [g["lr"] for g in shadow.optimizer.param_groups] == [0.05 * 0.5, 0.2 * 0.5]
    step_sizes = tracker.history.step_sizes()
    assert step_sizes[0] == 0.2 and step_sizes[-1] == 0.1   # the largest group's step size


def test_evaluation_restores_training_mode_and_leaves_the_main_model_alone():
    data = pebbles()
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1)
    model.train()
    model[2].eval()   # a user's deliberate per-module choice must survive
    for x, y in tracker.batches(loader(data)):
        opt.zero_grad()
        F.cross_entropy(model(x), y).backward()
        opt.step()
    before = flat(model)
    tracker.finish_epoch()
    assert model.training and not model[2].training
    assert torch.equal(before, flat(model))


def test_sampling_with_replacement_and_custom_collate():
    data = pebbles()
    weights = torch.ones(len(data))
    weights[3] = 50.0   # index 3 is drawn often, several times per batch
    sampler = torch.utils.data.WeightedRandomSampler(weights, num_samples=64, replacement=True,
                                                     generator=torch.Generator().manual_seed(1))

    def collate(examples):
        xs, ys = zip(*examples)
        return torch.stack(xs), torch.stack(ys)

    batches = DataLoader(data, batch_size=16, sampler=sampler, collate_fn=collate)
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               swap=[(3, pebbles(count=5, seed=2)[0])])
    readings = train(model, opt, batches, epochs=1, tracker=tracker)
    counts = tracker.history.shadow_hits()[0]
    assert counts.max() >= 2   # repeated draws within one batch are counted
    assert readings[0].divergence[0] > 0
    assert readings[0].audit_divergence == 0.0


def test_default_probe_and_readings_fields():
    data, held_out = pebbles(), pebbles(count=40, seed=9)
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.3)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=3,
                               replacements=held_out, probe_size=20)
    reading = train(model, opt, loader(data), epochs=1, tracker=tracker)[0]
    probe = tracker._probe
    assert (probe.kinds == "out").sum() == 3 and (probe.kinds == "in").sum() == 3
    assert (probe.kinds == "train").sum() == 20 and (probe.kinds == "holdout").sum() == 20
    assert len(reading.divergence) == 3
    assert set(reading.layer_divergence) == {name for name, _ in model.named_parameters()}
    assert max(reading.layer_divergence.values()) <= max(reading.divergence) + 1e-12
    assert 0 <= reading.loss_difference_mean <= reading.loss_difference_max
    assert reading.train_loss is not None and reading.holdout_loss is not None
    # train_loss is the main model's mean loss over the training probe rows: recompute it
    rows = [data[i] for i in range(len(data))]
    assert reading.train_loss == pytest.approx(
        float(_mean_loss(model, [data[s.spec.index] for s in tracker.shadows] +
                         [rows[j] for j in _train_probe_indices(tracker)])), rel=1e-5)


def _train_probe_indices(tracker):
    import numpy as np
    rng = np.random.default_rng(tracker.seed + 1)
    return np.sort(rng.choice(tracker.n, size=min(tracker.probe_size, tracker.n), replace=False))


def _mean_loss(model, examples):
    xs = torch.stack([e[0] for e in examples])
    ys = torch.stack([e[1] for e in examples])
    model.eval()
    with torch.no_grad():
        value = F.cross_entropy(model(xs), ys)
    model.train()
    return value


def test_duplicate_replacements_make_the_gap_estimate_not_applicable():
    data = pebbles()
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2)
    reading = train(model, opt, loader(data), epochs=1, tracker=tracker)[0]
    assert reading.gap_estimate is None and reading.holdout_loss is None
    assert any("duplicates" in note for note in reading.notes)
    assert all(s.spec.origin == "train" for s in tracker.shadows)


def test_gap_estimate_is_the_mean_of_per_shadow_replace_one_samples():
    data, held_out = pebbles(), pebbles(count=40, seed=9)
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.5)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=3,
                               replacements=held_out)
    reading = train(model, opt, loader(data), epochs=2, tracker=tracker)[-1]
    samples = []
    for shadow in tracker.shadows:
        out_example, in_example = data[shadow.spec.index], shadow.spec.replacement
        main_out = _mean_loss(model, [out_example])
        main_in = _mean_loss(model, [in_example])
        shadow_out = _mean_loss(shadow.model, [out_example])
        shadow_in = _mean_loss(shadow.model, [in_example])
        samples.append(0.5 * ((shadow_out - main_out) + (main_in - shadow_in)))
    samples = torch.stack(samples).double()
    assert reading.gap_estimate == pytest.approx(float(samples.mean()), rel=1e-5, abs=1e-8)
    assert reading.gap_stderr == pytest.approx(float(samples.std() / 3 ** 0.5), rel=1e-4)


class NumpyNoise(nn.Module):
    """A model whose forward draws from NumPy's global RNG (bad practice, but it happens)."""

    def __init__(self) -> None:
        super().__init__()
        self.inner = mlp(dropout=0.0)

    def forward(self, x):
        import numpy as np
        jitter = torch.from_numpy(np.random.normal(0, 0.01, size=x.shape).astype("float32"))
        return self.inner(x + jitter)


def test_host_rng_drawn_by_the_model_is_detected_and_the_run_stays_unchanged():
    import numpy as np

    def run(track):
        np.random.seed(3)
        data = pebbles()
        torch.manual_seed(0)
        model = NumpyNoise()
        opt = torch.optim.SGD(model.parameters(), lr=0.1)
        tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                                   shadows=1, audit=False) if track else None
        train(model, opt, loader(data), epochs=2, tracker=tracker)
        return flat(model), np.random.random()

    plain = run(False)
    with pytest.warns(UserWarning, match="NumPy's global RNG"):
        tracked = run(True)
    assert torch.equal(plain[0], tracked[0]) and plain[1] == tracked[1]


class LateNumpyNoise(NumpyNoise):
    """Draws from NumPy's global RNG only once switched on (say, augmentation after warm-up)."""

    noisy = False

    def forward(self, x):
        return super().forward(x) if self.noisy else self.inner(x)


def test_host_rng_draws_that_start_after_the_first_epoch_are_detected_by_sampling():
    data = pebbles(count=512)
    torch.manual_seed(0)
    model = LateNumpyNoise()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1,
                               audit=False, engine="per_shadow")
    with warnings.catch_warnings():
        warnings.simplefilter("error")           # epoch 1: nothing drawn, nothing said
        train(model, opt, loader(data), epochs=1, tracker=tracker)
    assert not tracker.host_rng.used
    for shadow in tracker.shadows:
        shadow.model.noisy = True
    model.noisy = True
    with pytest.warns(UserWarning, match="NumPy's global RNG"):
        train(model, opt, loader(data), epochs=1, tracker=tracker)   # 32 steps: one sample
    assert tracker.host_rng.used


def test_time_spent_accounts_for_the_tracker_by_part():
    data = pebbles()
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2,
                               engine="per_shadow")
    spent = tracker.time_spent
    assert spent.total == 0.0
    start = time.perf_counter()
    train(model, opt, loader(data), epochs=2, tracker=tracker)
    elapsed = time.perf_counter() - start
    parts = (spent.recording, spent.step_hooks, spent.shadow_steps, spent.epoch_end)
    assert all(part > 0.0 for part in parts)
    assert spent.bookkeeping == pytest.approx(spent.total - spent.shadow_steps)
    assert spent.total < elapsed   # the user's own forward, backward and step are not counted
    # an epoch-end only call (here a repeated one, which warns) moves no other part
    before = (spent.recording, spent.step_hooks, spent.shadow_steps)
    with pytest.warns(UserWarning, match="called again"):
        tracker.finish_epoch()
    assert (spent.recording, spent.step_hooks, spent.shadow_steps) == before


def test_a_held_out_set_used_up_by_the_swaps_reports_its_rows_count_and_error():
    # three shadows, three held-out examples: every one is swapped in, so no held-out example is
    # left for the full evaluation and the held-out loss comes from the probe's rows (the
    # replacements, which the main run never trains on); it must say how many and how noisy
    data, held_out = pebbles(96), pebbles(3, seed=5)
    model = mlp(dropout=0.0)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, optimizer, loss_fn=F.cross_entropy, train_set=data,
                               shadows=3, replacements=held_out, seed=0)
    reading = train(model, optimizer, loader(data), epochs=1, tracker=tracker)[-1]
    with torch.no_grad():   # independent: torch's per-example losses, numpy's mean and std
        losses = F.cross_entropy(model(held_out.tensors[0]), held_out.tensors[1],
                                 reduction="none").double().numpy()
    assert sorted(s.spec.source_index for s in tracker.shadows) == [0, 1, 2]
    assert reading.holdout_count == 3
    assert reading.holdout_loss == pytest.approx(losses.mean(), rel=1e-6)
    assert reading.holdout_stderr == pytest.approx(losses.std(ddof=1) / math.sqrt(3), rel=1e-6)
    assert any("every held-out example is a shadow's replacement" in n for n in reading.notes)
    reason = tracker.advise().criterion_named("holdout_loss").reason
    assert "(standard error) on 3 held-out examples" in reason
