"""Writers for a run directory: history.jsonl, run.json and TensorBoard event files.

A sink only writes what it is handed; it never computes a number of its own.
"""

from __future__ import annotations

import json
import os
import warnings
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

from .reading import EpochReading

__all__ = ["JsonlSink", "TensorBoardSink", "RunSinks", "scalar_tags"]


def scalar_tags(reading: EpochReading) -> Iterator[tuple[str, float]]:
    """The (tag, value) pairs a reading contributes to TensorBoard, grouped by theme."""
    for k, value in enumerate(reading.divergence):
        yield f"divergence/shadow_{k}", value
    if reading.audit_divergence is not None:
        yield "divergence/null_swap_audit", reading.audit_divergence
    for name, value in reading.layer_divergence.items():
        yield f"layer_divergence/{name}", value
    if reading.loss_difference_max is not None:
        yield "loss_difference/max", reading.loss_difference_max
    if reading.loss_difference_mean is not None:
        yield "loss_difference/mean", reading.loss_difference_mean
    if reading.gap_estimate is not None:
        yield "gap/replace_one_estimate", reading.gap_estimate
        if reading.gap_stderr is not None:
            yield "gap/replace_one_upper", reading.gap_estimate + reading.gap_stderr
            yield "gap/replace_one_lower", reading.gap_estimate - reading.gap_stderr
            yield "gap/replace_one_stderr", reading.gap_stderr
    if reading.train_loss is not None:
        yield "loss/train_probe", reading.train_loss
    if reading.holdout_loss is not None:
        yield "loss/holdout_probe", reading.holdout_loss
        if reading.train_loss is not None:
            yield "gap/holdout_minus_train", reading.holdout_loss - reading.train_loss
    for k, value in enumerate(reading.path_bound):
        if value is not None:
            yield f"bound/path_shadow_{k}", value
    if reading.expected_bound is not None:
        yield "bound/expected_stability", reading.expected_bound
    if reading.uniform_stability is not None:
        yield "bound/uniform_stability", reading.uniform_stability
    if reading.high_probability_gap is not None:
        yield "bound/high_probability_gap", reading.high_probability_gap


def dashboard_layout(shadows: int) -> dict[str, dict[str, list[Any]]]:
    """Charts pairing each shadow's divergence with its pathwise bound, and so on."""
    per_shadow = {
        f"shadow {k}: divergence vs pathwise bound":
            ["Multiline", [f"divergence/shadow_{k}$", f"bound/path_shadow_{k}$"]]
        for k in range(shadows)
    }
    return {
        "sgdstab divergence": per_shadow,
        "sgdstab stability": {
            "loss difference vs expected stability bound":
                ["Multiline", ["loss_difference/max$", "loss_difference/mean$",
                               "bound/expected_stability$", "bound/uniform_stability$"]],
        },
        "sgdstab generalization": {
            "replace-one gap estimate (+/- standard error)":
                ["Margin", ["gap/replace_one_estimate", "gap/replace_one_lower",
                            "gap/replace_one_upper"]],  # margin series take exact tag names
            "gap estimate and measured gap":
                ["Multiline", ["gap/replace_one_estimate$", "gap/holdout_minus_train$",
                               "bound/high_probability_gap$"]],
        },
    }


