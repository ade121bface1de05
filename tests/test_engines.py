"""The shadow engines: lazy fork exactness, batched shadows against per-shadow ones, fallbacks.

Tolerance for "batched matches per-shadow" (BATCHED_RELATIVE): the two engines run the same
float32 arithmetic except for the kernels (batched matmuls and reductions instead of unbatched
ones), so they differ by a few units in the last place per operation. float32's unit roundoff is
2**-24 ~ 6e-8 (IEEE 754 binary32; common practice). Over the 18 steps of these runs that compounds
to the relative gaps observed: 4.3e-7 (SGD+momentum), 4.6e-7 (Adam), 4.5e-7 (RMSprop), 5.7e-7
(Adagrad); up to 2.7e-6 in other trial settings. 1e-4 leaves a wide margin, while a wrong row, a
missed hit or a different dropout mask moves a divergence by order one: the negative control in
the same test (other swapped examples) differs by 0.54-0.75.
"""

from __future__ import annotations

import itertools
import math
import warnings

import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.func import vmap

from sgdstab import LockstepWarning, ShadowFaultWarning, StabilityTracker
from sgdstab.shadows.batched import BatchedEngine
from sgdstab.shadows.engines import (
    ENGINES,
    EngineFallbackWarning,
    batched_refusal,
    make_engine,
    replayed_dropout_kinds,
)
from sgdstab.shadows.lockstep import LockstepError, PerShadowEngine

from ._toy import flat, loader, mlp, pebbles, train

BATCHED_RELATIVE = 1e-4
BATCHED_ABSOLUTE = 1e-7


def _optimizer(kind: str, model: nn.Module) -> torch.optim.Optimizer:
    if kind == "sgd_momentum":
        return torch.optim.SGD(model.parameters(), lr=0.2, momentum=0.9, weight_decay=1e-3)
    if kind == "adam":
        return torch.optim.Adam(model.parameters(), lr=0.01)
    if kind == "rmsprop":
        return torch.optim.RMSprop(model.parameters(), lr=0.01, momentum=0.5, centered=True)
    if kind == "adagrad":
        return torch.optim.Adagrad(model.parameters(), lr=0.1)
    raise ValueError(kind)


def _run(engine: str, *, optimizer: str = "sgd_momentum", epochs: int = 3, shadows: int = 4,
         dropout: float = 0.3, make_model=None, lazy_fork: bool = True, swap=None,
         before_step=None, scheduler: bool = True, track: bool = True, **tracker_options):
    """A tracked (or plain) run on the pebble toy; returns model, optimizer, readings, tracker."""
    data = pebbles()
    torch.manual_seed(0)
    model = make_model() if make_model is not None else mlp(dropout=dropout)
    opt = _optimizer(optimizer, model)
    sched = torch.optim.lr_scheduler.StepLR(opt, step_size=1, gamma=0.6) if scheduler else None
    torch.manual_seed(123)
    tracker = None
    if track:
        tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                                   shadows=shadows, swap=swap, engine=engine,
                                   lazy_fork=lazy_fork, before_step=before_step,
                                   **tracker_options)
    clip = 0.5 if before_step is not None else None
    readings = train(model, opt, loader(data, seed=5), epochs=epochs, tracker=tracker,
                     scheduler=sched, clip=clip)
    return model, opt, readings, tracker


def _relative_gap(a, b) -> float:
    return max(abs(x - y) / max(abs(x), BATCHED_ABSOLUTE)
               for ra, rb in zip(a, b) for x, y in zip(ra.divergence, rb.divergence))


# -- lazy fork ----------------------------------------------------------------------------------
@pytest.mark.parametrize("engine", ["per_shadow", "batched"])
@pytest.mark.parametrize("optimizer", ["sgd_momentum", "adam"])
def test_lazy_fork_gives_the_eager_divergences_bit_for_bit(engine, optimizer):
    """Dropout 0.3, momentum (or Adam) and a step-decay scheduler; shadows fork at several steps."""
    _, _, lazy, lazy_tracker = _run(engine, optimizer=optimizer, lazy_fork=True, shadows=5)
    _, _, eager, eager_tracker = _run(engine, optimizer=optimizer, lazy_fork=False, shadows=5)
    assert lazy_tracker.engine.name == eager_tracker.engine.name == engine
    forked_at = [s.forked_at for s in lazy_tracker.shadows]
    assert len(set(forked_at)) > 1 and max(forked_at) > 0      # really forked mid-run
    assert all(s.forked_at == 0 for s in eager_tracker.shadows)
    for a, b in zip(lazy, eager):
        assert a.divergence == b.divergence                     # float equality, not approx
        assert a.layer_divergence == b.layer_divergence
        assert a.loss_difference_max == b.loss_difference_max
    assert all(d > 0 for d in lazy[-1].divergence)
    for s, t in zip(lazy_tracker.shadows, eager_tracker.shadows):
        assert torch.equal(flat(s.model), flat(t.model))


