"""Stability tracking in a data-parallel run (DistributedDataParallel, one process per rank).

Invented scenario: a wind-power operator predicts whether a turbine gearbox will need service
within a month from eight readings (vibration bands, oil temperature, load, wind speed, ...). The
readings are generated here, identically on every rank; a DistributedSampler gives each rank its
shard of every epoch. Every rank builds the same tracker; only rank 0 prints and writes files.

Launch on one machine with two CPU processes (gloo):

    torchrun --standalone --nproc_per_node=2 examples/data_parallel.py --log-dir runs/turbines

On GPUs (one process per GPU) the same script picks NCCL and ``cuda:LOCAL_RANK``.
"""

from __future__ import annotations

import argparse
import os
from typing import Any

import torch
import torch.distributed as dist
import torch.nn.functional as F
from torch import nn
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DataLoader, Subset, TensorDataset
from torch.utils.data.distributed import DistributedSampler

from sgdstab.tracking.distributed import DataParallelStabilityTracker

READINGS = 8


def gearbox_logs(count: int, seed: int) -> TensorDataset:
    """``count`` generated turbine-months: eight readings and "serviced within a month?"."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, READINGS, generator=g)
    wear = 0.9 * x[:, 0] + 0.6 * x[:, 3] * x[:, 5] - 0.7 * x[:, 6] + 0.3 * torch.sin(2 * x[:, 1])
    needs_service = (wear + 0.6 * torch.randn(count, generator=g) > 0.4).long()
    return TensorDataset(x, needs_service)


class GearboxNet(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.layers = nn.Sequential(nn.Linear(READINGS, 32), nn.Tanh(), nn.Dropout(0.1),
                                    nn.Linear(32, 2))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.layers(x)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--epochs", type=int, default=4)
    parser.add_argument("--batch-size", type=int, default=16, help="per rank")
    parser.add_argument("--shadows", type=int, default=4)
    parser.add_argument("--log-dir", default=None)
    args = parser.parse_args()

    use_cuda = torch.cuda.is_available()
    dist.init_process_group("nccl" if use_cuda else "gloo")
    rank, world = dist.get_rank(), dist.get_world_size()
    local_rank = int(os.environ.get("LOCAL_RANK", 0))
    device = torch.device("cuda", local_rank) if use_cuda else torch.device("cpu")
    if use_cuda:
        torch.cuda.set_device(device)

    everything = gearbox_logs(1200, seed=2024)             # the same data on every rank
    train_set = Subset(everything, range(1000))
    held_out = Subset(everything, range(1000, 1200))       # fresh examples to swap in

    torch.manual_seed(0)                                   # DDP copies rank 0's weights anyway
    model = GearboxNet().to(device)
    ddp = DistributedDataParallel(model, device_ids=[local_rank] if use_cuda else None)
    optimizer = torch.optim.SGD(ddp.parameters(), lr=0.1)
    sampler = DistributedSampler(train_set, shuffle=True, seed=7)
    loader = DataLoader(train_set, batch_size=args.batch_size, sampler=sampler)

    def step_loss(net: nn.Module, batch: Any) -> torch.Tensor:
        x, y = batch                                       # batches stay on the CPU loader side
        return F.cross_entropy(net(x.to(device)), y.to(device))

    tracker = DataParallelStabilityTracker(
        ddp, optimizer, train_set=train_set, step_loss=step_loss, shadows=args.shadows,
        replacements=held_out, seed=13, log_dir=args.log_dir)
    for epoch in range(args.epochs):
        sampler.set_epoch(epoch)                           # new shard order every epoch
        for batch in tracker.batches(loader):
            optimizer.zero_grad()
            step_loss(ddp, batch).backward()               # DDP averages the main gradients
            optimizer.step()                               # the shadows step (and average) here
        reading = tracker.finish_epoch()                   # the same reading on every rank
        if rank == 0:
            audit = reading.audit_divergence
            print(f"epoch {reading.epoch} ({reading.steps} steps so far, global batch {world} x "
                  f"{args.batch_size}): divergence per shadow "
                  + ", ".join(f"{d:.4f}" for d in reading.divergence)
                  + ("" if audit is None else f"; null-swap audit {audit}")
                  + ("" if reading.gap_estimate is None else
                     f"; replace-one gap estimate {reading.gap_estimate:+.4f}"))
    tracker.close()
    dist.destroy_process_group()


if __name__ == "__main__":
    main()
