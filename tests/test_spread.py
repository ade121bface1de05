"""Shadows spread over processes (shadow_group): real multi-process runs on gloo over 127.0.0.1.

Each run starts one process per rank (tests/_spread_worker.py) on a free local port, waits a bounded
time and kills whatever is left in a ``finally``. Every rank runs the same replicated loop; the
reference is the same loop in this process with one tracker holding all K shadows.
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

import pytest
import torch
import torch.distributed as dist
import torch.nn.functional as F
from torch import nn
from torch.utils.data import TensorDataset

from sgdstab import LockstepError, StabilityTracker

from ._launch import launch_ranks, run_torchrun
from ._spread_worker import run

WORKER = Path(__file__).with_name("_spread_worker.py")

pytestmark = pytest.mark.skipif(not dist.is_available() or not dist.is_gloo_available(),
                                reason="torch.distributed with gloo is not available")

# n = 90 training rows, 30 held out to swap in; K = 5 shadows over 2 ranks: rank 0 steps shadows
# 0, 2, 4 and the null-swap audit, rank 1 steps shadows 1 and 3. Dropout on.
BASE = {"n": 90, "held_out": 30, "batch": 8, "epochs": 3, "lr": 0.2,
        "shadows": 5, "data_seed": 3, "model_seed": 8, "loader_seed": 21, "loop_seed": 4,
        "tracker_seed": 6}


def _launch(config: dict, tmp_path: Path, world: int = 2, timeout: float = 150.0,
            expect_ok: bool = True) -> list[dict | None]:
    """Run ``world`` spread-tracker ranks; each rank's result, None if it wrote none."""
    return launch_ranks(WORKER, config, tmp_path, world, timeout, expect_ok)


def _assert_close(mine, theirs, path="reading", rel=1e-6):
    """Equal structure; floats within ``rel`` relative difference, everything else exactly."""
    if isinstance(theirs, float) and isinstance(mine, (int, float)) and \
            not isinstance(mine, bool):
        assert math.isclose(mine, theirs, rel_tol=rel, abs_tol=1e-12), \
            f"{path}: {mine} vs {theirs}"
    elif isinstance(theirs, dict):
        assert isinstance(mine, dict) and set(mine) == set(theirs), f"{path}: keys differ"
        for key in theirs:
            _assert_close(mine[key], theirs[key], f"{path}.{key}", rel)
    elif isinstance(theirs, (list, tuple)):
        assert isinstance(mine, (list, tuple)) and len(mine) == len(theirs), f"{path}: length"
        for k, (a, b) in enumerate(zip(mine, theirs)):
            _assert_close(a, b, f"{path}[{k}]", rel)
    else:
        assert mine == theirs, f"{path}: {mine!r} vs {theirs!r}"


@pytest.fixture(scope="module")
def spread_runs(tmp_path_factory):
    tmp_path = tmp_path_factory.mktemp("spread")
    config = {**BASE, "log_dir": str(tmp_path / "run_rank{rank}")}
    ranks = _launch(config, tmp_path / "two")
    reference = run(BASE)   # one process holding all K shadows, no run directory
    return config, ranks, reference, tmp_path


def test_two_ranks_return_the_single_process_reading(spread_runs):
    _, ranks, reference, _ = spread_runs
    assert reference["engine"] == "per_shadow"
    for epoch, ref in enumerate(reference["readings"]):
        assert ranks[0]["readings"][epoch] == ranks[1]["readings"][epoch]   # one reading
        _assert_close(ranks[0]["readings"][epoch], ref, f"epoch {epoch + 1}")
    first, last = ranks[0]["readings"][0], ranks[0]["readings"][-1]
    assert first["audit_divergence"] == 0.0 and reference["readings"][0]["audit_divergence"] == 0.0
    assert min(last["divergence"]) > 1e-4          # every shadow, on either rank, moved
    assert last["gap_estimate"] is not None and last["gap_stderr"] is not None
    assert last["expected_bound"] is not None and len(last["path_bound"]) == BASE["shadows"]
    assert ranks[0]["hits"] == ranks[1]["hits"] == reference["hits"]
    assert ranks[0]["forked_at"] == ranks[1]["forked_at"] == reference["forked_at"]


