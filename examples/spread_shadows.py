"""Many shadows, several processes: the K shadows spread over torchrun's ranks (shadow_group).

Invented scenario: a lighthouse keepers' cooperative predicts whether a fog bank reaches the harbour
within three hours from seven readings (sea-air temperature gap, dew point spread, wind, swell,
visibility trend, ...). The readings are generated here, identically on every rank.

Every rank runs this very loop with the same seeds (the main run is replicated); shadow k trains on
rank k % world_size only, so each rank steps K / world_size shadows and nothing is exchanged
between epoch ends. Every rank gets the same reading; only rank 0 prints and writes files.

    torchrun --standalone --nproc_per_node=2 examples/spread_shadows.py --shadows 16

On several machines, run the same command on each with --nnodes, --node_rank and
--rdzv_endpoint (torchrun's own options); set OMP_NUM_THREADS so the ranks on one machine do not
share cores.
"""

from __future__ import annotations

import argparse

import torch
import torch.distributed as dist
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import StabilityTracker

READINGS = 7


def harbour_logs(count: int, seed: int) -> TensorDataset:
    """``count`` generated evenings: seven readings and "fog in the harbour within 3 h?"."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, READINGS, generator=g)
    fog = 1.1 * x[:, 0] - 0.8 * x[:, 1].abs() + 0.5 * x[:, 2] * x[:, 4] - 0.4 * x[:, 6]
    return TensorDataset(x, (fog + 0.5 * torch.randn(count, generator=g) > 0.0).long())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--epochs", type=int, default=4)
    parser.add_argument("--shadows", type=int, default=16)
    parser.add_argument("--log-dir", default=None)
    args = parser.parse_args()

    dist.init_process_group("gloo")          # torchrun sets RANK, WORLD_SIZE, MASTER_ADDR, ...
    rank = dist.get_rank()

    train_set = harbour_logs(1500, seed=31)  # the same data on every rank
    fresh = harbour_logs(300, seed=32)       # evenings never trained on: swapped in, held out

    torch.manual_seed(5)                     # the same weights and dropout draws on every rank
    model = nn.Sequential(nn.Linear(READINGS, 32), nn.Tanh(), nn.Dropout(0.1), nn.Linear(32, 2))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    order = torch.Generator().manual_seed(11)   # the same shuffling on every rank
    loader = DataLoader(train_set, batch_size=32, shuffle=True, generator=order)

    tracker = StabilityTracker(model, optimizer, train_set=train_set, loss_fn=F.cross_entropy,
                               replacements=fresh, shadows=args.shadows, seed=0,
                               log_dir=args.log_dir, shadow_group=dist.group.WORLD)
    for _ in range(args.epochs):
        for x, y in tracker.batches(loader):
            optimizer.zero_grad()
            F.cross_entropy(model(x), y).backward()
            optimizer.step()
        reading = tracker.finish_epoch()
        if rank == 0:
            gap = "n/a" if reading.gap_estimate is None else \
                f"{reading.gap_estimate:.4f} +/- {reading.gap_stderr:.4f}"
            print(f"epoch {reading.epoch}: {len(reading.divergence)} shadows on "
                  f"{dist.get_world_size()} ranks (this rank steps {tracker.held_shadows()}), "
                  f"mean divergence {sum(reading.divergence) / len(reading.divergence):.4f}, "
                  f"gap estimate {gap}, null-swap audit {reading.audit_divergence}")
    tracker.close()
    dist.destroy_process_group()


if __name__ == "__main__":
    main()
