"""Checkpoint/resume across a process boundary, and refusals of states that do not fit."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from sgdstab import LockstepError, StabilityTracker

from ._toy import loader, mlp, pebbles, train

ROOT = Path(__file__).resolve().parents[1]


def _worker(mode: str, out: Path) -> None:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    subprocess.run([sys.executable, "-m", "tests._resume_worker", mode, str(out)], cwd=ROOT,
                   env=env, check=True, timeout=180)


def test_resumed_run_in_a_fresh_process_equals_the_uninterrupted_run(tmp_path):
    _worker("full", tmp_path)
    _worker("first", tmp_path)
    _worker("second", tmp_path)
    full = json.loads((tmp_path / "full.json").read_text())
    resumed = json.loads((tmp_path / "first.json").read_text()) + \
        json.loads((tmp_path / "second.json").read_text())
    assert [r["epoch"] for r in resumed] == [1, 2, 3]
    for a, b in zip(full, resumed):
        assert a == b   # every field, bit for bit (JSON floats are exact round trips)
    assert full[-1]["divergence"][0] > 0


def _tracker(model, shadows=2, data=None):
    data = data if data is not None else pebbles()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    return StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                            shadows=shadows), opt, data


def _trained_state():
    model = mlp()
    tracker, opt, data = _tracker(model)
    train(model, opt, loader(data), epochs=1, tracker=tracker)
    return tracker.state_dict()


def test_a_state_for_another_architecture_k_or_n_is_refused():
    state = _trained_state()
    other = nn.Sequential(nn.Linear(5, 7), nn.Tanh(), nn.Linear(7, 2))
    with pytest.raises(LockstepError, match="architecture"):
        _tracker(other)[0].load_state_dict(state)
    with pytest.raises(LockstepError, match="number of shadows"):
        _tracker(mlp(), shadows=3)[0].load_state_dict(state)
    with pytest.raises(LockstepError, match="training-set size"):
        _tracker(mlp(), data=pebbles(count=50))[0].load_state_dict(state)


def test_state_round_trips_through_torch_save_weights_only(tmp_path):
    state = _trained_state()
    torch.save(state, tmp_path / "t.pt")
    loaded = torch.load(tmp_path / "t.pt", weights_only=True)
    fresh, _, _ = _tracker(mlp())
    fresh.load_state_dict(loaded)
    assert fresh.steps == state["steps"] and fresh.epoch == 1
    assert fresh.audit_shadow is None   # the audit ran in epoch 1 and was retired


def test_state_with_pending_batches_is_refused():
    model = mlp()
    tracker, opt, data = _tracker(model)
    next(iter(tracker.batches(loader(data))))
    with pytest.raises(LockstepError, match="between optimizer steps"):
        tracker.state_dict()