def test_each_rank_steps_only_its_share_and_matches_the_reference_shadows(spread_runs):
    _, ranks, reference, _ = spread_runs
    assert ranks[0]["held"] == [0, 2, 4] and ranks[1]["held"] == [1, 3]
    assert ranks[0]["main"] == ranks[1]["main"] == reference["main"]   # replicated main run
    for result in ranks:
        for k, flat in result["shadows"].items():
            _assert_close(flat, reference["shadows"][int(k)], f"shadow {k}")


def test_only_rank_zero_writes_the_run_directory(spread_runs):
    config, ranks, _, tmp_path = spread_runs
    rank0 = Path(config["log_dir"].format(rank=0))
    assert not Path(config["log_dir"].format(rank=1)).exists()
    lines = (rank0 / "history.jsonl").read_text(encoding="utf-8").splitlines()
    assert len(lines) == config["epochs"]
    for line, reading in zip(lines, ranks[0]["readings"]):
        record = json.loads(line)
        record.pop("schema_version", None), record.pop("sgdstab_version", None)   # file-only
        _assert_close(record, reading, rel=0.0)
    run_json = json.loads((rank0 / "run.json").read_text(encoding="utf-8"))
    assert run_json["spread"]["world_size"] == 2 and run_json["audit"] is True
    assert len(run_json["shadows"]) == BASE["shadows"]


def test_resumed_spread_run_equals_the_uninterrupted_one(spread_runs, tmp_path):
    config, ranks, _, _ = spread_runs
    checkpoint = str(tmp_path / "state_rank{rank}.pt")
    first = _launch({**BASE, "epochs": 2, "save_after": 2, "checkpoint": checkpoint},
                    tmp_path / "first")
    second = _launch({**BASE, "first_epoch": 2, "checkpoint": checkpoint}, tmp_path / "second")
    for rank in range(2):
        assert first[rank]["readings"] == ranks[rank]["readings"][:2]
        assert second[rank]["readings"] == ranks[rank]["readings"][2:]   # bit for bit
        assert second[rank]["main"] == ranks[rank]["main"]
        assert second[rank]["shadows"] == ranks[rank]["shadows"]


@pytest.mark.parametrize(("change", "named"), [
    ("seed_by_rank", ["seed", "shadows (K and the swapped examples)"]),
    ("model_seed_by_rank", ["model (parameters and buffers)"])])
def test_ranks_that_differ_are_refused_with_what_differs(tmp_path, change, named):
    ranks = _launch({**BASE, "epochs": 1, change: True}, tmp_path)
    for result in ranks:
        assert result["error"] == "LockstepError"
        message = result["message"]
        listed = message.split("disagree on: ")[1].split(". Spreading")[0]
        assert listed == "; ".join(f"{what} (ranks [1] differ from rank 0)" for what in named)


def test_a_rank_that_dies_ends_the_other_with_an_error_not_a_hang(tmp_path):
    # Rank 1 exits in the middle of epoch 2; rank 0 trains on to the epoch's end (no per-step
    # communication) and its epoch-end exchange fails at once (the peer's socket is closed) or
    # after shadow_timeout (20 s) at the latest.
    started = time.monotonic()
    ranks = _launch({**BASE, "die_rank": 1, "shadow_timeout": 20}, tmp_path, timeout=120,
                    expect_ok=False)
    assert ranks[1] is None
    assert ranks[0]["error"] == "LockstepError"
    assert "exchange with the other ranks of the shadow group failed" in ranks[0]["message"]
    assert ranks[0]["seconds"] < 60 and time.monotonic() - started < 120


def test_a_shadow_frozen_on_one_rank_is_frozen_in_every_reading(tmp_path):
    # Shadow 1 (stepped on rank 1) swaps in a NaN row: it is frozen there; rank 0 learns it at
    # the epoch end and both return the single-process reading, NaN divergence and fault note.
    config = {**BASE, "epochs": 2, "swap": [3, 10, 17], "nan_swap": [10]}
    ranks = _launch(config, tmp_path)
    reference = run(config)
    assert reference["faults"][1] is not None and reference["faults"][0] is None
    for result in ranks:
        assert result["faults"] == reference["faults"]
        for mine, theirs in zip(result["readings"], reference["readings"]):
            _assert_close(mine, theirs)
    assert ranks[0]["readings"][-1]["divergence"][1] is None     # NaN, written as null
    assert any("stepped on rank 1" in w for w in ranks[0]["warnings"]
               if w.startswith("ShadowFaultWarning"))


