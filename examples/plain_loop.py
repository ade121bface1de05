"""A plain training loop with a tracker: forecasting whether a ferry sailing runs late.

Invented scenario, generated data: six readings per sailing (wind, swell, passenger load, ...),
label 1 when the sailing ran late. Two changes to an ordinary loop: iterate
``tracker.batches(loader)`` instead of ``loader`` and call ``tracker.finish_epoch()``.

    python examples/plain_loop.py [--epochs 6] [--out runs/ferry]
"""

from __future__ import annotations

import argparse

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import StabilityTracker


def sailings(count: int, seed: int) -> TensorDataset:
    g = torch.Generator().manual_seed(seed)
    readings = torch.randn(count, 6, generator=g)
    lateness = 1.2 * readings[:, 0] + 0.8 * readings[:, 1] * readings[:, 2] - 0.5 * readings[:, 3]
    late = (lateness + 0.7 * torch.randn(count, generator=g) > 0.3).long()
    return TensorDataset(readings, late)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--epochs", type=int, default=6)
    parser.add_argument("--out", default="runs/ferry")
    args = parser.parse_args()

    torch.manual_seed(0)
    train_set, held_out = sailings(800, seed=1), sailings(400, seed=2)
    model = nn.Sequential(nn.Linear(6, 32), nn.ReLU(), nn.Dropout(0.1), nn.Linear(32, 2))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    scheduler = torch.optim.lr_scheduler.CosineAnnealingLR(optimizer, T_max=args.epochs)
    loader = DataLoader(train_set, batch_size=64, shuffle=True)

    tracker = StabilityTracker(model, optimizer, loss_fn=F.cross_entropy, train_set=train_set,
                               shadows=4, replacements=held_out, log_dir=args.out, seed=0)
    with tracker:
        for _ in range(args.epochs):
            for x, y in tracker.batches(loader):
                optimizer.zero_grad()
                F.cross_entropy(model(x), y).backward()
                optimizer.step()
            scheduler.step()
            r = tracker.finish_epoch()
            gap = "n/a" if r.gap_estimate is None else f"{r.gap_estimate:.4f} ± {r.gap_stderr:.4f}"
            print(f"epoch {r.epoch}: divergence {max(r.divergence):.4f}, "
                  f"loss difference max {r.loss_difference_max:.4f}, gap estimate {gap}")
    # Momentum: the tracker measures, but reports the SGD bounds as not applicable.
    print(f"TensorBoard: tensorboard --logdir {args.out}")


if __name__ == "__main__":
    main()
