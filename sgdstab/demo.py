"""The scenario behind ``sgdstab demo``: grading glaze samples at an invented pottery works.

A kiln's quality station measures eight readings per glazed tile (gloss, two colour channels,
crackle density, ...); tiles are graded "first", "second" or "reject". The data are generated here:
three overlapping, slightly curved clusters with label noise, so a small network can overfit.
The model is a small MLP with dropout trained by plain SGD with a step-decay schedule, on the
bounded Brier loss (values in [0, 2]) so that the non-convex bound has a known loss range.
"""

from __future__ import annotations

import math
import sys
import time
from pathlib import Path
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

__all__ = ["glaze_tiles", "brier_loss", "GlazeGrader", "run_demo"]

FEATURES = 8
GRADES = 3


def glaze_tiles(count: int, seed: int) -> TensorDataset:
    """``count`` generated tiles: eight readings each (row norm <= 1) and a grade in {0, 1, 2}."""
    generator = torch.Generator().manual_seed(seed)
    grade = torch.randint(0, GRADES, (count,), generator=generator)
    centres = torch.tensor([[0.8, 0.2, -0.3, 0.1, 0.0, 0.4, -0.2, 0.3],
                            [0.1, 0.7, 0.2, -0.4, 0.3, -0.1, 0.2, 0.0],
                            [-0.5, -0.3, 0.6, 0.2, -0.4, 0.1, 0.3, -0.2]])
    readings = centres[grade] + 0.55 * torch.randn(count, FEATURES, generator=generator)
    readings[:, 3] += 0.4 * torch.sin(3.0 * readings[:, 0])      # a curved boundary
    flip = torch.rand(count, generator=generator) < 0.1          # 10 % mislabelled tiles
    grade = torch.where(flip, torch.randint(0, GRADES, (count,), generator=generator), grade)
    readings = readings / readings.norm(dim=1, keepdim=True).clamp(min=1.0)
    return TensorDataset(readings, grade)


def brier_loss(logits: torch.Tensor, grade: torch.Tensor, reduction: str = "mean") -> torch.Tensor:
    """Squared distance between predicted probabilities and the one-hot grade; values in [0, 2]."""
    probabilities = F.softmax(logits, dim=1)
    classes = torch.arange(GRADES, device=grade.device)
    target = (grade.unsqueeze(1) == classes).to(probabilities.dtype)   # one-hot, vmap-friendly
    per_example = ((probabilities - target) ** 2).sum(dim=1)
    if reduction == "none":
        return per_example
    if reduction == "sum":
        return per_example.sum()
    return per_example.mean()


class GlazeGrader(nn.Module):
    """A small MLP with dropout."""

    def __init__(self, hidden: int = 64, dropout: float = 0.2) -> None:
        super().__init__()
        self.layers = nn.Sequential(nn.Linear(FEATURES, hidden), nn.Tanh(), nn.Dropout(dropout),
                                    nn.Linear(hidden, hidden), nn.Tanh(),
                                    nn.Linear(hidden, GRADES))

    def forward(self, readings: torch.Tensor) -> torch.Tensor:
        return self.layers(readings)


def _progress(epoch: int, epochs: int, started: float, stream: Any) -> None:
    width = 30
    done = int(width * epoch / epochs)
    elapsed = time.perf_counter() - started
    stream.write(f"\r  training [{'#' * done}{'.' * (width - done)}] epoch {epoch}/{epochs} "
                 f"({elapsed:5.1f} s)")
    if epoch == epochs:
        stream.write("\n")
    stream.flush()


def _fmt(value: float | None, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    return f"{value:.{digits}g}"


def run_demo(out_dir: str | Path = "sgdstab-demo", epochs: int = 12, shadows: int = 2,
             seed: int = 0, quiet: bool = False, report: bool = True) -> dict[str, Any]:
    """Train the glaze grader with a tracker; write the run directory; print a short table."""
    from .tracker import StabilityTracker

    stream = sys.stdout
    out = Path(out_dir)
    torch.manual_seed(seed)
    train_set = glaze_tiles(600, seed=seed + 11)
    held_out = glaze_tiles(300, seed=seed + 12)
    model = GlazeGrader()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.5)
    schedule = torch.optim.lr_scheduler.StepLR(optimizer, step_size=max(1, epochs // 3), gamma=0.5)
    loader = DataLoader(train_set, batch_size=32, shuffle=True,
                        generator=torch.Generator().manual_seed(seed))
    tracker = StabilityTracker(model, optimizer, train_set=train_set, loss_fn=brier_loss,
                               shadows=shadows, replacements=held_out, log_dir=out,
                               constants="estimate", loss_bound=2.0, seed=seed)
    readings = []
    started = time.perf_counter()
    if not quiet:
        stream.write("sgdstab demo: grading glaze tiles (generated data), "
                     f"{len(train_set)} training tiles, {shadows} shadows\n")
    with tracker:
        for epoch in range(1, epochs + 1):
            model.train()
            for readings_batch, grade in tracker.batches(loader):
                optimizer.zero_grad()
                brier_loss(model(readings_batch), grade).backward()
                optimizer.step()
            schedule.step()
            readings.append(tracker.finish_epoch())
            if not quiet:
                _progress(epoch, epochs, started, stream)
        advice = _advise(tracker)
    report_path = None
    if report:
        report_path = _report(out)
    if not quiet:
        _print_table(readings, stream)
        stream.write(f"\nRun directory: {out.resolve()}\n")
        stream.write(f"TensorBoard:   tensorboard --logdir {out.resolve()}\n")
        if advice is not None:
            stream.write(f"Stop advice:   {advice.summary()}\n")
        if report_path is not None:
            stream.write(f"Report:        {report_path}\n")
        stream.write("Bounds here use ESTIMATED constants: indicative, not certified. A bound "
                     "holds "
                     "only under its stated assumptions and is no substitute for held-out "
                     "evaluation.\n")
    return {"readings": readings, "advice": advice, "report": report_path, "run_dir": out}


def _advise(tracker: Any) -> Any:
    try:
        return tracker.advise()
    except ImportError:
        return None


def _report(out: Path) -> Path | None:
    try:
        from .report import write_report
    except ImportError:
        return None
    try:
        return write_report(out)
    except ImportError as missing:  # matplotlib is an optional extra
        sys.stdout.write(f"(report skipped: {missing})\n")
        return None


def _print_table(readings: list[Any], stream: Any) -> None:
    header = (f"{'epoch':>5} {'steps':>6} {'max div':>9} {'loss diff':>9} {'gap est':>9} "
              f"{'+/-':>7} {'train':>7} {'holdout':>7} {'exp. bound':>10}")
    stream.write("\n" + header + "\n" + "-" * len(header) + "\n")
    for r in readings:
        stream.write(f"{r.epoch:>5} {r.steps:>6} {_fmt(max(r.divergence, default=None)):>9} "
                     f"{_fmt(r.loss_difference_max):>9} {_fmt(r.gap_estimate):>9} "
                     f"{_fmt(r.gap_stderr, 2):>7} {_fmt(r.train_loss):>7} "
                     f"{_fmt(r.holdout_loss):>7} {_fmt(r.expected_bound):>10}\n")
    audit = readings[0].audit_divergence if readings else None
    if audit is not None:
        stream.write(f"null-swap audit (epoch 1): divergence {audit!r} "
                     f"({'exact lockstep' if audit == 0.0 else 'LOCKSTEP BROKEN'})\n")
