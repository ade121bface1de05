"""Worker for the checkpoint test: runs part of a tracked training run in its own process.

usage: python -m tests._resume_worker MODE DIR   with MODE in {full, first, second}
full: epochs 1-3; first: epochs 1-2 then save; second: load and run epoch 3.
Readings go to DIR/<MODE>.json.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import torch
import torch.nn.functional as F
from torch.utils.data import DataLoader

from sgdstab import StabilityTracker
from tests._toy import mlp, pebbles


def build():
    torch.manual_seed(0)
    data = pebbles(count=80)
    model = mlp(dropout=0.25)
    opt = torch.optim.SGD(model.parameters(), lr=0.3, momentum=0.9)
    sched = torch.optim.lr_scheduler.StepLR(opt, step_size=1, gamma=0.8)
    generator = torch.Generator().manual_seed(4)
    batches = DataLoader(data, batch_size=10, shuffle=True, generator=generator)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2,
                               replacements=pebbles(count=20, seed=5), seed=3)
    return model, opt, sched, generator, batches, tracker


def epoch(model, opt, sched, batches, tracker):
    for x, y in tracker.batches(batches):
        opt.zero_grad()
        F.cross_entropy(model(x), y).backward()
        opt.step()
    sched.step()
    return tracker.finish_epoch().to_dict()


def main(mode: str, out: Path) -> None:
    model, opt, sched, generator, batches, tracker = build()
    readings = []
    if mode == "second":
        saved = torch.load(out / "checkpoint.pt", weights_only=True)
        model.load_state_dict(saved["model"])
        opt.load_state_dict(saved["optimizer"])
        sched.load_state_dict(saved["scheduler"])
        generator.set_state(saved["generator"])
        torch.set_rng_state(saved["rng"])
        tracker.load_state_dict(saved["tracker"])
        epochs = [3]
    else:
        epochs = [1, 2, 3] if mode == "full" else [1, 2]
    for _ in epochs:
        readings.append(epoch(model, opt, sched, batches, tracker))
    if mode == "first":
        torch.save({"model": model.state_dict(), "optimizer": opt.state_dict(),
                    "scheduler": sched.state_dict(), "generator": generator.get_state(),
                    "rng": torch.get_rng_state(), "tracker": tracker.state_dict()},
                   out / "checkpoint.pt")
    (out / f"{mode}.json").write_text(json.dumps(readings))


if __name__ == "__main__":
    main(sys.argv[1], Path(sys.argv[2]))
