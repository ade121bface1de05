"""The tracker's bound wiring: estimated constants, optimizer applicability, weight decay."""

from __future__ import annotations

import warnings

import torch
import torch.nn.functional as F

from sgdstab import Constants, StabilityTracker

from ._toy import loader, mlp, pebbles, train


def _readings(constants, optimizer=None, epochs=3, **options):
    data = pebbles()
    model = mlp(dropout=0.0)
    opt = optimizer(model) if optimizer else torch.optim.SGD(model.parameters(), lr=0.05)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2,
                               replacements=pebbles(count=30, seed=2), constants=constants,
                               probe_size=48,
                               **options)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return train(model, opt, loader(data), epochs=epochs, tracker=tracker), tracker


def test_estimated_constants_are_running_maxima_and_labelled_estimated():
    readings, _ = _readings("estimate", loss_bound=5.0)
    lipschitz = [r.constants["lipschitz"] for r in readings]
    smoothness = [r.constants["smoothness"] for r in readings]
    assert lipschitz == sorted(lipschitz) and smoothness == sorted(smoothness)
    assert all(r.constants["source"] == "estimated" for r in readings)
    assert all(any("ESTIMATED" in note for note in r.notes) for r in readings)
    assert readings[-1].bounds["regime"] == "nonconvex"
    # the non-convex bound needs the loss range, given here: it is computed
    assert readings[-1].expected_bound is not None


def test_without_a_loss_bound_the_nonconvex_bound_is_not_applicable_with_a_reason():
    readings, _ = _readings("estimate")
    expected = readings[-1].bounds["expected"]
    assert expected["applicable"] is False and readings[-1].expected_bound is None
    assert "loss" in expected["reason"].lower()


def test_momentum_and_adam_make_every_bound_not_applicable_but_measurement_goes_on():
    constants = Constants(lipschitz=2.0, smoothness=1.0, loss_bound=5.0)
    for make, word in ((lambda m: torch.optim.SGD(m.parameters(), lr=0.05, momentum=0.9),
                        "momentum"),
                       (lambda m: torch.optim.Adam(m.parameters(), lr=0.01), "Adam")):
        readings, _ = _readings(constants, optimizer=make, epochs=1)
        reading = readings[0]
        assert reading.expected_bound is None and reading.high_probability_gap is None
        assert word in reading.bounds["expected"]["reason"]
        assert max(reading.divergence) > 0


def test_weight_decay_is_folded_into_the_declared_constants():
    constants = Constants(lipschitz=1.0, smoothness=0.5, convex=True)
    readings, _ = _readings(constants, epochs=1, optimizer=lambda m: torch.optim.SGD(
        m.parameters(), lr=0.05, weight_decay=0.1))
    used = readings[0].constants
    assert used["smoothness"] == 0.5 + 0.1 and used["strong_convexity"] == 0.1
    assert readings[0].bounds["regime"] == "strongly_convex"


def test_no_constants_means_no_bounds_with_a_note():
    readings, _ = _readings(None, epochs=1)
    assert readings[0].expected_bound is None and readings[0].path_bound == ()
    assert any("no constants" in note for note in readings[0].notes)


def test_estimate_every_refreshes_the_estimates_only_on_due_epochs():
    readings, _ = _readings("estimate", loss_bound=5.0, estimate_every=2,
                            estimate_options={"iterations": 30, "per_example": 2})
    assert readings[1].constants == readings[0].constants     # epoch 2: not due, reused
    assert readings[2].constants["lipschitz"] >= readings[0].constants["lipschitz"]


def test_advise_uses_the_planner_for_a_constant_schedule():
    constants = Constants(lipschitz=1.0, smoothness=1.0, convex=True)
    readings, tracker = _readings(constants, epochs=3)
    target = readings[1].expected_bound * 2
    advice = tracker.advise(target=target)
    assert advice.budget is not None and advice.budget.method == "planner"
    assert advice.suggested_epoch is not None
