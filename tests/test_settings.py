"""The grouped options (ConstantSettings, ProbeSettings) against the flat keywords they group."""

from __future__ import annotations

import subprocess
import sys

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


def test_the_data_parallel_tracker_takes_the_grouped_options(tmp_path):
    """A one-rank gloo group in a child process (so this process's default group is untouched):
    DataParallelStabilityTracker passes the settings objects on like the flat keywords."""
    script = tmp_path / "one_rank.py"
    script.write_text(
        "import sys, torch, torch.distributed as dist, torch.nn as nn\n"
        "from torch.nn.parallel import DistributedDataParallel\n"
        "from torch.utils.data import TensorDataset\n"
        "from sgdstab import ConstantSettings, DataParallelStabilityTracker, ProbeSettings\n"
        "dist.init_process_group('gloo', init_method=f'file://{sys.argv[1]}', rank=0,"
        " world_size=1)\n"
        "torch.manual_seed(0)\n"
        "data = TensorDataset(torch.randn(40, 3), torch.randint(0, 2, (40,)))\n"
        "model = DistributedDataParallel(nn.Linear(3, 2))\n"
        "tracker = DataParallelStabilityTracker(\n"
        "    model, torch.optim.SGD(model.parameters(), lr=0.1),\n"
        "    loss_fn=nn.functional.cross_entropy, train_set=data, shadows=2,\n"
        "    constant_settings=ConstantSettings('estimate', every=3, loss_bound=2.0),\n"
        "    probe_settings=ProbeSettings(size=16))\n"
        "print(tracker.estimate_every, tracker.loss_bound, tracker.probe_size,"
        " tracker.estimate_constants)\n"
        "tracker.close(); dist.destroy_process_group()\n")
    # a file store, not a TCP port: a port picked free can be taken before gloo binds it
    done = subprocess.run([sys.executable, str(script), str(tmp_path / "store")],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.split() == ["3", "2.0", "16", "True"]
