"""The stacked engine (batched products, explicit backward) and engine="auto"'s timed choice.

Reference for the stacked engine's arithmetic: the per-shadow engine, i.e. torch's autograd on
each shadow as its own module. The two differ only by rounding (batched products and a
hand-ordered backward instead of unbatched kernels); float32's unit roundoff is 2**-24 ~ 6e-8
(IEEE 754 binary32; common practice), and over these runs (30-40 steps) the divergences agreed
to 1.2e-7 - 1.5e-6 relative in trials. STACKED_RELATIVE = 1e-5 leaves room for other BLAS
builds while a wrong row, a missed swap or a wrong derivative moves a divergence by order one
(the negative control below). The null swap and the audit must read exactly 0.0.
"""

from __future__ import annotations

import itertools
import warnings

import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import StabilityTracker
from sgdstab.shadows.engines import EngineFallbackWarning, make_engine
from sgdstab.shadows.lockstep import PerShadowEngine
from sgdstab.shadows.stacked import AUTO_OVERRIDE_VARIABLE, StackedEngine, stacked_refusal

from ._optimizers import _optimizer

STACKED_RELATIVE = 1e-5


def _parcels(count: int = 160, features: int = 12, classes: int = 3, seed: int = 0,
             regression: bool = False) -> TensorDataset:
    """Generated sensor readings of parcels and the chute each belongs in (invented scenario)."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, features, generator=g)
    if regression:
        return TensorDataset(x, x[:, :classes] * 0.5 + 0.1 * torch.randn(count, classes,
                                                                           generator=g))
    y = (x[:, 0] + x[:, 1] * x[:, 2] > 0).long() + (x[:, 3] > 1).long()
    return TensorDataset(x, y.clamp(max=classes - 1))


def _chain(activation: type[nn.Module], features: int = 12, classes: int = 3,
           flatten: bool = False, dropout: float = 0.0) -> nn.Module:
    torch.manual_seed(1)
    layers = [nn.Flatten()] if flatten else []
    layers += [nn.Linear(features, 16), activation(), nn.Linear(16, 16), activation(),
               *([nn.Dropout(dropout)] if dropout else []), nn.Linear(16, classes)]
    return nn.Sequential(*layers)


def _run(engine: str, *, activation=nn.ReLU, optimizer="nesterov", loss=F.cross_entropy,
         data=None, epochs=2, flatten=False, model=None, dropout=0.0, **options):
    data = _parcels() if data is None else data
    model = _chain(activation, flatten=flatten, dropout=dropout) if model is None else model
    torch.manual_seed(11)   # the dropout masks' stream
    opt = _optimizer(optimizer, model)
    tracker = StabilityTracker(model, opt, loss_fn=loss, train_set=data, engine=engine,
                               **{"shadows": 5, **options})
    batches = DataLoader(data, batch_size=16, shuffle=True,
                         generator=torch.Generator().manual_seed(3))
    readings = []
    for _ in range(epochs):
        for x, y in tracker.batches(batches):
            opt.zero_grad()
            loss(model(x), y).backward()
            opt.step()
        readings.append(tracker.finish_epoch())
    return model, tracker, readings


def _relative_gap(a, b) -> float:
    return max(abs(x - y) / max(abs(x), 1e-9)
               for ra, rb in zip(a, b) for x, y in zip(ra.divergence, rb.divergence))


def _smooth_l1_sum(outputs, targets):   # a loss the stacked engine does not know by name
    return F.smooth_l1_loss(outputs, targets, reduction="sum") / outputs.shape[0]


@pytest.mark.parametrize(("activation", "optimizer", "loss", "regression", "flatten", "dropout"), [
    (nn.ReLU, "nesterov", F.cross_entropy, False, False, 0.0),
    (nn.Tanh, "dampening", nn.CrossEntropyLoss(label_smoothing=0.1), False, False, 0.0),
    (nn.GELU, "adam", F.mse_loss, True, False, 0.0),
    (nn.LeakyReLU, "plain", _smooth_l1_sum, True, True, 0.0),
    (nn.Sigmoid, "nesterov", F.cross_entropy, False, False, 0.0),
    (nn.SiLU, "plain", nn.MSELoss(), True, False, 0.0),
    (nn.ELU, "adam", F.cross_entropy, False, False, 0.0),
    (nn.ReLU, "nesterov", F.cross_entropy, False, False, 0.3),
])
def test_stacked_divergences_match_the_per_shadow_engine(activation, optimizer, loss,
                                                         regression, flatten, dropout):
    data = _parcels(regression=regression)
    if flatten:
        data = TensorDataset(data.tensors[0].reshape(-1, 2, 6), data.tensors[1])
    options = {"activation": activation, "optimizer": optimizer, "loss": loss, "data": data,
               "flatten": flatten, "dropout": dropout}
    per, per_tracker, expected = _run("per_shadow", **options)
    stacked, tracker, got = _run("stacked", **options)
    assert tracker.engine.name == "stacked" and isinstance(tracker.engine, StackedEngine)
    assert per_tracker.engine.name == "per_shadow"
    assert all(d > 1e-3 for d in got[-1].divergence)
    assert _relative_gap(expected, got) < STACKED_RELATIVE
    assert got[0].audit_divergence == 0.0 and expected[0].audit_divergence == 0.0
    assert torch.equal(torch.cat([p.flatten() for p in per.parameters()]),
                       torch.cat([p.flatten() for p in stacked.parameters()]))   # main run
    if activation is nn.ReLU and not dropout:
        # negative control: other swapped examples give clearly different divergences
        _, _, other = _run("stacked", seed=7, **options)
        assert _relative_gap(expected, other) > 1e-2


def test_null_swaps_read_exactly_zero_in_the_stacked_engine():
    data = _parcels()
    _, tracker, readings = _run("stacked", swap=[(7, data[7]), (30, data[30]), (55, data[55])])
    assert tracker.engine.name == "stacked"
    for reading in readings:
        assert reading.divergence == (0.0, 0.0, 0.0)
    assert readings[0].audit_divergence == 0.0
    assert tracker.engine.reference_follows_main() is True


@pytest.mark.parametrize("engine", ["stacked", "per_shadow", "auto"])
def test_softmax_audit_reads_exactly_zero_over_seeds(engine, monkeypatch):
    """A 4-feature softmax regression (scikit-learn's bundled iris data: 150 flowers, 4
    measurements, 3 species) over several seeds: the null-swap audit must read exactly 0.0 in
    the engines auto may choose (the vmap engine was reported to drift 2e-17 - 2e-16 on 3 of 22
    such runs elsewhere, which is why auto never picks it)."""
    datasets = pytest.importorskip("sklearn.datasets")
    features, labels = datasets.load_iris(return_X_y=True)
    x = torch.tensor(features, dtype=torch.float32)
    x = (x - x.mean(0)) / x.std(0)
    data = TensorDataset(x, torch.tensor(labels))
    monkeypatch.delenv(AUTO_OVERRIDE_VARIABLE, raising=False)
    for seed in range(6):
        torch.manual_seed(seed)
        model = nn.Linear(4, 3)
        _, tracker, readings = _run(engine, model=model, data=data, optimizer="plain",
                                    epochs=1, shadows=8, seed=seed)
        assert readings[0].audit_divergence == 0.0, (seed, tracker.engine_choice)
        assert not any("inconclusive" in note for note in readings[0].notes)


def test_ineligible_models_fall_back_with_a_notice():
    data = _parcels()
    model = nn.Sequential(nn.Linear(12, 8), nn.BatchNorm1d(8), nn.Linear(8, 3))
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    assert "BatchNorm1d" in stacked_refusal(model, opt, F.cross_entropy)
    with pytest.warns(EngineFallbackWarning, match="BatchNorm1d"):
        tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                                   engine="stacked")
    assert isinstance(tracker.engine, PerShadowEngine)
    assert "BatchNorm1d" in tracker.engine_choice
    for odd in (nn.Dropout2d(0.1), nn.Softmax(dim=1), nn.Conv1d(1, 1, 1)):
        assert type(odd).__name__ in stacked_refusal(
            nn.Sequential(nn.Linear(12, 8), odd), opt, F.cross_entropy)
    plain = _chain(nn.ReLU)
    plain_opt = torch.optim.SGD(plain.parameters(), lr=0.1)
    assert "step_loss" in stacked_refusal(plain, plain_opt, None)
    assert stacked_refusal(plain, plain_opt, F.cross_entropy) == ""
    handle = plain[0].register_forward_hook(lambda *args: None)
    assert "hooks" in stacked_refusal(plain, plain_opt, F.cross_entropy)
    handle.remove()
    assert "LBFGS" not in stacked_refusal(plain, torch.optim.Adam(plain.parameters()),
                                          F.cross_entropy)


def test_a_batch_the_stacked_engine_cannot_read_falls_back_exactly():
    """Dict batches need a step_loss, which the stacked engine refuses up front; a batch whose
    inputs do not fit the first layer as a matrix falls back at its first step, with a warning,
    and the shadows continue one by one from the same state."""
    data = TensorDataset(torch.randn(64, 3, 4), torch.randint(0, 3, (64,)))
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(4, 5), nn.ReLU(), nn.Linear(5, 3))

    def loss(out, y):   # outputs [B, 3, 3]: mean over the middle axis first
        return F.cross_entropy(out.mean(1), y)

    with pytest.warns(EngineFallbackWarning, match="first Linear layer"):
        _, tracker, readings = _run("stacked", model=model, data=data, loss=loss,
                                    optimizer="plain", epochs=2)
    assert tracker.engine.name == "per_shadow"
    assert readings[0].audit_divergence == 0.0


def test_auto_override_and_the_timed_choice(monkeypatch):
    monkeypatch.setenv(AUTO_OVERRIDE_VARIABLE, "stacked")
    _, tracker, forced_stacked = _run("auto")
    assert tracker.engine.name == "stacked"
    assert AUTO_OVERRIDE_VARIABLE in tracker.engine_choice
    monkeypatch.setenv(AUTO_OVERRIDE_VARIABLE, "per_shadow")
    _, tracker, forced_per = _run("auto")
    assert tracker.engine.name == "per_shadow"

    monkeypatch.delenv(AUTO_OVERRIDE_VARIABLE)
    _, tracker, timed = _run("auto")
    choice = tracker.engine_choice
    assert tracker.engine.name in ("stacked", "per_shadow")
    assert choice.startswith(tracker.engine.name) and "timed" in choice and "ms" in choice
    assert any(note.startswith("engine auto chose " + tracker.engine.name)
               for note in timed[0].notes)
    # the timing ran on throwaway copies: the readings are those of the chosen engine alone
    same = forced_stacked if tracker.engine.name == "stacked" else forced_per
    assert [r.divergence for r in timed] == [r.divergence for r in same]
    assert [r.audit_divergence for r in timed] == [r.audit_divergence for r in same]


@pytest.mark.parametrize("engine", ["stacked", "auto"])
def test_stacked_checkpoint_resumes_like_the_uninterrupted_run(engine, tmp_path, monkeypatch):
    """Stop mid-run, save the tracker with torch.save, rebuild everything in a fresh tracker and
    continue: the same divergences bit for bit (with auto, the saved choice is kept)."""
    monkeypatch.delenv(AUTO_OVERRIDE_VARIABLE, raising=False)
    data = _parcels()

    def build():
        model = _chain(nn.Tanh)
        opt = _optimizer("nesterov", model)
        tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                                   shadows=4, engine=engine)
        return model, opt, tracker

    def epoch(model, opt, tracker, seed, count=None):
        torch.manual_seed(seed)
        batches = DataLoader(data, batch_size=16, shuffle=True,
                             generator=torch.Generator().manual_seed(seed))
        for x, y in itertools.islice(tracker.batches(batches), count):
            opt.zero_grad()
            F.cross_entropy(model(x), y).backward()
            opt.step()
        return tracker.finish_epoch()

    model, opt, tracker = build()
    epoch(model, opt, tracker, 1)
    epoch(model, opt, tracker, 2, count=4)
    torch.save({"model": model.state_dict(), "opt": opt.state_dict(),
                "tracker": tracker.state_dict()}, tmp_path / "run.pt")
    straight = [epoch(model, opt, tracker, 3 + k) for k in range(2)]

    saved = torch.load(tmp_path / "run.pt", weights_only=True)
    model2, opt2, tracker2 = build()
    model2.load_state_dict(saved["model"])
    opt2.load_state_dict(saved["opt"])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        tracker2.load_state_dict(saved["tracker"])
    resumed = [epoch(model2, opt2, tracker2, 3 + k) for k in range(2)]
    assert tracker2.engine.name == tracker.engine.name
    assert tracker2.engine_choice == tracker.engine_choice
    assert all(d > 0 for d in straight[-1].divergence)
    assert [r.divergence for r in resumed] == [r.divergence for r in straight]


def test_make_engine_auto_takes_the_stacked_engine_only_where_it_can_run(monkeypatch):
    monkeypatch.delenv(AUTO_OVERRIDE_VARIABLE, raising=False)
    model = _chain(nn.ReLU)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)

    def loss_of(m, b):
        return F.cross_entropy(m(b[0]), b[1])

    engine = make_engine("auto", model, opt, loss_of, None, shadows=5, loss_fn=F.cross_entropy)
    assert isinstance(engine, StackedEngine) and engine.auto and not engine.decided
    engine = make_engine("auto", model, opt, loss_of, None, shadows=5, loss_fn=None)
    assert isinstance(engine, PerShadowEngine) and "step_loss" in engine.choice
