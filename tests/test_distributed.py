"""Data-parallel tracking: real multi-process runs on the gloo backend over 127.0.0.1.

Each run starts one process per rank (tests/_distributed_worker.py) on a free local port, waits a
bounded time and kills whatever is left in a ``finally``. The single-process reference trains with
``StabilityTracker`` on a batch sampler that yields the union of what each rank's
``DistributedSampler`` yields, so it sees the data-parallel run's global batches.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.distributed as dist
from torch import nn

from ._distributed_worker import buoy_readings, run_reference
from ._launch import launch_ranks, run_torchrun

WORKER = Path(__file__).with_name("_distributed_worker.py")

pytestmark = pytest.mark.skipif(not dist.is_available() or not dist.is_gloo_available(),
                                reason="torch.distributed with gloo is not available")


def _launch(config: dict, tmp_path: Path, world: int = 2, timeout: float = 120.0) -> list[dict]:
    """Run ``world`` data-parallel worker processes to completion and return their results."""
    results = launch_ranks(WORKER, config, tmp_path, world, timeout)
    assert all(r is not None for r in results), "a rank exited 0 without writing its result"
    return results  # type: ignore[return-value]


def _sampler_global_batches(n: int, world: int, batch: int, seed: int, epoch: int) -> list:
    """The global batches of one epoch, rebuilt from DistributedSampler's documented algorithm.

    Source: torch/utils/data/distributed.py (DistributedSampler.__iter__, torch 2.13, read on this
    machine): randperm(n) from a generator seeded with seed + epoch, padded with its own head to a
    multiple of the number of replicas, rank r taking positions r, r + world, ...
    """
    g = torch.Generator().manual_seed(seed + epoch)
    order = torch.randperm(n, generator=g).tolist()
    total = math.ceil(n / world) * world
    order += order[:total - n]
    local = [order[r:total:world] for r in range(world)]
    steps = math.ceil(len(local[0]) / batch)
    return [sum((part[t * batch:(t + 1) * batch] for part in local), []) for t in range(steps)]


def _first_of_epoch(n: int, seed: int, epoch: int) -> int:
    return int(torch.randperm(n, generator=torch.Generator().manual_seed(seed + epoch))[0])


# n = 45 with 2 ranks and batch 4: each rank gets ceil(45 / 2) = 23 indices (one padded repeat),
# i.e. five batches of 4 and a last, uneven batch of 3; global batches of 8, ..., 8, 6.
LINEAR = {"n": 45, "batch": 4, "epochs": 3, "lr": 0.3, "dtype": "float64", "model": "linear",
          "data_seed": 3, "model_seed": 11, "sampler_seed": 17, "tracker_seed": 5,
          "constants": {"lipschitz": 4.0, "smoothness": 2.0, "convex": True}}


@pytest.fixture(scope="module")
def linear_runs(tmp_path_factory):
    tmp_path = tmp_path_factory.mktemp("linear")
    n, seed = LINEAR["n"], LINEAR["sampler_seed"]
    padded = _first_of_epoch(n, seed, 0)     # epoch 0's first index: drawn again as padding
    config = {**LINEAR, "log_dir": str(tmp_path / "run_rank{rank}"),
              "swap": [[padded, 1 if padded != 1 else 2], [7, "nan"], [20, 33]]}
    started = time.monotonic()
    ranks = _launch(config, tmp_path)
    elapsed = time.monotonic() - started
    reference = run_reference(config, world=2)
    return config, ranks, reference, tmp_path, elapsed


def test_recorded_global_batches_are_the_union_of_the_ranks_sampler_batches(linear_runs):
    config, ranks, reference, _, _ = linear_runs
    expected = []
    for epoch in range(config["epochs"]):
        expected += _sampler_global_batches(config["n"], 2, config["batch"],
                                            config["sampler_seed"], epoch)
    assert [len(b) for b in expected[:6]] == [8, 8, 8, 8, 8, 6]     # uneven last batches
    for result in ranks:
        assert result["batches"] == expected
    assert reference["batches"] == expected   # the reference really trains on the same batches


def test_padding_repeat_is_hit_twice_and_hits_use_the_global_batch(linear_runs):
    config, ranks, reference, _, _ = linear_runs
    # Shadow 0 swaps epoch 0's first index, which rank 0 draws at step 0 and rank 1 draws again
    # at step 5 as DistributedSampler's padding (position 45 of 46 goes to rank 45 % 2 = 1).
    for result in ranks + [reference]:
        hits = result["hits"][0]
        assert hits[0] == 1 and hits[5] == 1
        for step, batch in enumerate(result["batches"]):
            for k, (index, _) in enumerate(config["swap"]):
                assert result["hits"][k][step] == batch.count(index)
    assert ranks[0]["hits"] == ranks[1]["hits"] == reference["hits"]
    assert ranks[0]["forked_at"] == ranks[1]["forked_at"] == reference["forked_at"]


def test_two_ranks_match_a_single_process_on_the_same_global_batches(linear_runs):
    _, ranks, reference, _, elapsed = linear_runs
    # Tolerance: float64 throughout. DDP averages two per-rank means (each rank's sum times 1/2,
    # then one all-reduce sum) while the reference takes one mean over the global batch, so the
    # two differ by rounding only; observed below ~1e-15 relative, asserted at rtol 1e-9.
    main_ref = np.array(reference["main"])
    for result in ranks:
        assert np.allclose(result["main"], main_ref, rtol=1e-9, atol=1e-12)
    rows = []
    for r0, r1, ref in zip(ranks[0]["readings"], ranks[1]["readings"], reference["readings"]):
        assert r0 == r1                                   # every rank returns rank 0's reading
        assert r0["audit_divergence"] in (None, 0.0)
        finite = [d for d in ref["divergence"] if d is not None]
        assert finite and any(d > 1e-3 for d in finite)   # the shadows really moved
        assert np.allclose(np.array(r0["divergence"], dtype=float),
                           np.array(ref["divergence"], dtype=float), rtol=1e-9, atol=1e-12,
                           equal_nan=True)          # a frozen shadow reads NaN in both
        assert np.allclose(np.array(r0["path_bound"], dtype=float),
                           np.array(ref["path_bound"], dtype=float), rtol=1e-12, atol=0)
        for key in ("expected_bound", "uniform_stability", "loss_difference_max"):
            if ref[key] is None:
                assert r0[key] is None
            else:
                assert math.isclose(r0[key], ref[key], rel_tol=1e-9, abs_tol=1e-12)
        rows.append(max(abs(a - b) / max(abs(b), 1e-300) for a, b in
                        zip(r0["divergence"], ref["divergence"]) if a is not None and b))
    assert ranks[0]["readings"][0]["audit_divergence"] == 0.0
    print(f"\n2-rank linear run {elapsed:.1f}s; max relative divergence difference per epoch vs "
          f"single process: {[f'{r:.1e}' for r in rows]}")


def test_shadows_are_bit_identical_on_both_ranks(linear_runs):
    _, ranks, _, _, _ = linear_runs
    assert ranks[0]["main"] == ranks[1]["main"]           # DDP's own guarantee, for reference
    assert ranks[0]["shadows"] == ranks[1]["shadows"]


def test_non_finite_shadow_on_one_rank_is_frozen_on_every_rank(linear_runs):
    # Shadow 1 swaps example 7 for a NaN row: only the rank whose local batch holds index 7 sees a
    # non-finite loss; the ranks agree and freeze it before stepping, as the single process does
    # when its global batch holds the NaN row. The other shadows go on; nothing hangs.
    _, ranks, reference, _, _ = linear_runs
    assert reference["faults"][1] is not None
    assert ranks[0]["faults"] == ranks[1]["faults"] == reference["faults"]
    assert reference["faults"][0] is None and reference["faults"][2] is None
    first_hit = reference["hits"][1].index(1)
    assert reference["faults"][1].endswith(f"step {first_hit}")
    frozen = np.array(ranks[0]["shadows"][1])
    assert np.isfinite(frozen).all()                      # frozen before its step, not after
    assert np.allclose(frozen, reference["shadows"][1], rtol=1e-9, atol=1e-12)


def test_only_rank_zero_writes_the_run_directory(linear_runs):
    config, _, _, tmp_path, _ = linear_runs
    rank0, rank1 = tmp_path / "run_rank0", tmp_path / "run_rank1"
    assert not rank1.exists()
    lines = (rank0 / "history.jsonl").read_text(encoding="utf-8").splitlines()
    assert len(lines) == config["epochs"]
    run = json.loads((rank0 / "run.json").read_text(encoding="utf-8"))
    assert run["data_parallel"]["world_size"] == 2
    assert run["data_parallel"]["gradient_average"] == "ddp_buckets"
    assert any(name.startswith("events.out.tfevents") for name in os.listdir(rank0))


# A float32 network with BatchNorm, dropout and momentum: dropout masks differ between ranks
# (each rank's torch RNG), BatchNorm buffers follow DDP's broadcast from rank 0.
MLP = {"n": 64, "batch": 8, "epochs": 2, "lr": 0.05, "momentum": 0.9, "dtype": "float32",
       "model": "mlp", "data_seed": 4, "model_seed": 2, "sampler_seed": 9, "tracker_seed": 1,
       "shadows": 2}


@pytest.mark.parametrize("variant", [{}, {"fp16_hook": True, "accumulate": 2}],
                         ids=["ddp_default", "fp16_hook_and_no_sync_accumulation"])
def test_null_swap_audit_is_exactly_zero_on_both_ranks(tmp_path, variant):
    # With the fp16 compression hook the main model's average is rounded to half precision: the
    # audit stays at exactly 0 only because the shadows' buckets go through the same hook (sending
    # them through DDP's default scaling instead gives an audit of ~0.2, tried by hand). With
    # accumulation, two micro-batches (the first under DDP's no_sync) make one step. Each run also
    # forgets DistributedSampler.set_epoch, which the tracker must point out.
    ranks = _launch({**MLP, **variant, "forget_set_epoch": True}, tmp_path)
    for result in ranks:
        assert result["readings"][0]["audit_divergence"] == 0.0
        assert not [w for w in result["warnings"] if w.startswith("LockstepWarning")]
        assert [w for w in result["warnings"] if "set_epoch" in w]
        assert max(result["readings"][-1]["divergence"]) > 0.0
    assert ranks[0]["shadows"] == ranks[1]["shadows"]
    assert ranks[0]["readings"] == ranks[1]["readings"]


@pytest.mark.slow
def test_three_ranks_audit_needs_ddp_bucket_order(tmp_path):
    # With three ranks a sum's rounding depends on the all-reduce's chunking of the buffer: only
    # averaging through DDP's own buckets keeps the audit at exactly 0. The per-parameter
    # fallback drifts (observed ~1e-9 on this network), which the audit must report.
    (tmp_path / "buckets").mkdir()
    exact = _launch(MLP, tmp_path / "buckets", world=3)
    for result in exact:
        assert result["readings"][0]["audit_divergence"] == 0.0
    (tmp_path / "fallback").mkdir()
    fallback = _launch({**MLP, "per_parameter": True}, tmp_path / "fallback", world=3)
    for result in fallback:
        assert result["readings"][0]["audit_divergence"] > 0.0
        assert any(w.startswith("LockstepWarning") for w in result["warnings"])


def test_ranks_with_different_seeds_are_refused(tmp_path):
    ranks = _launch({**MLP, "epochs": 1, "seed_offset_by_rank": True}, tmp_path)
    for result in ranks:
        assert result["error"] == "LockstepError"
        assert "seed" in result["message"]


def test_refuses_a_model_that_is_not_data_parallel():
    from sgdstab.tracking.distributed import DataParallelStabilityTracker

    model = nn.Linear(3, 2)
    with pytest.raises(TypeError, match="DistributedDataParallel"):
        DataParallelStabilityTracker(model, torch.optim.SGD(model.parameters(), lr=0.1),
                                     train_set=buoy_readings(10, 0, torch.float32))


def test_torchrun_example_runs_on_two_cpu_processes(tmp_path):
    example = Path(__file__).parents[1] / "examples" / "data_parallel.py"
    text = run_torchrun(example, ["--epochs", "2", "--shadows", "2",
                                  "--log-dir", str(tmp_path / "turbines")], timeout=120)
    lines = [line for line in text.splitlines() if line.startswith("epoch ")]
    assert len(lines) == 2                                   # printed by rank 0 only
    assert "null-swap audit 0.0" in lines[0]
    assert len((tmp_path / "turbines" / "history.jsonl").read_text().splitlines()) == 2


def test_close_waits_until_every_rank_has_closed(tmp_path):
    """Rank 0 closes 2 s after rank 1 (as when it writes the run directory): rank 1's close()
    returns only then, so no rank tears the process group down while another still uses it."""
    script = tmp_path / "two_ranks.py"
    script.write_text(
        "import sys, time, torch, torch.distributed as dist, torch.nn as nn\n"
        "from torch.nn.parallel import DistributedDataParallel\n"
        "from torch.utils.data import TensorDataset\n"
        "from sgdstab import DataParallelStabilityTracker\n"
        "rank = int(sys.argv[2])\n"
        "dist.init_process_group('gloo', init_method=f'file://{sys.argv[1]}', rank=rank,"
        " world_size=2)\n"
        "torch.manual_seed(0)\n"
        "data = TensorDataset(torch.randn(40, 3), torch.randint(0, 2, (40,)))\n"
        "model = DistributedDataParallel(nn.Linear(3, 2))\n"
        "tracker = DataParallelStabilityTracker(model, torch.optim.SGD(model.parameters(), lr=0.1),"
        " loss_fn=nn.functional.cross_entropy, train_set=data, shadows=2)\n"
        "if rank == 0:\n"
        "    time.sleep(2.0)\n"
        "start = time.monotonic(); tracker.close(); print(round(time.monotonic() - start, 2))\n"
        "dist.destroy_process_group()\n")
    store = tmp_path / "store"
    procs = [subprocess.Popen([sys.executable, str(script), str(store), str(rank)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for rank in range(2)]
    outputs = [proc.communicate(timeout=120) for proc in procs]
    assert all(proc.returncode == 0 for proc in procs), [err[-2000:] for _, err in outputs]
    waited = [float(out.split()[-1]) for out, _ in outputs]
    assert waited[1] >= 1.5 > waited[0]   # rank 1 waited for rank 0's close
