"""Run directory outputs: history.jsonl, run.json and TensorBoard events.

TensorBoard events are read back with tensorboard's own event reader (EventAccumulator).
"""

from __future__ import annotations

import json

import pytest
import torch
import torch.nn.functional as F
from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

from sgdstab import EpochReading, StabilityTracker, read_history

from ._toy import loader, mlp, pebbles, train


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("run")
    data = pebbles()
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.2)
    with StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2,
                          replacements=pebbles(count=30, seed=3), log_dir=out) as tracker:
        readings = train(model, opt, loader(data), epochs=3, tracker=tracker)
    return out, readings


def test_history_has_one_flushed_object_per_epoch(run_dir):
    out, readings = run_dir
    records = read_history(out)
    assert [r["epoch"] for r in records] == [1, 2, 3]
    for record, reading in zip(records, readings):
        assert record["divergence"] == list(reading.divergence)
        assert record["gap_estimate"] == reading.gap_estimate
        assert EpochReading.from_dict(record) == EpochReading.from_dict(reading.to_dict())
    run = json.loads((out / "run.json").read_text())
    assert run["n"] == 96 and len(run["shadows"]) == 2


def test_tensorboard_scalars_read_back_with_tensorboards_event_reader(run_dir):
    out, readings = run_dir
    events = EventAccumulator(str(out))
    events.Reload()
    tags = set(events.Tags()["scalars"])
    assert {"sgdstab/divergence/shadow_0", "sgdstab/divergence/shadow_1",
            "sgdstab/divergence/null_swap_audit", "sgdstab/stability/loss_difference_max",
            "sgdstab/stability/loss_difference_mean", "sgdstab/gap/replace_one_estimate",
            "sgdstab/loss/train_probe", "sgdstab/loss/holdout_probe"} <= tags
    assert all(tag.startswith("sgdstab/") for tag in tags)
    values = [e.value for e in events.Scalars("sgdstab/divergence/shadow_1")]
    steps = [e.step for e in events.Scalars("sgdstab/divergence/shadow_1")]
    assert steps == [r.steps for r in readings]   # the optimizer step count, not the epoch
    assert steps != [1, 2, 3]
    assert values == pytest.approx([r.divergence[1] for r in readings], rel=1e-6)


def test_history_and_advice_records_carry_the_schema_and_package_versions(run_dir, tmp_path):
    from sgdstab import __version__
    from sgdstab.outputs.reading import SCHEMA_VERSION

    out, _ = run_dir
    records = read_history(out)
    assert all(r["schema_version"] == SCHEMA_VERSION and r["sgdstab_version"] == __version__
               for r in records)
    # a record written before the fields existed still reads
    old = {k: v for k, v in records[0].items() if k not in ("schema_version", "sgdstab_version")}
    (tmp_path / "history.jsonl").write_text(json.dumps(old) + "\n")
    assert EpochReading.from_dict(read_history(tmp_path)[0]).epoch == 1


def test_a_truncated_last_line_is_skipped_with_a_warning(run_dir, tmp_path):
    out, _ = run_dir
    damaged = tmp_path / "history.jsonl"
    text = (out / "history.jsonl").read_text()
    damaged.write_text(text + text.splitlines()[0][:40])
    with pytest.warns(UserWarning, match="truncated"):
        records = read_history(damaged)
    assert len(records) == 3


def test_non_finite_values_are_written_as_null(tmp_path):
    reading = EpochReading(epoch=1, steps=1, divergence=(float("inf"),), audit_divergence=None,
                           layer_divergence={}, loss_difference_max=float("nan"),
                           loss_difference_mean=None, gap_estimate=None, gap_stderr=None,
                           train_loss=None, holdout_loss=None)
    record = json.loads(reading.to_json())
    assert record["divergence"] == [None] and record["loss_difference_max"] is None


def test_a_fresh_run_in_a_used_directory_sets_the_old_history_aside(run_dir, tmp_path):
    out, _ = run_dir
    target = tmp_path / "again"
    target.mkdir()
    (target / "history.jsonl").write_text((out / "history.jsonl").read_text())
    data = pebbles()
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.2)
    with pytest.warns(UserWarning, match="earlier run"):
        with StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1,
                              log_dir=target) as tracker:
            train(model, opt, loader(data), epochs=2, tracker=tracker)
    assert [r["epoch"] for r in read_history(target)] == [1, 2]
    assert len(read_history(target / "history.previous-1.jsonl")) == 3
