"""Behaviour of sgdstab.tracking.constants: validation, arithmetic, per-example gradients and
model state.

Checks against closed forms and reference libraries live in tests/test_reference_constants.py.
The reference for per-example gradients here is a plain autograd loop, one backward pass per
example (common practice), written independently of the module under test.
"""

from __future__ import annotations

import math

import pytest
import torch
import torch.nn.functional as F
from hypothesis import given
from hypothesis import strategies as st
from torch import nn

from sgdstab.tracking.constants import (
    SMOOTHNESS_FLOOR,
    Constants,
    estimate_lipschitz,
    estimate_smoothness,
    per_example_gradient_norms,
)

# ---------------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------------


def loop_norms(model: nn.Module, examples: list, loss_of_example) -> torch.Tensor:
    """Reference: one torch.autograd.grad per example over the trainable parameters, eval mode."""
    flags = [(m, m.training) for m in model.modules()]
    model.eval()
    params = [p for p in model.parameters() if p.requires_grad]
    out = []
    for example in examples:
        grads = torch.autograd.grad(loss_of_example(model, example), params, allow_unused=True)
        out.append(math.sqrt(sum(float(g.pow(2).sum()) for g in grads if g is not None)))
    for m, flag in flags:
        m.training = flag
    return torch.tensor(out, dtype=torch.float64)


def classifier(seed: int = 0) -> nn.Sequential:
    """A small net with BatchNorm and dropout, running statistics moved off their defaults."""
    torch.manual_seed(seed)
    model = nn.Sequential(
        nn.Linear(4, 6), nn.BatchNorm1d(6), nn.Tanh(), nn.Dropout(0.5), nn.Linear(6, 3)
    ).double()
    with torch.no_grad():
        for _ in range(3):
            model(torch.randn(32, 4, dtype=torch.float64) * 2 + 1)
    return model


def toy_batch(n: int = 10, seed: int = 1) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    inputs = torch.randn(n, 4, generator=g, dtype=torch.float64)
    targets = torch.randint(0, 3, (n,), generator=g)
    return inputs, targets


def snapshot(model: nn.Module) -> dict:
    return {
        "state": {k: v.clone() for k, v in model.state_dict().items()},
        "grads": {
            k: None if p.grad is None else p.grad.clone() for k, p in model.named_parameters()
        },
        "flags": [m.training for m in model.modules()],
        "rng": torch.get_rng_state().clone(),
    }


def assert_unchanged(model: nn.Module, before: dict) -> None:
    after = snapshot(model)
    assert after["flags"] == before["flags"]
    assert torch.equal(after["rng"], before["rng"])
    for key, value in before["state"].items():
        assert torch.equal(after["state"][key], value), key
    for key, value in before["grads"].items():
        if value is None:
            assert after["grads"][key] is None, key
        else:
            assert torch.equal(after["grads"][key], value), key


# ---------------------------------------------------------------------------------------------
# Constants: validation, regime, arithmetic
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"lipschitz": 0.0, "smoothness": 1.0}, "lipschitz"),
        ({"lipschitz": -1.0, "smoothness": 1.0}, "lipschitz"),
        ({"lipschitz": math.nan, "smoothness": 1.0}, "lipschitz"),
        ({"lipschitz": math.inf, "smoothness": 1.0}, "lipschitz"),
        ({"lipschitz": 1.0, "smoothness": 0.0}, "smoothness"),
        ({"lipschitz": 1.0, "smoothness": math.inf}, "smoothness"),
        ({"lipschitz": 1.0, "smoothness": 1.0, "strong_convexity": -0.5, "convex": True},
         "strong_convexity"),
        ({"lipschitz": 1.0, "smoothness": 1.0, "strong_convexity": 0.5}, "strong_convexity"),
        ({"lipschitz": 1.0, "smoothness": 1.0, "strong_convexity": 2.0, "convex": True},
         "strong_convexity"),
        ({"lipschitz": 1.0, "smoothness": 1.0, "strong_convexity": math.nan, "convex": True},
         "strong_convexity"),
        ({"lipschitz": 1.0, "smoothness": 1.0, "loss_bound": 0.0}, "loss_bound"),
        ({"lipschitz": 1.0, "smoothness": 1.0, "loss_bound": -2.0}, "loss_bound"),
        ({"lipschitz": 1.0, "smoothness": 1.0, "loss_bound": math.inf}, "loss_bound"),
        ({"lipschitz": 1.0, "smoothness": 1.0, "source": "guessed"}, "source"),
        ({"lipschitz": "abc", "smoothness": 1.0}, "lipschitz"),
    ],
)
def test_constants_validation_names_field_and_value(kwargs: dict, field: str) -> None:
    with pytest.raises(ValueError, match=field) as caught:
        Constants(**kwargs)
    assert repr(kwargs[field]) in str(caught.value)


