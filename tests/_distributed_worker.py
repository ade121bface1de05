"""One rank of a data-parallel test run, and the single-process reference it is compared with.

Invented scenario: weather buoys report six readings (swell height, gust, pressure drop, ...) and a
flag "squall within the hour"; the data are generated here. Run as a script by
tests/test_distributed.py, one process per rank, with RANK / WORLD_SIZE / MASTER_ADDR / MASTER_PORT
in the environment: ``python _distributed_worker.py CONFIG.json OUT.json``.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import sys
import warnings
from datetime import timedelta
from typing import Any

import torch
import torch.distributed as dist
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset
from torch.utils.data.distributed import DistributedSampler

from sgdstab import Constants, LockstepError, StabilityTracker

FEATURES = 6


def buoy_readings(count: int, seed: int, dtype: torch.dtype) -> TensorDataset:
    """``count`` generated buoy reports: six readings and a squall flag in {0, 1}."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, FEATURES, generator=g, dtype=torch.float64)
    score = 1.2 * x[:, 0] - 0.8 * x[:, 2] + 0.5 * torch.tanh(3 * x[:, 1]) + \
        0.4 * torch.randn(count, generator=g, dtype=torch.float64)
    return TensorDataset(x.to(dtype), (score > 0.2).long())


def squall_model(kind: str, seed: int, dtype: torch.dtype) -> nn.Module:
    """'linear' (softmax regression, convex) or 'mlp' (BatchNorm and dropout)."""
    torch.manual_seed(seed)
    if kind == "linear":
        model: nn.Module = nn.Linear(FEATURES, 2)
    elif kind == "mlp":
        model = nn.Sequential(nn.Linear(FEATURES, 64), nn.BatchNorm1d(64), nn.Tanh(),
                              nn.Dropout(0.25), nn.Linear(64, 96), nn.Tanh(), nn.Linear(96, 2))
    else:
        raise ValueError(kind)
    return model.to(dtype)


class GlobalBatches:
    """Batch sampler yielding, per step, the union of what each rank's DistributedSampler yields.

    Step t's list is rank 0's t-th local batch, then rank 1's, ... (the order the data-parallel
    tracker records), so a single process trains on exactly the data-parallel run's global batches.
    """

    def __init__(self, dataset: Any, world: int, batch_size: int, seed: int) -> None:
        self.samplers = [DistributedSampler(dataset, num_replicas=world, rank=r, shuffle=True,
                                            seed=seed) for r in range(world)]
        self.batch_size = batch_size

    def set_epoch(self, epoch: int) -> None:
        for sampler in self.samplers:
            sampler.set_epoch(epoch)

    def __iter__(self):
        size = self.batch_size
        local = []
        for sampler in self.samplers:
            order = list(sampler)
            local.append([order[i:i + size] for i in range(0, len(order), size)])
        for parts in zip(*local):
            yield [index for part in parts for index in part]

    def __len__(self) -> int:
        return math.ceil(len(self.samplers[0]) / self.batch_size)


def _swap(config: dict, data: TensorDataset) -> list[tuple[int, Any]] | None:
    if config.get("swap") is None:
        return None
    swap = []
    for index, source in config["swap"]:
        if source == "nan":
            x, y = data[index]
            swap.append((index, (torch.full_like(x, float("nan")), y)))
        else:
            swap.append((index, data[int(source)]))
    return swap


def _step_loss(config: dict):
    """The loss of one (micro-)batch, divided by the number of micro-batches per step."""
    accumulate = config.get("accumulate", 1)

    def step_loss(model: nn.Module, batch: Any) -> torch.Tensor:
        x, y = batch
        return F.cross_entropy(model(x), y) / accumulate

    return step_loss


def _tracker_options(config: dict, data: TensorDataset, seed: int) -> dict:
    options = {"train_set": data, "step_loss": _step_loss(config), "seed": seed,
               "shadows": config.get("shadows", 3), "swap": _swap(config, data)}
    if config.get("constants"):
        options["constants"] = Constants(**config["constants"])
    return options


def _optimizer(config: dict, model: nn.Module) -> torch.optim.Optimizer:
    return torch.optim.SGD(model.parameters(), lr=config["lr"],
                           momentum=config.get("momentum", 0.0))


def _flat(parameters) -> list[float]:
    return torch.cat([p.detach().double().reshape(-1) for p in parameters]).tolist()


def _summary(tracker: StabilityTracker, readings: list, main: nn.Module, caught: list) -> dict:
    history = tracker.history
    return {
        "readings": [r.to_dict() for r in readings],
        "batches": [b.tolist() for b in history.batch_indices()],
        "hits": [h.tolist() for h in history.shadow_hits()],
        "forked_at": [s.forked_at for s in tracker.shadows],
        "faults": [s.fault for s in tracker.shadows],
        "main": _flat(main.parameters()),
        "shadows": [_flat(tracker.engine.module_of(s).parameters()) for s in tracker.shadows],
        "warnings": [f"{w.category.__name__}: {w.message}" for w in caught],
    }


