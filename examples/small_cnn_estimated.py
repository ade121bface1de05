"""A small CNN whose constants are estimated from the model: the bounds are indicative only.

Invented scenario: a tile works photographs each fired tile and cuts 12 x 12 grey patches from
the pictures; an inspector marks a patch "cracked" when a thin dark hairline runs across it. The
patches are generated here (speckled glaze texture, a few glaze bubbles, for cracked patches a
hairline at a random angle; one mark in ten is wrong). A two-layer CNN with smooth (tanh)
activations is trained by plain SGD on the bounded squared-probability loss (values in [0, 2], so
the non-convex bound can use M = 2). The Lipschitz and smoothness constants are not known in
closed form, so the tracker estimates them (``constants="estimate"``): lower, local estimates,
never certified.

Run: ``python examples/small_cnn_estimated.py [--out DIR] [--quick]`` (or SGDSTAB_QUICK=1).
"""

from __future__ import annotations

import argparse
import math
import os
from pathlib import Path
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import StabilityTracker
from sgdstab.outputs.report import write_report

SIDE = 12


def tile_patches(count: int, seed: int) -> TensorDataset:
    """``count`` generated patches (1 x 12 x 12, values about in [0, 1]) and cracked in {0, 1}."""
    g = torch.Generator().manual_seed(seed)
    glaze = 0.6 + 0.08 * torch.randn(count, 1, SIDE, SIDE, generator=g)
    rows, cols = torch.meshgrid(torch.arange(SIDE, dtype=torch.float32),
                                torch.arange(SIDE, dtype=torch.float32), indexing="ij")
    for _ in range(2):  # glaze bubbles: small bright discs anywhere
        centre = torch.rand(count, 2, generator=g) * SIDE
        distance = (rows - centre[:, 0, None, None]) ** 2 + (cols - centre[:, 1, None, None]) ** 2
        glaze[:, 0] += 0.25 * torch.exp(-distance / 1.5)
    cracked = torch.rand(count, generator=g) < 0.5
    angle = torch.rand(count, generator=g) * math.pi
    offset = (torch.rand(count, generator=g) - 0.5) * SIDE * 0.6
    centre = (SIDE - 1) / 2
    across = (torch.cos(angle)[:, None, None] * (cols - centre)
              + torch.sin(angle)[:, None, None] * (rows - centre) - offset[:, None, None])
    hairline = 0.45 * torch.exp(-(across**2) / 0.8)
    glaze[:, 0] -= hairline * cracked[:, None, None]
    misjudged = torch.rand(count, generator=g) < 0.1  # the inspector errs on one patch in ten
    marked = cracked ^ misjudged
    return TensorDataset(glaze.clamp(0.0, 1.0), marked.long())


def squared_probability_loss(logits: torch.Tensor, labels: torch.Tensor,
                             reduction: str = "mean") -> torch.Tensor:
    """||softmax(logits) - onehot(label)||^2 per patch: smooth in the logits, values in [0, 2].

    Written as ||p||^2 - 2 p_label + 1 with a gather, which per-example vmap can trace.
    """
    probabilities = F.softmax(logits, dim=1)
    chosen = probabilities.gather(1, labels.reshape(-1, 1)).squeeze(1)
    per_patch = (probabilities**2).sum(dim=1) - 2 * chosen + 1
    if reduction == "none":
        return per_patch
    return per_patch.sum() if reduction == "sum" else per_patch.mean()


class CrackSpotter(nn.Module):
    """Two 3x3 convolutions with tanh and average pooling, then a linear read-out."""

    def __init__(self) -> None:
        super().__init__()
        self.features = nn.Sequential(
            nn.Conv2d(1, 6, 3, padding=1), nn.Tanh(), nn.AvgPool2d(2),
            nn.Conv2d(6, 8, 3, padding=1), nn.Tanh(), nn.AvgPool2d(2))
        self.read_out = nn.Linear(8 * (SIDE // 4) ** 2, 2)

    def forward(self, patches: torch.Tensor) -> torch.Tensor:
        return self.read_out(self.features(patches).flatten(1))


def main(out_dir: str | Path = "runs/small_cnn_estimated", quick: bool = False
         ) -> dict[str, Any]:
    """Train with a tracker, print the advice and write the report; return what was made."""
    epochs, size = (3, 200) if quick else (8, 600)
    torch.manual_seed(0)
    train_set, held_out = tile_patches(size, seed=1), tile_patches(size // 2, seed=2)
    model = CrackSpotter()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.2)
    loader = DataLoader(train_set, batch_size=25, shuffle=True,
                        generator=torch.Generator().manual_seed(0))
    loss = squared_probability_loss
    tracker = StabilityTracker(model, optimizer, train_set=train_set, loss_fn=loss, shadows=3,
                               replacements=held_out, log_dir=out_dir, constants="estimate",
                               loss_bound=2.0, seed=0, probe_size=64,
                               estimate_options={"iterations": 40, "per_example": 2})
    with tracker:
        for _ in range(epochs):
            model.train()
            for patches, cracked in tracker.batches(loader):
                optimizer.zero_grad()
                loss(model(patches), cracked).backward()
                optimizer.step()
            reading = tracker.finish_epoch()
            constants = reading.constants or {}
            print(f"epoch {reading.epoch:>2}: train {reading.train_loss:.4f}, holdout "
                  f"{reading.holdout_loss:.4f}, mean divergence "
                  f"{sum(reading.divergence) / len(reading.divergence):.4f}, estimated L "
                  f"{constants.get('lipschitz', float('nan')):.3g}, beta "
                  f"{constants.get('smoothness', float('nan')):.3g}")
        advice = tracker.advise()
    print("\n" + advice.summary())
    page = write_report(out_dir)
    print(f"Report: {page}")
    return {"advice": advice, "report": page, "readings": list(tracker.readings)}


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default="runs/small_cnn_estimated")
    parser.add_argument("--quick", action="store_true", default=bool(os.environ.get(
        "SGDSTAB_QUICK")))
    options = parser.parse_args()
    main(options.out, quick=options.quick)