def test_constants_accept_valid_and_coerce_to_float() -> None:
    c = Constants(lipschitz=2, smoothness=torch.tensor(3.0), strong_convexity=1, convex=True,
                  loss_bound=5)
    assert (c.lipschitz, c.smoothness, c.strong_convexity, c.loss_bound) == (2.0, 3.0, 1.0, 5.0)
    assert all(isinstance(v, float) for v in (c.lipschitz, c.smoothness, c.strong_convexity))
    # boundary: strong convexity equal to smoothness is allowed (a quadratic with equal eigenvalues)
    assert Constants(lipschitz=1.0, smoothness=2.0, strong_convexity=2.0, convex=True).regime
    with pytest.raises(AttributeError):
        c.lipschitz = 1.0  # type: ignore[misc]


def test_regime() -> None:
    assert Constants(lipschitz=1.0, smoothness=1.0).regime == "nonconvex"
    assert Constants(lipschitz=1.0, smoothness=1.0, convex=True).regime == "convex"
    strong = Constants(lipschitz=1.0, smoothness=1.0, strong_convexity=0.1, convex=True)
    assert strong.regime == "strongly_convex"


def test_with_weight_decay() -> None:
    # SCIENCE §2: weight_decay lambda adds lambda/2 ||w||^2, so beta + lambda, and gamma = lambda
    # when the loss itself is convex.
    convex = Constants(lipschitz=2.0, smoothness=3.0, convex=True, loss_bound=1.0)
    decayed = convex.with_weight_decay(0.25)
    assert decayed.smoothness == pytest.approx(3.25)
    assert decayed.strong_convexity == pytest.approx(0.25)
    assert decayed.regime == "strongly_convex"
    assert decayed.lipschitz == 2.0 and decayed.loss_bound == 1.0
    assert decayed.with_weight_decay(0.5).strong_convexity == pytest.approx(0.75)

    nonconvex = Constants(lipschitz=2.0, smoothness=3.0, source="estimated")
    decayed = nonconvex.with_weight_decay(0.25)
    assert decayed.smoothness == pytest.approx(3.25)
    assert decayed.strong_convexity == 0.0 and decayed.regime == "nonconvex"
    assert decayed.source == "estimated"

    # gradient gains lambda * w: with ||w|| <= R, L grows by lambda * R
    assert nonconvex.with_weight_decay(0.25, radius=4.0).lipschitz == pytest.approx(3.0)
    assert convex.with_weight_decay(0.0) == convex
    with pytest.raises(ValueError, match="weight_decay"):
        convex.with_weight_decay(-0.1)
    with pytest.raises(ValueError, match="radius"):
        convex.with_weight_decay(0.1, radius=-1.0)


def test_merged_max() -> None:
    a = Constants(lipschitz=1.0, smoothness=5.0, convex=True, strong_convexity=0.5,
                  loss_bound=2.0, source="estimated")
    b = Constants(lipschitz=3.0, smoothness=2.0, convex=True, strong_convexity=0.2)
    merged = a.merged_max(b)
    assert (merged.lipschitz, merged.smoothness) == (3.0, 5.0)
    assert merged.strong_convexity == 0.2 and merged.loss_bound == 2.0
    assert merged.source == "estimated" and merged.convex
    both_declared = b.merged_max(b)
    assert both_declared.source == "declared"
    with pytest.raises(ValueError, match="convex"):
        a.merged_max(Constants(lipschitz=1.0, smoothness=1.0))
    with pytest.raises(TypeError):
        a.merged_max({"lipschitz": 1.0})  # type: ignore[arg-type]


positive = st.floats(min_value=1e-6, max_value=1e6, allow_nan=False)


@given(positive, positive, positive, positive)
def test_merged_max_is_a_running_maximum(l1: float, b1: float, l2: float, b2: float) -> None:
    x = Constants(lipschitz=l1, smoothness=b1, source="estimated")
    y = Constants(lipschitz=l2, smoothness=b2, source="estimated")
    merged = x.merged_max(y)
    assert merged.lipschitz == max(l1, l2) and merged.smoothness == max(b1, b2)
    assert merged == y.merged_max(x)
    assert merged.merged_max(x) == merged


