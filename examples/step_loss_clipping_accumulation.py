"""step_loss, in-loop augmentation, gradient accumulation and clipping with a tracker.

Invented scenario, generated data: a beekeeper's hive monitor sends dict records (sensor readings
plus a hive name); the model predicts whether a hive will swarm within a week.

- ``step_loss(model, batch)`` returns exactly the loss you backpropagate for one batch, including
  in-loop augmentation (its random draws are replayed for every shadow) and the 1/accumulate scale.
- Gradient accumulation needs nothing more: the shadows accumulate over the same batches and step
  when your ``optimizer.step()`` runs.
- Clipping happens between backward and step, out of the tracker's sight: pass the same clipping as
  ``before_step`` so each shadow clips its own gradients.

    python examples/step_loss_clipping_accumulation.py
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, Dataset

from sgdstab import StabilityTracker

ACCUMULATE = 4
MAX_NORM = 1.0


class HiveRecords(Dataset):
    def __init__(self, count: int, seed: int) -> None:
        g = torch.Generator().manual_seed(seed)
        self.readings = torch.randn(count, 5, generator=g)
        score = self.readings[:, 0] - 0.6 * self.readings[:, 4] + 0.3 * torch.randn(count,
                                                                                     generator=g)
        self.swarm = (score > 0.2).long()

    def __len__(self) -> int:
        return len(self.swarm)

    def __getitem__(self, i: int) -> dict:
        return {"readings": self.readings[i], "swarm": self.swarm[i], "hive": f"hive-{i % 37}"}


def step_loss(model: nn.Module, batch: dict) -> torch.Tensor:
    jitter = 0.05 * torch.randn_like(batch["readings"])    # in-loop augmentation
    return F.cross_entropy(model(batch["readings"] + jitter), batch["swarm"]) / ACCUMULATE


def clip(model: nn.Module) -> None:
    torch.nn.utils.clip_grad_norm_(model.parameters(), MAX_NORM)


def main(epochs: int = 4) -> None:
    torch.manual_seed(0)
    train_set, held_out = HiveRecords(512, seed=3), HiveRecords(256, seed=4)
    model = nn.Sequential(nn.Linear(5, 24), nn.Tanh(), nn.Linear(24, 2))
    optimizer = torch.optim.Adam(model.parameters(), lr=3e-3)
    loader = DataLoader(train_set, batch_size=16, shuffle=True)
    tracker = StabilityTracker(model, optimizer, step_loss=step_loss, train_set=train_set,
                               shadows=3, replacements=held_out, before_step=clip, log_dir=None)
    for _ in range(epochs):
        for k, batch in enumerate(tracker.batches(loader)):
            if k % ACCUMULATE == 0:
                optimizer.zero_grad()
            step_loss(model, batch).backward()
            if k % ACCUMULATE == ACCUMULATE - 1:
                clip(model)
                optimizer.step()
        r = tracker.finish_epoch()
        audit = "" if r.audit_divergence is None else f", null-swap audit {r.audit_divergence}"
        print(f"epoch {r.epoch}: {r.steps} steps, divergence "
              f"{', '.join(f'{d:.4f}' for d in r.divergence)}{audit}")


if __name__ == "__main__":
    main()