def _train(model_call: nn.Module, optimizer, loader, tracker, epochs: int, set_epoch,
           config: dict) -> list:
    """The user's loop; with ``accumulate`` > 1 the first micro-batches run under DDP no_sync."""
    accumulate = config.get("accumulate", 1)
    step_loss = _step_loss(config)
    readings = []
    for epoch in range(epochs):
        set_epoch(epoch)
        optimizer.zero_grad()
        for k, batch in enumerate(tracker.batches(loader)):
            last = (k + 1) % accumulate == 0
            quiet = getattr(model_call, "no_sync", None)
            with contextlib.nullcontext() if last or quiet is None else quiet():
                step_loss(model_call, batch).backward()
            if last:
                optimizer.step()
                optimizer.zero_grad()
        readings.append(tracker.finish_epoch())
    return readings


def run_rank(config: dict) -> dict:
    """Train one rank of the data-parallel run (the process group is initialised)."""
    from torch.nn.parallel import DistributedDataParallel

    from sgdstab.tracking.distributed import DataParallelStabilityTracker

    rank, world = dist.get_rank(), dist.get_world_size()
    dtype = getattr(torch, config["dtype"])
    data = buoy_readings(config["n"], config["data_seed"], dtype)
    model = squall_model(config["model"], config["model_seed"] + rank, dtype)  # DDP syncs rank 0's
    ddp = DistributedDataParallel(model)
    if config.get("fp16_hook"):
        from torch.distributed.algorithms.ddp_comm_hooks import default_hooks

        ddp.register_comm_hook(None, default_hooks.fp16_compress_hook)
    optimizer = _optimizer(config, ddp.module)
    sampler = DistributedSampler(data, num_replicas=world, rank=rank, shuffle=True,
                                 seed=config["sampler_seed"])
    loader = DataLoader(data, batch_size=config["batch"], sampler=sampler)
    seed = config["tracker_seed"] + (rank if config.get("seed_offset_by_rank") else 0)
    log_dir = config.get("log_dir")
    torch.manual_seed(1000 + rank)          # dropout masks differ between ranks, as in real runs
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            tracker = DataParallelStabilityTracker(
                ddp, optimizer, log_dir=None if log_dir is None else log_dir.format(rank=rank),
                **_tracker_options(config, data, seed))
        except LockstepError as error:
            return {"error": type(error).__name__, "message": str(error)}
        if config.get("per_parameter"):
            tracker.averager.exact = False   # the fallback: one all-reduce per parameter
        set_epoch = (lambda epoch: None) if config.get("forget_set_epoch") else sampler.set_epoch
        readings = _train(ddp, optimizer, loader, tracker, config["epochs"], set_epoch, config)
        tracker.close()
    return _summary(tracker, readings, ddp.module, caught)


def run_reference(config: dict, world: int) -> dict:
    """The same training in one process, on the data-parallel run's global batches."""
    dtype = getattr(torch, config["dtype"])
    data = buoy_readings(config["n"], config["data_seed"], dtype)
    model = squall_model(config["model"], config["model_seed"], dtype)
    optimizer = _optimizer(config, model)
    global_batches = GlobalBatches(data, world, config["batch"], config["sampler_seed"])
    loader = DataLoader(data, batch_sampler=global_batches)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        tracker = StabilityTracker(model, optimizer, **_tracker_options(config, data,
                                                                        config["tracker_seed"]))
        readings = _train(model, optimizer, loader, tracker, config["epochs"],
                          global_batches.set_epoch, config)
        tracker.close()
    return _summary(tracker, readings, model, caught)


def main() -> None:
    config_path, out_path = sys.argv[1], sys.argv[2]
    with open(config_path, encoding="utf-8") as handle:
        config = json.load(handle)
    torch.set_num_threads(1)
    dist.init_process_group("gloo", rank=int(os.environ["RANK"]),
                            world_size=int(os.environ["WORLD_SIZE"]),
                            timeout=timedelta(seconds=config.get("timeout", 60)))
    try:
        result = run_rank(config)
        dist.barrier()   # every rank is done with its collectives before the group goes away
    finally:
        dist.destroy_process_group()
    with open(out_path, "w", encoding="utf-8") as handle:
        json.dump(result, handle)
        handle.flush()
        os.fsync(handle.fileno())


if __name__ == "__main__":
    main()
    # Leave without running interpreter-exit destructors: a gloo worker thread still being torn
    # down at exit can abort the process ("terminate called without an active exception") after
    # the result is safely written.
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)