def test_to_dict_round_trip() -> None:
    c = Constants(lipschitz=1.5, smoothness=2.5, strong_convexity=0.5, convex=True,
                  loss_bound=3.0, source="estimated")
    d = c.to_dict()
    assert d == {"lipschitz": 1.5, "smoothness": 2.5, "strong_convexity": 0.5,
                 "loss_bound": 3.0, "convex": True, "source": "estimated"}
    assert Constants.from_dict(d) == c
    with pytest.raises(ValueError, match="regime"):
        Constants.from_dict({**d, "regime": "convex"})


# ---------------------------------------------------------------------------------------------
# argument checks
# ---------------------------------------------------------------------------------------------


def test_exactly_one_loss_form() -> None:
    model, batch = classifier(), toy_batch()
    for fn in (per_example_gradient_norms, estimate_lipschitz, estimate_smoothness):
        with pytest.raises(ValueError, match="exactly one"):
            fn(model, batch)
        with pytest.raises(ValueError, match="exactly one"):
            fn(model, batch, loss_fn=F.cross_entropy,
               step_loss=lambda m, b: F.cross_entropy(m(b[0]), b[1]))


def test_bad_batches_and_arguments() -> None:
    model = classifier()
    inputs, targets = toy_batch()
    with pytest.raises(ValueError, match="empty"):
        estimate_lipschitz(model, (inputs[:0], targets[:0]), loss_fn=F.cross_entropy)
    with pytest.raises(ValueError, match="disagree"):
        estimate_lipschitz(model, (inputs, targets[:5]), loss_fn=F.cross_entropy)
    with pytest.raises(ValueError, match="chunk_size"):
        per_example_gradient_norms(model, (inputs, targets), loss_fn=F.cross_entropy, chunk_size=0)
    with pytest.raises(ValueError, match="curvature"):
        estimate_smoothness(model, (inputs, targets), loss_fn=F.cross_entropy, curvature="peak")
    with pytest.raises(ValueError, match="iterations"):
        estimate_smoothness(model, (inputs, targets), loss_fn=F.cross_entropy, iterations=0)
    with pytest.raises(ValueError, match="per_example"):
        estimate_smoothness(model, (inputs, targets), loss_fn=F.cross_entropy, per_example=-1)
    frozen = classifier().requires_grad_(False)
    with pytest.raises(ValueError, match="trainable"):
        estimate_lipschitz(frozen, (inputs, targets), loss_fn=F.cross_entropy)
    with pytest.raises(TypeError, match="iteration"):
        Constants.estimate(model, (inputs, targets), loss_fn=F.cross_entropy, iteration=3)


# ---------------------------------------------------------------------------------------------
# per-example gradients: vmap against a plain autograd loop
# ---------------------------------------------------------------------------------------------


def test_norms_match_loop_loss_fn_with_dropout_and_batchnorm() -> None:
    model = classifier()
    model.train()  # the estimate must switch to eval mode itself
    inputs, targets = toy_batch(12)
    examples = [(inputs[i : i + 1], targets[i : i + 1]) for i in range(12)]
    reference = loop_norms(model, examples, lambda m, b: F.cross_entropy(m(b[0]), b[1]))
    norms = per_example_gradient_norms(model, (inputs, targets), loss_fn=F.cross_entropy)
    assert norms.shape == (12,)
    torch.testing.assert_close(norms.double(), reference, rtol=1e-5, atol=1e-8)
    # eval mode: dropout off, so repeated calls agree exactly
    assert torch.equal(norms, per_example_gradient_norms(model, (inputs, targets),
                                                         loss_fn=F.cross_entropy))


def test_norms_match_loop_step_loss_with_dict_batch() -> None:
    torch.manual_seed(3)
    model = nn.Sequential(nn.Linear(3, 4), nn.Tanh(), nn.Linear(4, 1)).double()
    g = torch.Generator().manual_seed(4)
    n = 9
    batch = {
        "features": torch.randn(n, 3, generator=g, dtype=torch.float64),
        "response": torch.randn(n, generator=g, dtype=torch.float64),
        "weight": torch.rand(n, generator=g, dtype=torch.float64) + 0.5,
        "scale": torch.tensor(2.0, dtype=torch.float64),  # 0-dim: shared, not per example
        "tag": "greenhouse sensors",  # non-tensor leaf passes through untouched
    }

    def step_loss(m: nn.Module, b: dict) -> torch.Tensor:
        assert b["tag"] == "greenhouse sensors"
        residual = m(b["features"]).squeeze(1) - b["response"]
        return (b["weight"] * b["scale"] * residual.pow(2)).mean()

    examples = [
        {k: (v[i : i + 1] if isinstance(v, torch.Tensor) and v.dim() else v)
         for k, v in batch.items()}
        for i in range(n)
    ]
    reference = loop_norms(model, examples, step_loss)
    norms = per_example_gradient_norms(model, batch, step_loss=step_loss)
    torch.testing.assert_close(norms.double(), reference, rtol=1e-5, atol=1e-8)