def test_a_shadow_not_yet_forked_costs_nothing_in_the_batched_engine():
    data = pebbles()
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=3,
                               swap=[(90, data[3]), (91, data[4]), (92, data[5])], audit=False,
                               engine="batched")
    batches = loader(data, shuffle=False)   # indices 90..92 come in the last batch
    for k, (x, y) in enumerate(tracker.batches(batches)):
        opt.zero_grad()
        F.cross_entropy(model(x), y).backward()
        opt.step()
        if k < 5:
            assert tracker.engine.reference_parameters() is None   # nothing runs yet
            assert tracker.engine._stack is None
    assert [s.forked_at for s in tracker.shadows] == [5, 5, 5]
    assert len(tracker.engine._stack.members) == 4                 # reference + 3 shadows


# -- batched against per-shadow -----------------------------------------------------------------
@pytest.mark.parametrize("optimizer", ["sgd_momentum", "adam", "rmsprop", "adagrad"])
def test_batched_divergences_match_the_per_shadow_engine(optimizer):
    _, _, per_shadow, _ = _run("per_shadow", optimizer=optimizer)
    _, _, batched, tracker = _run("batched", optimizer=optimizer)
    assert tracker.engine.name == "batched"
    assert all(d > 1e-3 for d in batched[-1].divergence)
    assert _relative_gap(per_shadow, batched) < BATCHED_RELATIVE
    for a, b in zip(per_shadow, batched):
        assert b.loss_difference_max == pytest.approx(a.loss_difference_max, rel=1e-3, abs=1e-6)
    # Negative control: the same run with other swapped examples is far outside the tolerance.
    _, _, other, _ = _run("per_shadow", optimizer=optimizer, seed=1)
    assert _relative_gap(per_shadow, other) > 100 * BATCHED_RELATIVE


def test_batched_engine_honours_before_step_and_gradient_sync():
    """A gradient hook and clipping applied to the main run and, through the engine, to every
    run it steps (the reference too) give the per-shadow engine's divergences."""
    calls = {"sync": 0}

    def halve(module, finite):
        calls["sync"] += 1
        for p in module.parameters():
            p.grad.mul_(0.5)
        return finite

    def clip(module):
        torch.nn.utils.clip_grad_norm_(module.parameters(), 0.5)

    results = {}
    for engine in ("per_shadow", "batched"):
        data = pebbles()
        torch.manual_seed(0)
        model = mlp(dropout=0.2)
        opt = torch.optim.SGD(model.parameters(), lr=0.3, momentum=0.5)
        tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                                   shadows=3, engine=engine, before_step=clip, audit=False,
                                   lazy_fork=False)
        tracker.engine.gradient_sync = halve
        readings = []
        for _ in range(2):
            for x, y in tracker.batches(loader(data)):
                opt.zero_grad()
                F.cross_entropy(model(x), y).backward()
                for p in model.parameters():
                    p.grad.mul_(0.5)
                clip(model)
                calls["sync"] = 0
                opt.step()
                assert calls["sync"] == 3 + (engine == "batched")   # + the reference
            readings.append(tracker.finish_epoch())
        assert tracker.engine.name == engine
        results[engine] = readings
    assert all(d > 1e-3 for d in results["batched"][-1].divergence)
    assert _relative_gap(results["per_shadow"], results["batched"]) < BATCHED_RELATIVE


def test_audit_reads_exactly_zero_against_the_reference_in_batched_mode():
    _, _, readings, tracker = _run("batched", shadows=4, epochs=1)
    engine = tracker.engine
    assert engine.name == "batched" and isinstance(engine, BatchedEngine)
    assert readings[0].audit_divergence == 0.0
    assert not any("inconclusive" in note for note in readings[0].notes)   # the audit forked
    reference = engine.reference_parameters()
    assert reference is not None and engine.reference_follows_main()
    main = dict(tracker.model.named_parameters())
    with torch.no_grad():
        drift = math.sqrt(sum(float(((main[n].double() - reference[n].double()) ** 2).sum())
                              for n in main))
    assert drift < 1e-4                                         # rounding only