class JsonlSink:
    """Appends one JSON object per line, flushed and fsynced so a crash loses no finished epoch.

    Each record starts on a fresh line, even after a torn last line (an interrupted write or a
    full disk), so one damaged line never takes the next record with it. A write that fails
    (OSError: disk full, quota, a vanished mount) warns and keeps the record in ``pending``;
    the next ``write`` retries it first, so nothing is lost once the fault clears.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.pending: list[str] = []

    def write(self, record: Mapping[str, Any]) -> bool:
        """Append ``record`` after any pending ones; True when all of them are on disk."""
        self.pending.append(json.dumps(record, sort_keys=True))
        try:
            while self.pending:
                self._append(self.pending[0])
                self.pending.pop(0)
        except OSError as error:
            warnings.warn(f"could not write {self.path} ({error}); {len(self.pending)} "
                          "reading(s) kept in memory, written at the next epoch end; training "
                          "goes on", UserWarning, stacklevel=4)
            return False
        return True

    def _append(self, line: str) -> None:
        with open(self.path, "ab") as handle:
            torn = handle.tell() > 0 and not self._ends_with_newline()
            handle.write((("\n" if torn else "") + line + "\n").encode("utf-8"))
            handle.flush()
            os.fsync(handle.fileno())

    def _ends_with_newline(self) -> bool:
        with open(self.path, "rb") as handle:
            handle.seek(-1, os.SEEK_END)
            return handle.read(1) == b"\n"

    def drop_from(self, epoch: int) -> list[int]:
        """Remove the records of epochs ``>= epoch`` (a resumed run is about to write them again:
        the process stopped after writing them but before its checkpoint was saved); returns
        the epochs removed. The file is replaced atomically."""
        if not self.path.exists():
            return []
        kept, dropped = [], []
        with open(self.path, encoding="utf-8") as handle:
            for line in handle.read().split("\n"):
                if not line.strip():
                    continue
                try:
                    number = json.loads(line).get("epoch")
                except (json.JSONDecodeError, AttributeError):
                    number = None
                if isinstance(number, int) and number >= epoch:
                    dropped.append(number)
                else:
                    kept.append(line)
        if dropped:
            spare = self.path.with_name(self.path.name + ".rewrite")
            with open(spare, "w", encoding="utf-8") as handle:
                handle.write("".join(line + "\n" for line in kept))
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(spare, self.path)
        return dropped


class TensorBoardSink:
    """Writes a reading's scalars with torch.utils.tensorboard.SummaryWriter, step = epoch."""

    def __init__(self, log_dir: str | Path) -> None:
        from torch.utils.tensorboard import SummaryWriter

        self.writer = SummaryWriter(log_dir=str(log_dir))
        self.closed = False

    def write(self, reading: EpochReading) -> None:
        for tag, value in scalar_tags(reading):
            self.writer.add_scalar(tag, value, global_step=reading.epoch)
        self.writer.flush()

    def write_layout(self, shadows: int) -> None:
        """A custom-scalars layout: each measured quantity shares a chart with its bound."""
        self.writer.add_custom_scalars(dashboard_layout(shadows))
        self.writer.flush()

    def write_text(self, tag: str, text: str, step: int) -> None:
        self.writer.add_text(tag, text, global_step=step)
        self.writer.flush()

    def close(self) -> None:
        if not self.closed:
            self.writer.close()
            self.closed = True


class RunSinks:
    """Everything a run directory receives: run.json, history.jsonl and TensorBoard events."""

    def __init__(self, log_dir: str | Path) -> None:
        self.log_dir = Path(log_dir)
        self.log_dir.mkdir(parents=True, exist_ok=True)
        self.history = JsonlSink(self.log_dir / "history.jsonl")
        self.tensorboard = TensorBoardSink(self.log_dir)
        self._written = False
        self._last_epoch = 0

    def write_run(self, description: Mapping[str, Any]) -> None:
        with open(self.log_dir / "run.json", "w", encoding="utf-8") as handle:
            json.dump(description, handle, indent=2, sort_keys=True)

    def write(self, reading: EpochReading) -> None:
        if reading.epoch <= self._last_epoch:
            return   # this epoch's reading is written already (finish_epoch called again)
        if not self._written and reading.epoch == 1:
            self._set_aside_old_history()
        elif not self._written:
            self._drop_repeated_epochs(reading.epoch)
        self._written = True
        self._last_epoch = reading.epoch
        self.history.write(reading.to_dict())
        self.tensorboard.write(reading)

    def _set_aside_old_history(self) -> None:
        """A fresh run (first reading is epoch 1) never appends to an older run's history: the
        old file is renamed. A resumed run (first reading after epoch 1) appends as it should."""
        path = self.history.path
        if path.exists() and path.stat().st_size > 0:
            number = 1
            while (aside := path.with_name(f"history.previous-{number}.jsonl")).exists():
                number += 1
            path.rename(aside)
            warnings.warn(f"{path} held an earlier run's readings; moved to {aside.name}. "
                          "TensorBoard will still show the earlier run's event files in this "
                          "directory: use a new log_dir per run", UserWarning, stacklevel=4)

    def _drop_repeated_epochs(self, epoch: int) -> None:
        """A resumed run's first epoch is ``epoch``: records from that epoch on came from the
        interrupted process after its last checkpoint and are written again now."""
        dropped = self.history.drop_from(epoch)
        if dropped:
            warnings.warn(f"{self.history.path} already held epoch(s) "
                          f"{', '.join(map(str, sorted(set(dropped))))} from after the checkpoint "
                          "this run resumed from; they are dropped and written again by the "
                          "resumed run", UserWarning, stacklevel=4)

    def write_advice(self, advice: Any) -> None:
        """advice.json in the run directory and the advice's summary as TensorBoard text."""
        with open(self.log_dir / "advice.json", "w", encoding="utf-8") as handle:
            json.dump(advice.to_dict(), handle, indent=2, sort_keys=True)
        self.tensorboard.write_text("advice/stop_suggestion", advice.summary(),
                                    step=int(advice.to_dict().get("epochs_seen", 0) or 0))

    def close(self) -> None:
        self.tensorboard.close()