def test_norms_follow_trainable_parameters_only_and_chunks() -> None:
    model = classifier()
    model[0].weight.requires_grad_(False)
    inputs, targets = toy_batch(11)
    examples = [(inputs[i : i + 1], targets[i : i + 1]) for i in range(11)]
    reference = loop_norms(model, examples, lambda m, b: F.cross_entropy(m(b[0]), b[1]))
    full = per_example_gradient_norms(model, (inputs, targets), loss_fn=F.cross_entropy)
    chunked = per_example_gradient_norms(model, (inputs, targets), loss_fn=F.cross_entropy,
                                         chunk_size=3)
    torch.testing.assert_close(full.double(), reference, rtol=1e-5, atol=1e-8)
    torch.testing.assert_close(chunked, full, rtol=1e-12, atol=1e-12)
    model[0].weight.requires_grad_(True)
    with_all = per_example_gradient_norms(model, (inputs, targets), loss_fn=F.cross_entropy)
    assert bool((with_all > full).all())  # the first layer's gradient adds to every norm


class Branching(nn.Module):
    """Data-dependent control flow, which vmap cannot trace."""

    def __init__(self) -> None:
        super().__init__()
        self.layer = nn.Linear(3, 1).double()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = self.layer(x)
        if float(x.sum()) > 0:
            out = out * 2
        return out


def test_fallback_loop_when_vmap_fails() -> None:
    torch.manual_seed(5)
    model = Branching()
    g = torch.Generator().manual_seed(6)
    inputs = torch.randn(8, 3, generator=g, dtype=torch.float64)
    targets = torch.randn(8, 1, generator=g, dtype=torch.float64)
    examples = [(inputs[i : i + 1], targets[i : i + 1]) for i in range(8)]
    reference = loop_norms(model, examples, lambda m, b: F.mse_loss(m(b[0]), b[1]))
    with pytest.warns(RuntimeWarning, match="vmap failed") as record:
        norms = per_example_gradient_norms(model, (inputs, targets), loss_fn=F.mse_loss,
                                           chunk_size=3)
    assert len(record) == 1  # said once, not once per chunk or example
    torch.testing.assert_close(norms.double(), reference, rtol=1e-5, atol=1e-8)


# ---------------------------------------------------------------------------------------------
# model state, training flags and RNG are left alone
# ---------------------------------------------------------------------------------------------


def test_state_flags_grads_and_rng_untouched() -> None:
    model = classifier()
    model.train()
    model[3].eval()  # mixed flags: dropout in eval, BatchNorm in training
    model[0].weight.grad = torch.randn_like(model[0].weight)
    model[4].bias.grad = torch.zeros_like(model[4].bias)
    batch = toy_batch()
    before = snapshot(model)
    per_example_gradient_norms(model, batch, loss_fn=F.cross_entropy)
    assert_unchanged(model, before)
    estimate_lipschitz(model, batch, loss_fn=F.cross_entropy)
    assert_unchanged(model, before)
    estimate_smoothness(model, batch, loss_fn=F.cross_entropy, iterations=20)
    assert_unchanged(model, before)
    estimate_smoothness(model, batch, loss_fn=F.cross_entropy, iterations=20, curvature="top")
    assert_unchanged(model, before)
    Constants.estimate(model, batch, loss_fn=F.cross_entropy, iterations=20)
    assert_unchanged(model, before)
    assert model[1].training and not model[3].training


class Noisy(nn.Module):
    """Draws from torch's global RNG on every forward pass, even in eval mode."""

    def __init__(self) -> None:
        super().__init__()
        self.layer = nn.Linear(3, 1).double()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.layer(x) + 1e-3 * torch.randn(x.shape[0], 1, dtype=x.dtype)


def test_global_rng_restored_after_a_model_consumes_it() -> None:
    torch.manual_seed(7)
    model = Noisy()
    inputs = torch.randn(6, 3, dtype=torch.float64)
    targets = torch.randn(6, 1, dtype=torch.float64)
    before = torch.get_rng_state().clone()
    with pytest.warns(RuntimeWarning, match="vmap failed"):  # vmap refuses random ops
        per_example_gradient_norms(model, (inputs, targets), loss_fn=F.mse_loss)
    assert torch.equal(torch.get_rng_state(), before)
    estimate_smoothness(model, (inputs, targets), loss_fn=F.mse_loss, per_example=0)
    assert torch.equal(torch.get_rng_state(), before)