def test_null_swaps_stay_exactly_on_the_reference_in_batched_mode():
    data = pebbles()
    _, _, readings, tracker = _run("batched", swap=[(7, data[7]), (30, data[30]),
                                                    (55, data[55])], epochs=2)
    assert tracker.engine.name == "batched"
    for reading in readings:
        assert reading.divergence == (0.0, 0.0, 0.0)
    reference = tracker.engine.reference_parameters()
    for shadow in tracker.shadows:
        own = tracker.engine.parameters_of(shadow)
        assert all(torch.equal(own[n], reference[n]) for n in reference)


def test_a_loop_the_shadows_do_not_repeat_still_breaks_the_audit_in_batched_mode():
    """The reference shares the shadows' loss, so it must also be checked against the main run."""
    data = pebbles()
    model = mlp(dropout=0.0)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=3,
                               engine="batched")
    with pytest.warns(LockstepWarning, match="LOCKSTEP BROKEN"):
        for x, y in tracker.batches(loader(data)):
            opt.zero_grad()
            (2.0 * F.cross_entropy(model(x), y)).backward()   # a loss scale the shadows miss
            opt.step()
        reading = tracker.finish_epoch()
    assert reading.audit_divergence > 1e-3


@pytest.mark.parametrize("optimizer", ["sgd_momentum", "adam"])
def test_main_run_is_bit_identical_with_and_without_the_batched_tracker(optimizer):
    plain, plain_opt, _, _ = _run("batched", optimizer=optimizer, track=False)
    plain_rng = torch.get_rng_state()
    tracked, tracked_opt, readings, tracker = _run("batched", optimizer=optimizer)
    assert tracker.engine.name == "batched"
    assert torch.equal(flat(plain), flat(tracked))
    assert torch.equal(plain_rng, torch.get_rng_state())
    for a, b in zip(plain_opt.state.values(), tracked_opt.state.values()):
        for key in a:
            assert torch.equal(torch.as_tensor(a[key]), torch.as_tensor(b[key]))
    assert readings[0].audit_divergence == 0.0


def test_batched_shadow_model_is_a_module_over_its_current_parameters():
    _, _, _, tracker = _run("batched", epochs=1)
    for shadow in tracker.shadows:
        module = shadow.model
        own = tracker.engine.parameters_of(shadow)
        assert all(torch.equal(p, own[n]) for n, p in module.named_parameters())
        assert module is not tracker.model


# -- dropout masks ------------------------------------------------------------------------------
@pytest.mark.parametrize("dropout", [F.dropout, F.dropout2d, F.alpha_dropout])
def test_vmap_same_randomness_draws_the_unbatched_dropout_mask(dropout):
    """The fact the batched engine relies on, checked against torch's own unbatched dropout."""
    torch.manual_seed(5)
    x = torch.randn(16, 6, 4, 4)
    start = torch.get_rng_state()
    plain = dropout(x, 0.4, True)
    torch.set_rng_state(start)
    batched = vmap(lambda w, x: dropout(x * w, 0.4, True), in_dims=(0, None),
                   randomness="same")(torch.ones(3, 1, 1, 1, 1), x)
    assert not torch.equal(plain, x)                            # dropout did drop something
    for copy_ in batched:
        assert torch.equal(copy_, plain)
    assert {nn.Dropout, nn.Dropout2d, nn.AlphaDropout} <= replayed_dropout_kinds()


# -- fallbacks ----------------------------------------------------------------------------------
class _PlainSubclass(torch.optim.SGD):
    """An optimizer class the batched engine does not know (it could do anything)."""


def test_fallback_notices_for_batchnorm_and_an_unknown_optimizer():
    def batchnorm():
        return nn.Sequential(nn.Linear(5, 8), nn.BatchNorm1d(8), nn.ReLU(), nn.Linear(8, 2))

    with pytest.warns(EngineFallbackWarning, match="BatchNorm1d.*running statistics"):
        _, _, _, tracker = _run("batched", make_model=batchnorm, epochs=1)
    assert isinstance(tracker.engine, PerShadowEngine)

    model = mlp()
    with pytest.warns(EngineFallbackWarning, match="_PlainSubclass"):
        engine = make_engine("batched", model, _PlainSubclass(model.parameters(), lr=0.1),
                             lambda m, b: m(b).sum(), None, shadows=4)
    assert isinstance(engine, PerShadowEngine)
    with pytest.warns(EngineFallbackWarning, match="in-place dropout"):
        inplace = nn.Sequential(nn.Linear(5, 4), nn.Dropout(0.2, inplace=True))
        make_engine("batched", inplace, torch.optim.SGD(inplace.parameters(), lr=0.1),
                    lambda m, b: m(b).sum(), None, shadows=8)


