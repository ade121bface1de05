"""The grouped options (ConstantSettings, ProbeSettings) against the flat keywords they group."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from sgdstab import ConstantSettings, ProbeSettings, StabilityTracker

from ._toy import loader, mlp, pebbles, train

FLAT = {"constants": "estimate", "estimate_every": 2, "estimate_options": {"iterations": 6},
        "loss_bound": 2.0, "probe_size": 12}


def _run(**options):
    data, probe = pebbles(), pebbles(count=24, seed=5)
    model = mlp(dropout=0.0)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.2)
    if "grouped_probe_size" in options:   # the probe set and size as one ProbeSettings
        options["probe_settings"] = ProbeSettings(probe, options.pop("grouped_probe_size"))
    elif "probe_settings" not in options:
        options.setdefault("probe_set", probe)
    tracker = StabilityTracker(model, optimizer, loss_fn=F.cross_entropy, train_set=data,
                               shadows=2, audit=False, **options)
    readings = train(model, optimizer, loader(data), epochs=3, tracker=tracker)
    return tracker, readings


def test_grouped_and_flat_options_give_the_same_readings():
    flat, flat_readings = _run(**FLAT)
    grouped, grouped_readings = _run(
        constant_settings=ConstantSettings("estimate", every=2, options={"iterations": 6},
                                           loss_bound=2.0),
        grouped_probe_size=12)
    assert [r.to_json() for r in grouped_readings] == [r.to_json() for r in flat_readings]
    for tracker in (flat, grouped):   # the settings took effect, not the defaults
        assert (tracker.estimate_every, tracker.probe_size, tracker.loss_bound) == (2, 12, 2.0)
        assert tracker.estimate_options == {"iterations": 6} and tracker.estimate_constants
    assert grouped_readings[-1].constants["source"] == "estimated"


def test_the_defaults_of_the_settings_are_the_flat_defaults():
    plain, plain_readings = _run(probe_set=None)
    grouped, grouped_readings = _run(constant_settings=ConstantSettings(),
                                     probe_settings=ProbeSettings())
    assert [r.to_json() for r in grouped_readings] == [r.to_json() for r in plain_readings]
    assert grouped.estimate_every == 1 and not grouped.estimate_constants


@pytest.mark.parametrize("flat, grouped", [
    ({"estimate_every": 2}, {"constant_settings": ConstantSettings(every=2)}),
    ({"constants": None}, {"constant_settings": ConstantSettings()}),
    ({"probe_size": 10}, {"probe_settings": ProbeSettings(size=10)}),
])
def test_one_option_given_both_ways_is_a_type_error(flat, grouped):
    model = mlp()
    with pytest.raises(TypeError, match=f"{next(iter(flat))}= and {next(iter(grouped))}= both"):
        StabilityTracker(model, torch.optim.SGD(model.parameters(), lr=0.1),
                         loss_fn=F.cross_entropy, train_set=pebbles(), **flat, **grouped)


def test_a_settings_object_of_the_wrong_kind_is_a_type_error():
    model = mlp()
    with pytest.raises(TypeError, match="probe_settings must be a ProbeSettings"):
        StabilityTracker(model, torch.optim.SGD(model.parameters(), lr=0.1),
                         loss_fn=F.cross_entropy, train_set=pebbles(),
                         probe_settings=ConstantSettings())