@pytest.mark.slow
def test_three_ranks_return_the_single_process_reading(tmp_path):
    config = {**BASE, "shadows": 7}
    ranks = _launch(config, tmp_path, world=3)
    reference = run(config)
    assert [r["held"] for r in ranks] == [[0, 3, 6], [1, 4], [2, 5]]
    for epoch, ref in enumerate(reference["readings"]):
        assert ranks[0]["readings"][epoch] == ranks[1]["readings"][epoch] == \
            ranks[2]["readings"][epoch]
        _assert_close(ranks[0]["readings"][epoch], ref)
    assert ranks[0]["readings"][0]["audit_divergence"] == 0.0


# -- in this process, a one-rank group -------------------------------------------------------------
@pytest.fixture
def one_rank_group(tmp_path):
    dist.init_process_group("gloo", init_method=f"file://{tmp_path / 'store'}", rank=0,
                            world_size=1)
    try:
        yield dist.group.WORLD
    finally:
        dist.destroy_process_group()


def _small():
    data = TensorDataset(torch.randn(20, 3), torch.randint(0, 2, (20,)))
    model = nn.Linear(3, 2)
    return data, model, torch.optim.SGD(model.parameters(), lr=0.1)


def test_shadow_group_needs_an_initialised_process_group():
    if dist.is_initialized():
        pytest.skip("a process group is already initialised in this process")
    data, model, optimizer = _small()
    with pytest.raises(LockstepError, match="init_process_group"):
        StabilityTracker(model, optimizer, train_set=data, loss_fn=F.cross_entropy,
                         shadow_group=object())


def test_data_parallel_and_spread_shadows_do_not_combine(one_rank_group):
    from torch.nn.parallel import DistributedDataParallel

    from sgdstab.tracking.distributed import DataParallelStabilityTracker
    from sgdstab.tracking.spread import SpreadStabilityTracker

    data, model, optimizer = _small()
    ddp = DistributedDataParallel(model)
    with pytest.raises(LockstepError, match="not both"):
        StabilityTracker(ddp, optimizer, train_set=data, loss_fn=F.cross_entropy,
                         shadow_group=one_rank_group)
    with pytest.raises(LockstepError, match="cannot spread its shadows"):
        DataParallelStabilityTracker(ddp, optimizer, train_set=data, loss_fn=F.cross_entropy,
                                     shadow_group=one_rank_group)
    tracker = StabilityTracker(model, optimizer, train_set=data, loss_fn=F.cross_entropy,
                               shadows=2, shadow_group=one_rank_group)
    assert isinstance(tracker, SpreadStabilityTracker) and tracker.held_shadows() == [0, 1]
    tracker.close()
    with pytest.raises(LockstepError, match="batched"):
        StabilityTracker(model, optimizer, train_set=data, loss_fn=F.cross_entropy,
                         engine="batched", shadow_group=one_rank_group)
    with pytest.raises(TypeError, match="process group"):
        StabilityTracker(model, optimizer, train_set=data, loss_fn=F.cross_entropy,
                         shadow_group="world")


def test_torchrun_example_runs_on_two_cpu_processes(tmp_path):
    example = Path(__file__).parents[1] / "examples" / "spread_shadows.py"
    text = run_torchrun(example, ["--epochs", "2", "--shadows", "4",
                                  "--log-dir", str(tmp_path / "fog")], timeout=150)
    lines = [line for line in text.splitlines() if line.startswith("epoch ")]
    assert len(lines) == 2                                   # printed by rank 0 only
    assert "(this rank steps [0, 2])" in lines[0] and "null-swap audit 0.0" in lines[0]
    assert len((tmp_path / "fog" / "history.jsonl").read_text().splitlines()) == 2