def test_element_wise_optimizers_are_batched_without_notice():
    for kind in (torch.optim.SGD, torch.optim.Adam, torch.optim.AdamW, torch.optim.RMSprop,
                 torch.optim.Adagrad):
        model = mlp()
        optimizer = kind(model.parameters(), lr=0.01)
        assert batched_refusal(model, optimizer) == ""
        with warnings.catch_warnings():
            warnings.simplefilter("error", EngineFallbackWarning)
            engine = make_engine("batched", model, optimizer, lambda m, b: m(b).sum(), None,
                                 shadows=8)
        assert isinstance(engine, BatchedEngine)


class _ReadsAValue(nn.Module):
    """Data-dependent Python control flow: vmap cannot trace ``.item()``."""

    def __init__(self) -> None:
        super().__init__()
        self.layer = nn.Linear(5, 2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = self.layer(x)
        return out * 2 if out.sum().item() > 1e9 else out


def test_a_model_vmap_cannot_trace_falls_back_at_its_first_step_and_stays_exact():
    _, _, per_shadow, _ = _run("per_shadow", make_model=_ReadsAValue)
    with pytest.warns(EngineFallbackWarning, match="vmap cannot run this model"):
        _, _, batched, tracker = _run("batched", make_model=_ReadsAValue)
    assert tracker.engine.name == "per_shadow" and tracker.engine.fallback_reason
    assert tracker.engine.reference_parameters() is None     # fell back before any batched step
    for a, b in zip(per_shadow, batched):
        assert a.divergence == b.divergence
    assert batched[0].audit_divergence == 0.0


class _CountsCalls(nn.Module):
    """Not a pure function of its parameters: the output depends on how often it was called."""

    def __init__(self) -> None:
        super().__init__()
        self.layer = nn.Linear(5, 2)
        self.calls = 0

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        self.calls += 1
        return self.layer(x) * (1.0 + 0.5 * (self.calls % 2))


def test_a_batched_forward_that_disagrees_with_the_unbatched_one_falls_back():
    with pytest.warns(EngineFallbackWarning, match="does not reproduce the unbatched one"), \
            pytest.warns(LockstepWarning):   # per-shadow stepping cannot follow it either
        _, _, _, tracker = _run("batched", make_model=_CountsCalls, epochs=1)
    assert tracker.engine.name == "per_shadow"


def test_a_mid_run_fallback_keeps_measuring_against_the_reference():
    """Strings that differ between shadows cannot be batched: the engine moves every run,
    reference included, into its own module at the first such step and goes on exactly."""
    from ._toy import DictPebbles

    results = {}
    for engine in ("per_shadow", "batched"):
        data = DictPebbles(pebbles())
        torch.manual_seed(0)
        model = mlp(dropout=0.2)
        opt = torch.optim.Adam(model.parameters(), lr=0.01)

        def step_loss(m, batch):
            return F.cross_entropy(m(batch["features"]), batch["label"])

        tracker = StabilityTracker(model, opt, step_loss=step_loss, train_set=data, shadows=3,
                                   replacements=DictPebbles(pebbles(count=30, seed=4)),
                                   engine=engine, lazy_fork=False)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            readings = []
            for _ in range(2):
                for batch in tracker.batches(loader(data)):
                    opt.zero_grad()
                    step_loss(model, batch).backward()
                    opt.step()
                readings.append(tracker.finish_epoch())
        notices = [w for w in caught if issubclass(w.category, EngineFallbackWarning)]
        if engine == "batched":
            assert len(notices) == 1 and "non-tensor values" in str(notices[0].message)
            assert tracker.engine.reference_parameters() is not None   # steps were batched
        results[engine] = readings
        assert readings[0].audit_divergence == 0.0
    assert _relative_gap(results["per_shadow"], results["batched"]) < BATCHED_RELATIVE


def test_a_non_finite_shadow_is_frozen_in_batched_mode_as_in_per_shadow_mode():
    data = pebbles()
    bad = (torch.full((5,), float("nan")), torch.tensor(1))
    swap = [(3, bad), (40, data[41]), (70, data[71])]
    out = {}
    for engine in ("per_shadow", "batched"):
        with pytest.warns(ShadowFaultWarning, match="shadow_0"):
            _, _, readings, tracker = _run(engine, swap=swap, epochs=2)
        assert tracker.engine.name == engine
        assert [s.fault is not None for s in tracker.shadows] == [True, False, False]
        assert math.isnan(readings[-1].divergence[0])
        out[engine] = [r.divergence[1:] for r in readings]
    for a, b in zip(out["per_shadow"], out["batched"]):
        for x, y in zip(a, b):
            assert y == pytest.approx(x, rel=BATCHED_RELATIVE)


def test_batched_state_round_trips_through_torch_save_and_resumes_exactly(tmp_path):
    """Stop after part of an epoch, rebuild everything from saved state and continue: the same
    divergences as the uninterrupted run, bit for bit, including shadows that fork after the
    restart (they copy the restored reference run)."""
    data = pebbles()
    swap = [(5, data[6]), (50, data[51]), (94, data[93])]

    def build(model_state=None, opt_state=None):
        torch.manual_seed(0)
        model = mlp(dropout=0.3)
        opt = torch.optim.Adam(model.parameters(), lr=0.01)
        if model_state is not None:
            model.load_state_dict(model_state)
            opt.load_state_dict(opt_state)
        tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                                   swap=swap, engine="batched", audit=False)
        return model, opt, tracker

    def steps(model, opt, tracker, seed, count):
        torch.manual_seed(seed)
        for x, y in itertools.islice(tracker.batches(loader(data, shuffle=False)), count):
            opt.zero_grad()
            F.cross_entropy(model(x), y).backward()
            opt.step()
        return tracker.finish_epoch()

    model, opt, tracker = build()
    steps(model, opt, tracker, 1, 3)                           # examples 0..47
    assert [s.forked for s in tracker.shadows] == [True, False, False]
    states = [tracker.engine.shadow_state(s) for s in tracker.shadows]
    torch.save({"model": model.state_dict(), "opt": opt.state_dict(), "shadows": states},
               tmp_path / "state.pt")
    straight = steps(model, opt, tracker, 2, 6)

    saved = torch.load(tmp_path / "state.pt", weights_only=True)
    model2, opt2, tracker2 = build(saved["model"], saved["opt"])
    for shadow, state in zip(tracker2.shadows, saved["shadows"]):
        tracker2.engine.load_shadow_state(shadow, state)
    resumed = steps(model2, opt2, tracker2, 2, 6)
    assert all(d > 0 for d in straight.divergence)
    assert resumed.divergence == straight.divergence
    assert torch.equal(flat(model2), flat(model))