def test_training_flags_restored_after_an_error() -> None:
    model = classifier()
    model.train()

    def broken(m: nn.Module, b: tuple) -> torch.Tensor:
        raise KeyError("missing column")

    with pytest.raises(KeyError), pytest.warns(RuntimeWarning):
        per_example_gradient_norms(model, toy_batch(), step_loss=broken)
    assert all(m.training for m in model.modules())


# ---------------------------------------------------------------------------------------------
# smoothness: behaviour (values against references are in test_reference_constants.py)
# ---------------------------------------------------------------------------------------------


def test_flat_loss_returns_the_floor() -> None:
    # the mean output of a linear layer is linear in its parameters: the Hessian is zero
    model = nn.Linear(3, 2).double()
    inputs = torch.randn(5, 3, dtype=torch.float64)
    value = estimate_smoothness(model, (inputs,), step_loss=lambda m, b: m(b[0]).mean())
    assert value == SMOOTHNESS_FLOOR
    c = Constants.estimate(model, (inputs,), step_loss=lambda m, b: m(b[0]).mean())
    assert c.smoothness == SMOOTHNESS_FLOOR and c.lipschitz > 0


def test_smoothness_is_seeded_and_deterministic() -> None:
    model, batch = classifier(), toy_batch(16)
    first = estimate_smoothness(model, batch, loss_fn=F.cross_entropy, seed=3)
    again = estimate_smoothness(model, batch, loss_fn=F.cross_entropy, seed=3)
    other = estimate_smoothness(model, batch, loss_fn=F.cross_entropy, seed=4)
    assert first == again
    assert other == pytest.approx(first, rel=1e-3)


def test_per_example_term_never_lowers_the_estimate() -> None:
    model, batch = classifier(), toy_batch(16)
    mean_only = estimate_smoothness(model, batch, loss_fn=F.cross_entropy, per_example=0)
    with_examples = estimate_smoothness(model, batch, loss_fn=F.cross_entropy, per_example=4)
    assert with_examples >= mean_only


def test_magnitude_dominates_top() -> None:
    model, batch = classifier(), toy_batch(16)
    top = estimate_smoothness(model, batch, loss_fn=F.cross_entropy, curvature="top")
    magnitude = estimate_smoothness(model, batch, loss_fn=F.cross_entropy)
    assert magnitude >= top * (1 - 1e-4)


def test_estimate_builds_estimated_constants() -> None:
    model, batch = classifier(), toy_batch(16)
    c = Constants.estimate(model, batch, loss_fn=F.cross_entropy, loss_bound=4.0, chunk_size=5,
                           per_example=2, seed=1)
    assert c.source == "estimated" and c.regime == "nonconvex" and c.loss_bound == 4.0
    lipschitz = estimate_lipschitz(model, batch, loss_fn=F.cross_entropy)
    assert c.lipschitz == pytest.approx(lipschitz, rel=1e-12)  # chunking changes round-off only
    assert c.smoothness == pytest.approx(
        estimate_smoothness(model, batch, loss_fn=F.cross_entropy, per_example=2, seed=1),
        rel=1e-12,
    )
    # beta >= gamma for any gamma-strongly convex, beta-smooth loss: a declared gamma above the
    # (lower) curvature estimate lifts the smoothness to gamma (common practice)
    big = 10 * c.smoothness
    strong = Constants.estimate(model, batch, loss_fn=F.cross_entropy, convex=True,
                                strong_convexity=big)
    assert strong.smoothness == pytest.approx(big) and strong.regime == "strongly_convex"


def test_namedtuple_and_list_batches_match_tuple_batch() -> None:
    from collections import namedtuple

    Pair = namedtuple("Pair", ["inputs", "targets"])
    model = classifier()
    inputs, targets = toy_batch(7)

    def step_loss(m: nn.Module, b) -> torch.Tensor:
        return F.cross_entropy(m(b[0]), b[1])

    as_tuple = per_example_gradient_norms(model, (inputs, targets), step_loss=step_loss)
    as_named = per_example_gradient_norms(
        model, Pair(inputs, targets),
        step_loss=lambda m, b: F.cross_entropy(m(b.inputs), b.targets),
    )
    as_list = per_example_gradient_norms(model, [inputs, targets], step_loss=step_loss)
    torch.testing.assert_close(as_named, as_tuple, rtol=1e-12, atol=1e-12)
    torch.testing.assert_close(as_list, as_tuple, rtol=1e-12, atol=1e-12)
