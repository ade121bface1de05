"""Epoch ends that cost what they must: no constant estimation when no bound can use it."""

from __future__ import annotations

import warnings

import pytest
import torch
import torch.nn.functional as F

from sgdstab import Constants, StabilityTracker
from sgdstab.tracking.measure import ESTIMATE_ANYWAY

from ._toy import loader, mlp, pebbles, train


def _run(make_optimizer, monkeypatch, **options):
    calls = []
    original = Constants.estimate

    def counted(*args, **kwargs):
        calls.append(kwargs)
        return original(*args, **kwargs)

    monkeypatch.setattr(Constants, "estimate", staticmethod(counted))
    data = pebbles()
    model = mlp(dropout=0.0)
    opt = make_optimizer(model)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2,
                               constants="estimate", loss_bound=5.0, probe_size=48, **options)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        readings = train(model, opt, loader(data), epochs=2, tracker=tracker)
    return readings, calls


@pytest.mark.parametrize(("make", "word"), [
    (lambda m: torch.optim.SGD(m.parameters(), lr=0.05, momentum=0.9), "momentum"),
    (lambda m: torch.optim.SGD(m.parameters(), lr=0.05, momentum=0.5, nesterov=True), "momentum"),
    (lambda m: torch.optim.Adam(m.parameters(), lr=0.01), "Adam"),
])
def test_no_estimation_when_the_optimizer_rules_out_every_bound(make, word, monkeypatch):
    readings, calls = _run(make, monkeypatch)
    assert calls == []
    for reading in readings:
        assert reading.constants is None and reading.expected_bound is None
        assert any("not applicable" in note and word in note and ESTIMATE_ANYWAY in note
                   for note in reading.notes)
        assert max(reading.divergence) > 0   # measurement goes on


def test_estimation_on_request_and_for_plain_sgd(monkeypatch):
    def momentum(m):
        return torch.optim.SGD(m.parameters(), lr=0.05, momentum=0.9)

    readings, calls = _run(momentum, monkeypatch, estimate_options={ESTIMATE_ANYWAY: True})
    assert len(calls) == 2 and all(ESTIMATE_ANYWAY not in kwargs for kwargs in calls)
    assert readings[-1].constants["source"] == "estimated"
    assert readings[-1].expected_bound is None          # still not applicable to momentum
    readings, calls = _run(lambda m: torch.optim.SGD(m.parameters(), lr=0.05), monkeypatch)
    assert len(calls) == 2 and readings[-1].constants["source"] == "estimated"