# -- the factory --------------------------------------------------------------------------------
def test_make_engine_choices(monkeypatch):
    assert ENGINES == ("auto", "stacked", "batched", "per_shadow")
    model = nn.Sequential(nn.Linear(5, 4), nn.BatchNorm1d(4), nn.Linear(4, 2))  # not stacked
    opt = torch.optim.SGD(model.parameters(), lr=0.1)

    def loss(m, b):
        return m(b).sum()

    assert isinstance(make_engine("per_shadow", model, opt, loss, None, shadows=9),
                      PerShadowEngine)
    monkeypatch.delenv("SGDSTAB_AUTO_ENGINE", raising=False)
    # auto never takes the vmap engine (its audit need not be exact); this model is not stacked
    engine = make_engine("auto", model, opt, loss, None, shadows=9, loss_fn=F.cross_entropy)
    assert isinstance(engine, PerShadowEngine)
    assert "BatchNorm1d" in engine.choice and "vmap" in engine.choice
    plain = mlp()
    assert isinstance(make_engine("batched", plain, torch.optim.SGD(plain.parameters(), lr=0.1),
                                  loss, None, shadows=1), BatchedEngine)
    with pytest.raises(LockstepError, match="engine must be one of"):
        make_engine("vectorised", model, opt, loss, None, shadows=2)


class _TinyConv(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(0)
        self.conv = nn.Conv1d(1, 3, 3, padding=1)
        self.head = nn.Linear(15, 2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(torch.relu(self.conv(x.unsqueeze(1))).flatten(1))


def test_auto_steps_convolutions_one_by_one_because_batched_ones_need_not_be_exact(monkeypatch):
    data = pebbles(count=64)
    model = _TinyConv()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    monkeypatch.delenv("SGDSTAB_AUTO_ENGINE", raising=False)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               shadows=8, engine="auto")
    assert isinstance(tracker.engine, PerShadowEngine)
    assert "_TinyConv" in tracker.engine_choice and "vmap" in tracker.engine_choice
    reading = train(model, opt, loader(data), epochs=1, tracker=tracker)[0]
    assert reading.audit_divergence == 0.0
    # What auto avoids: batched stepping of this Conv1d drifts on the null swap (measured 3e-8
    # with torch 2.13 CPU); the audit reports it instead of passing it off as exact.
    model, data = _TinyConv(), pebbles(count=64)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                               shadows=8, engine="batched")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        reading = train(model, opt, loader(data), epochs=1, tracker=tracker)[0]
    if reading.audit_divergence != 0.0:
        assert any(issubclass(w.category, LockstepWarning) for w in caught)
