"""Small generated problems shared by the tracker tests (an invented toy: sorting pebbles)."""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, Dataset, TensorDataset


def pebbles(count: int = 96, features: int = 5, seed: int = 0) -> TensorDataset:
    """Generated pebble measurements with a binary 'keep' label."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, features, generator=g)
    y = ((x[:, 0] + 0.5 * x[:, 1] ** 2 + 0.3 * torch.randn(count, generator=g)) > 0.4).long()
    return TensorDataset(x, y)


def mlp(features: int = 5, dropout: float = 0.2, seed: int = 0) -> nn.Module:
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(features, 12), nn.Tanh(), nn.Dropout(dropout),
                         nn.Linear(12, 2))


class DictPebbles(Dataset):
    """The same data served as dict examples with a string tag."""

    def __init__(self, base: TensorDataset) -> None:
        self.base = base

    def __len__(self) -> int:
        return len(self.base)

    def __getitem__(self, i: int) -> dict:
        x, y = self.base[i]
        return {"features": x, "label": y, "tag": f"pebble-{i}"}


def train(model, optimizer, batches, epochs=2, tracker=None, scheduler=None, loss=F.cross_entropy,
          accumulate: int = 1, clip: float | None = None):
    """A plain user loop; with a tracker it iterates tracker.batches(loader)."""
    readings = []
    for _ in range(epochs):
        source = tracker.batches(batches) if tracker is not None else batches
        for k, (x, y) in enumerate(source):
            if k % accumulate == 0:
                optimizer.zero_grad()
            (loss(model(x), y) / accumulate).backward()
            if (k + 1) % accumulate == 0:
                if clip is not None:
                    torch.nn.utils.clip_grad_norm_(model.parameters(), clip)
                optimizer.step()
        if scheduler is not None:
            scheduler.step()
        if tracker is not None:
            readings.append(tracker.finish_epoch())
    return readings


def loader(dataset, batch_size=16, shuffle=True, seed=0, **kwargs) -> DataLoader:
    generator = torch.Generator().manual_seed(seed) if shuffle else None
    return DataLoader(dataset, batch_size=batch_size, shuffle=shuffle, generator=generator,
                      **kwargs)


def flat(model: nn.Module) -> torch.Tensor:
    return torch.cat([p.detach().double().reshape(-1) for p in model.parameters()])
