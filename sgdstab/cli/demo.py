"""The scenario behind ``sgdstab demo``: grading glaze samples at an invented pottery works.

A kiln's quality station measures eight readings per glazed tile (gloss, two colour channels,
crackle density, ...); tiles are graded "first", "second" or "reject". The data are generated here:
three overlapping, slightly curved clusters with 10 % label noise. The grader is a softmax
(multinomial logistic) classifier on the readings plus 23 fixed random cosine features and a bias
feature, every row scaled to norm <= 1, trained by plain SGD with a step-decay schedule.

That makes the per-example cross-entropy convex in the weights with constants known in closed
form, so the demo's bounds rest on declared rather than estimated constants (derivation, common
practice for softmax regression): the gradient is ``(p - e_y) x^T`` with ``||p - e_y||^2 <= 2``, so
``L = sqrt(2) max ||x||``; the Hessian is ``(diag(p) - p p^T) (x) x x^T`` and by Gershgorin
``lambda_max(diag(p) - p p^T) <= max_k 2 p_k (1 - p_k) <= 1/2``, so ``beta = max ||x||^2 / 2``.
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

__all__ = ["glaze_tiles", "GlazeGrader", "demo_constants", "run_demo"]

READINGS = 8
FEATURES = 32          # 8 readings + 23 cosine features + 1 bias feature
GRADES = 3


def _features(readings: torch.Tensor) -> torch.Tensor:
    projection = torch.randn(READINGS, FEATURES - READINGS - 1,
                             generator=torch.Generator().manual_seed(2024))
    cosines = torch.cos(2.0 * readings @ projection) / math.sqrt(FEATURES - READINGS - 1)
    bias = torch.ones(len(readings), 1)
    rows = torch.cat([readings, cosines, bias], dim=1)
    return rows / rows.norm(dim=1, keepdim=True).clamp(min=1.0)


def glaze_tiles(count: int, seed: int) -> TensorDataset:
    """``count`` generated tiles: 32 features (row norm <= 1) and a grade in {0, 1, 2}."""
    generator = torch.Generator().manual_seed(seed)
    grade = torch.randint(0, GRADES, (count,), generator=generator)
    centres = torch.tensor([[0.8, 0.2, -0.3, 0.1, 0.0, 0.4, -0.2, 0.3],
                            [0.1, 0.7, 0.2, -0.4, 0.3, -0.1, 0.2, 0.0],
                            [-0.5, -0.3, 0.6, 0.2, -0.4, 0.1, 0.3, -0.2]])
    readings = centres[grade] + 0.55 * torch.randn(count, READINGS, generator=generator)
    readings[:, 3] += 0.4 * torch.sin(3.0 * readings[:, 0])      # a curved boundary
    flip = torch.rand(count, generator=generator) < 0.1          # 10 % mislabelled tiles
    grade = torch.where(flip, torch.randint(0, GRADES, (count,), generator=generator), grade)
    return TensorDataset(_features(readings), grade)


class GlazeGrader(nn.Module):
    """Softmax regression over the tile features (the bias is a feature)."""

    def __init__(self) -> None:
        super().__init__()
        self.weights = nn.Linear(FEATURES, GRADES, bias=False)
        nn.init.zeros_(self.weights.weight)

    def forward(self, features: torch.Tensor) -> torch.Tensor:
        return self.weights(features)


def demo_constants(*datasets: TensorDataset) -> Any:
    """Closed-form constants of softmax cross-entropy on these rows (see the module docstring)."""
    from ..theory.constants import Constants

    norm = max(float(d.tensors[0].norm(dim=1).max()) for d in datasets)
    return Constants(lipschitz=math.sqrt(2.0) * norm, smoothness=norm ** 2 / 2, convex=True)


def _progress(epoch: int, epochs: int, started: float, stream: Any) -> None:
    """A one-line progress bar redrawn in place: only on a terminal (in a file or a notebook
    the carriage returns would pile up into one long line)."""
    elapsed = time.perf_counter() - started
    if not _is_terminal(stream):
        if epoch == epochs:
            stream.write(f"  trained {epochs} epochs in {elapsed:.1f} s\n")
        return
    width = 30
    done = int(width * epoch / epochs)
    stream.write(f"\r  training [{'#' * done}{'.' * (width - done)}] epoch {epoch}/{epochs} "
                 f"({elapsed:5.1f} s)")
    if epoch == epochs:
        stream.write("\n")
    stream.flush()


def _is_terminal(stream: Any) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False


def _fmt(value: float | None, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    return f"{value:.{digits}g}"


def run_demo(out_dir: str | Path = "sgdstab-demo", epochs: int = 12, shadows: int = 2,
             seed: int = 0, quiet: bool = False, report: bool = True) -> dict[str, Any]:
    """Train the glaze grader with a tracker; write the run directory; print a short table.

    Returns the readings, the advice, the report's path, the run directory and the model's
    weights after every epoch (``weights``)."""
    from ..tracking.tracker import StabilityTracker

    stream = sys.stdout
    out = Path(out_dir)
    torch.manual_seed(seed)
    pool = glaze_tiles(1600, seed=seed + 11)     # one generated batch of tiles, split 1200 / 400
    train_set = TensorDataset(*(t[:1200] for t in pool.tensors))
    held_out = TensorDataset(*(t[1200:] for t in pool.tensors))
    model = GlazeGrader()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.3)
    schedule = torch.optim.lr_scheduler.StepLR(optimizer, step_size=max(1, epochs // 3), gamma=0.5)
    loader = DataLoader(train_set, batch_size=32, shuffle=True,
                        generator=torch.Generator().manual_seed(seed))
    constants = demo_constants(train_set, held_out)
    tracker = StabilityTracker(model, optimizer, train_set=train_set, loss_fn=F.cross_entropy,
                               shadows=shadows, replacements=held_out, log_dir=out,
                               constants=constants, seed=seed)
    readings, weights = [], []
    started = time.perf_counter()
    if not quiet:
        stream.write("sgdstab demo: grading glaze tiles (generated data), "
                     f"{len(train_set)} training tiles, {len(held_out)} held out, "
                     f"{shadows} shadows\n")
    with tracker:
        for epoch in range(1, epochs + 1):
            model.train()
            for readings_batch, grade in tracker.batches(loader):
                optimizer.zero_grad()
                F.cross_entropy(model(readings_batch), grade).backward()
                optimizer.step()
            schedule.step()
            readings.append(tracker.finish_epoch())
            weights.append({k: v.detach().clone() for k, v in model.state_dict().items()})
            if not quiet:
                _progress(epoch, epochs, started, stream)
        advice = _advise(tracker)
    report_path = None
    if report:
        report_path = _report(out)
    if not quiet:
        if advice is not None:       # the verdict first, then the numbers behind it
            _print_advice(advice, stream)
        _print_table(readings, stream)
        stream.write(f"\nRun directory: {out.resolve()}\n")
        stream.write(f"TensorBoard:   tensorboard --logdir {out.resolve()}  (bounds: run "
                     "'bounds', measured: run '.'; set smoothing to 0)\n")
        if report_path is not None:
            stream.write(f"Report:        {report_path}\n")
        stream.write(f"Constants: L = {constants.lipschitz:.4g}, beta = "
                     f"{constants.smoothness:.4g}, convex (declared from the closed form of "
                     "softmax regression). A bound holds only under its stated assumptions and "
                     "is no substitute for held-out evaluation.\n")
    return {"readings": readings, "advice": advice, "report": report_path, "run_dir": out,
            "weights": weights}


def _advise(tracker: Any) -> Any:
    try:
        return tracker.advise()
    except ImportError:
        return None


def _report(out: Path) -> Path | None:
    try:
        from ..outputs.report import write_report
    except ImportError:
        return None
    try:
        return write_report(out)
    except ImportError as missing:  # matplotlib is an optional extra
        sys.stdout.write(f"(report skipped: {missing})\n")
        return None


#: The demo table's columns: (heading, width, what it is).
COLUMNS = (
    ("epoch", 5, "epochs finished"),
    ("steps", 6, "optimizer steps so far"),
    ("max div.", 9, "largest parameter divergence ||w - w'|| over the shadows"),
    ("max loss diff.", 14, "largest |f(w;z) - f(w';z)| over the shadows and probe points"),
    ("gap est.", 9, "replace-one estimate of the expected generalization gap"),
    ("± s.e.", 7, "its standard error over the shadows"),
    ("train", 7, "main model's mean loss on the probe's training points"),
    ("holdout", 7, "main model's mean loss on every held-out tile no shadow swapped in"),
    ("stab. bound", 11, "expected stability bound eps_stab (Hardt, Recht & Singer 2016, "
                        "convex case); n/a: not applicable"),
)


def _print_table(readings: list[Any], stream: Any) -> None:
    header = " ".join(f"{name:>{width}}" for name, width, _ in COLUMNS)
    stream.write("\n" + header + "\n" + "-" * len(header) + "\n")
    for r in readings:
        cells = (str(r.epoch), str(r.steps), _fmt(max(r.divergence, default=None)),
                 _fmt(r.loss_difference_max), _fmt(r.gap_estimate), _fmt(r.gap_stderr, 2),
                 _fmt(r.train_loss), _fmt(r.holdout_loss), _fmt(r.expected_bound))
        stream.write(" ".join(f"{cell:>{width}}" for cell, (_, width, _) in zip(cells, COLUMNS))
                     + "\n")
    stream.write("\n".join(f"  {name:<15} {meaning}" for name, _, meaning in COLUMNS[2:]) + "\n")
    audit = readings[0].audit_divergence if readings else None
    if audit is not None:
        stream.write(f"null-swap audit (epoch 1): divergence {audit!r} "
                     f"({'exact lockstep' if audit == 0.0 else 'LOCKSTEP BROKEN'})\n")


def _print_advice(advice: Any, stream: Any) -> None:
    """The stop advice once: the verdict when the advice has one, else the suggestion and the
    criteria that did not decide it."""
    from ..outputs.labels import criterion_label

    record = advice.to_dict()
    verdict = record.get("verdict")
    if isinstance(verdict, list) and verdict:
        stream.write(f"\n{advice.headline()}\nVerdict:\n")
        for item in verdict:
            if isinstance(item, dict):
                stream.write(f"  [{str(item.get('status', 'info')).upper():4}] "
                             f"{item.get('topic', '')}: {item.get('text', '')}\n")
        return
    if advice.suggested_epoch is None:
        stream.write(f"Stop advice:   none after {advice.epochs_seen} epochs. {advice.reason}\n")
    else:
        chosen = next((c for c in record.get("criteria", ()) if c.get("name") ==
                       advice.criterion), None)
        stream.write(f"Stop advice:   epoch {advice.suggested_epoch} of {advice.epochs_seen} "
                     f"({criterion_label(advice.criterion, chosen)}). {advice.reason}\n")
    for criterion in record.get("criteria", ()):
        if criterion.get("name") == advice.criterion:
            continue
        where = "no epoch" if criterion.get("epoch") is None else f"epoch {criterion['epoch']}"
        stream.write(f"  also: {criterion_label(criterion.get('name'), criterion)}: {where}. "
                     f"{criterion.get('reason', '')}\n")
