"""The two examples run end to end in their quick mode and say what they should."""

from __future__ import annotations

import runpy
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from sgdstab import estimate_lipschitz

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def _example(name: str) -> dict:
    return runpy.run_path(str(EXAMPLES / name))


def test_convex_example_certifies_its_bound(tmp_path: Path, capsys: pytest.CaptureFixture[str]):
    example = _example("convex_certified.py")
    made = example["main"](tmp_path / "run", quick=True)
    readings, advice, constants = made["readings"], made["advice"], made["constants"]

    # the declared constants are the logistic-loss closed forms, recomputed here with numpy
    train_set = example["hive_readings"](1200, seed=1)
    held_out = example["hive_readings"](600, seed=2)
    rows = np.concatenate([train_set.tensors[0].numpy(), held_out.tensors[0].numpy()])
    radius = float(np.linalg.norm(rows.astype(np.float64), axis=1).max())
    assert radius <= 1.0 + 1e-6
    assert constants.lipschitz == pytest.approx(radius, rel=1e-6)
    assert constants.smoothness == pytest.approx(radius**2 / 4, rel=1e-6)

    # a declared L is an upper bound: the largest per-example gradient seen cannot exceed it
    model = torch.nn.Linear(6, 1, bias=False)
    torch.nn.init.normal_(model.weight, std=3.0)
    seen = estimate_lipschitz(model, train_set.tensors, loss_fn=F.binary_cross_entropy_with_logits)
    assert seen <= constants.lipschitz * (1 + 1e-6)

    assert advice.bound_applies and advice.certified
    assert advice.criterion == "holdout_loss"      # the measured evidence chooses the stop
    assert advice.guarantee_epoch is not None       # the certified bound is reported beside it
    for reading in readings:
        assert reading.constants["source"] == "declared"
        assert reading.bounds["expected"]["applicable"]
        assert not reading.assumption_violated
        for measured, bound in zip(reading.divergence, reading.path_bound):
            assert measured <= bound * (1 + 1e-5)  # convex case: pathwise bound holds
    budget, planned = advice.budget, made["planned"].budget
    assert budget.method == "extrapolation" and planned.method == "planner"
    assert abs(budget.extra_epochs - planned.extra_epochs) <= 1  # two projections, one answer
    page = made["report"]
    assert page.is_file()
    assert f"Suggested stop: epoch {advice.suggested_epoch}" in page.read_text(encoding="utf-8")
    assert (tmp_path / "run" / "advice.json").is_file()
    assert "Every measured divergence stayed within its pathwise bound: yes" in \
        capsys.readouterr().out


def test_cnn_example_labels_its_constants_estimated(tmp_path: Path):
    example = _example("small_cnn_estimated.py")
    made = example["main"](tmp_path / "run", quick=True)
    readings, advice = made["readings"], made["advice"]
    assert len(readings) == 3
    assert all(r.constants["source"] == "estimated" for r in readings)
    assert all(r.constants["convex"] is False for r in readings)
    # running maxima: an estimate never falls from one epoch to the next
    lipschitz = [r.constants["lipschitz"] for r in readings]
    assert lipschitz == sorted(lipschitz)
    assert not advice.certified
    text = made["report"].read_text(encoding="utf-8")
    assert "<strong>estimated</strong>" in text
    assert "indicative" in text
