"""Writers for a run directory: history.jsonl, run.json and TensorBoard event files.

A sink only writes what it is handed; it never computes a number of its own.
"""

from __future__ import annotations

import json
import math
import os
import re
import warnings
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any, TypeGuard

from .reading import EpochReading, versioned

__all__ = ["JsonlSink", "TensorBoardSink", "RunSinks", "scalar_tags", "bound_tags",
           "dashboard_layout", "advice_markdown"]


#: Every TensorBoard tag starts with this unless the sink is told otherwise.
DEFAULT_PREFIX = "sgdstab/"
#: The sibling run (a subdirectory of the log dir) that holds the bounds: TensorBoard draws a
#: bound in its own run colour on the same chart as the measured curve it bounds (same tag).
BOUNDS_RUN = "bounds"
#: What the x axis counts: optimizer steps (the default, like a training loop's own tags) or
#: finished epochs.
STEP_AXES = ("steps", "epoch")


def _finite(value: Any) -> TypeGuard[float]:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and \
        math.isfinite(float(value))


def scalar_tags(reading: EpochReading, prefix: str = DEFAULT_PREFIX
                ) -> Iterator[tuple[str, float]]:
    """The measured (tag, value) pairs a reading contributes to TensorBoard, grouped by theme.

    Non-finite values (a frozen shadow's NaN divergence) are left out."""
    pairs: list[tuple[str, Any]] = []
    for k, value in enumerate(reading.divergence):
        pairs.append((f"divergence/shadow_{k}", value))
    pairs.append(("divergence/null_swap_audit", reading.audit_divergence))
    for name, value in reading.layer_divergence.items():
        pairs.append((f"layer_divergence/{name}", value))
    pairs.append(("stability/loss_difference_max", reading.loss_difference_max))
    pairs.append(("stability/loss_difference_mean", reading.loss_difference_mean))
    if reading.gap_estimate is not None:
        pairs.append(("gap/replace_one_estimate", reading.gap_estimate))
        if reading.gap_stderr is not None:
            pairs.append(("gap/replace_one_upper", reading.gap_estimate + reading.gap_stderr))
            pairs.append(("gap/replace_one_lower", reading.gap_estimate - reading.gap_stderr))
            pairs.append(("gap/replace_one_stderr", reading.gap_stderr))
    pairs.append(("loss/train_probe", reading.train_loss))
    pairs.append(("loss/holdout_probe", reading.holdout_loss))
    if reading.holdout_loss is not None and reading.train_loss is not None:
        pairs.append(("gap/holdout_minus_train", reading.holdout_loss - reading.train_loss))
    for tag, value in pairs:
        if _finite(value):
            yield prefix + tag, float(value)


def trivial_loss(reading: EpochReading) -> float | None:
    """The loss level a bound must stay below to say anything: the reading's ``trivial_loss``
    when it has one, else the declared loss range M, else unknown (``None``)."""
    value = getattr(reading, "trivial_loss", None)
    if _finite(value) and value > 0:
        return float(value)
    bound = (reading.constants or {}).get("loss_bound")
    return float(bound) if _finite(bound) and bound > 0 else None


def bound_tags(reading: EpochReading, prefix: str = DEFAULT_PREFIX
               ) -> Iterator[tuple[str, float]]:
    """The bounds as (tag, value) pairs, each under the tag of the measured quantity it bounds
    (written to the sibling run ``bounds``).

    - ``divergence/shadow_k``: the shadow's pathwise divergence bound;
    - ``stability/loss_difference_max``: the seeded run's uniform stability ``L * max_j
      pathwise_j``, which bounds ``|f(w; z) - f(w'; z)| <= L ||w - w'||`` for every shadow;
    - ``stability/loss_difference_mean``: the expected stability bound (it bounds the expected
      loss difference for any neighbouring pair and any z, hence the expected mean);
    - ``gap/holdout_minus_train``: the high-probability gap bound.

    Left out: non-finite values and vacuous ones, a loss-scale bound at or above the trivial
    loss (see ``trivial_loss``), and a divergence bound whose loss-scale image ``L * bound`` is.
    """
    trivial = trivial_loss(reading)
    lipschitz = (reading.constants or {}).get("lipschitz")

    def useful(value: Any, scale: float = 1.0) -> bool:
        if not _finite(value):
            return False
        return trivial is None or value * scale < trivial

    scale = float(lipschitz) if _finite(lipschitz) and lipschitz > 0 else 0.0
    for k, value in enumerate(reading.path_bound):
        if value is not None and useful(value, scale):
            yield f"{prefix}divergence/shadow_{k}", float(value)
    for tag, value in (("stability/loss_difference_max", reading.uniform_stability),
                       ("stability/loss_difference_mean", reading.expected_bound),
                       ("gap/holdout_minus_train", reading.high_probability_gap)):
        if useful(value) and value is not None:
            yield prefix + tag, float(value)


def dashboard_layout(shadows: int, prefix: str = DEFAULT_PREFIX
                     ) -> dict[str, dict[str, list[Any]]]:
    """Custom-scalars charts: each measured quantity with its bound (the ``bounds`` run)."""
    p = re.escape(prefix)
    name = prefix.rstrip("/") or "sgdstab"
    per_shadow = {
        f"shadow {k}: divergence and its pathwise bound (run 'bounds')":
            ["Multiline", [f"{p}divergence/shadow_{k}$"]]
        for k in range(shadows)
    }
    return {
        f"{name}: divergence": per_shadow,
        f"{name}: stability": {
            "loss differences and their bounds (run 'bounds')":
                ["Multiline", [f"{p}stability/loss_difference_max$",
                               f"{p}stability/loss_difference_mean$"]],
        },
        f"{name}: generalization": {
            "replace-one gap estimate (+/- standard error)":
                ["Margin", [f"{prefix}gap/replace_one_estimate", f"{prefix}gap/replace_one_lower",
                            f"{prefix}gap/replace_one_upper"]],  # margin series: exact tags
            "gap estimate, measured gap and the high-probability bound (run 'bounds')":
                ["Multiline", [f"{p}gap/replace_one_estimate$", f"{p}gap/holdout_minus_train$"]],
        },
    }


def _markdown_escape(text: str) -> str:
    return re.sub(r"([\\`*_\[\]<>#|])", r"\\\1", text)


def summary_markdown(summary: str) -> str:
    """A plain-text advice summary as Markdown: indented lines become a bullet list."""
    blocks: list[str] = []
    for line in summary.splitlines():
        if not line.strip():
            continue
        if line.startswith((" ", "\t")):
            item = "- " + _markdown_escape(line.strip())
            if blocks and blocks[-1].startswith("- "):
                blocks[-1] += "\n" + item
            else:
                blocks.append(item)
        else:
            blocks.append(_markdown_escape(line.strip()))
    return "\n\n".join(blocks)


def advice_markdown(advice_dict: Mapping[str, Any], summary: str) -> str:
    """The advice as Markdown: its own (verdict first) when it carries one, else the summary."""
    verdict = advice_dict.get("verdict_markdown")
    if isinstance(verdict, str) and verdict.strip():
        return verdict.strip()      # the verdict, the suggestion, the criteria and the cautions
    return "#### Summary\n\n" + summary_markdown(summary)


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
    """Writes readings to TensorBoard event files with ``torch.utils.tensorboard``.

    Measured values go to ``log_dir``, bounds to the sibling run ``log_dir/bounds`` under the
    same tags, so each chart shows a measured curve and its bound in two run colours. Every tag
    starts with ``prefix``; the x axis is the optimizer step count (``step_axis="steps"``, the
    default, the same axis as a training loop's own per-step tags) or the epoch
    (``step_axis="epoch"``). ``configure`` changes both until the first reading is written.
    """

    def __init__(self, log_dir: str | Path, *, prefix: str = DEFAULT_PREFIX,
                 step_axis: str = "steps") -> None:
        from torch.utils.tensorboard import SummaryWriter

        self.log_dir = Path(log_dir)
        self.writer = SummaryWriter(log_dir=str(self.log_dir))
        self._bounds_writer: Any = None
        self.closed = False
        self.prefix = DEFAULT_PREFIX
        self.step_axis = "steps"
        self._layout_shadows: int | None = None
        self._started = False
        self.last_step = 0
        self.configure(prefix=prefix, step_axis=step_axis)

    def configure(self, *, prefix: str | None = None, step_axis: str | None = None) -> None:
        """Set the tag prefix and the x axis; only before the first reading is written."""
        if self._started:
            raise RuntimeError("configure the TensorBoard sink before the first epoch's reading "
                               "is written: changing tags or axis mid-run would split the curves")
        if prefix is not None:
            if not isinstance(prefix, str):
                raise TypeError(f"prefix must be a string, got {type(prefix).__name__}")
            self.prefix = prefix if not prefix or prefix.endswith("/") else prefix + "/"
        if step_axis is not None:
            if step_axis not in STEP_AXES:
                raise ValueError(f"step_axis must be one of {STEP_AXES}, got {step_axis!r}")
            self.step_axis = step_axis

    def step_of(self, reading: EpochReading) -> int:
        """The x coordinate of a reading: optimizer steps so far, or the epoch."""
        return int(reading.steps if self.step_axis == "steps" else reading.epoch)

    def _bounds(self) -> Any:
        if self._bounds_writer is None:
            from torch.utils.tensorboard import SummaryWriter

            self._bounds_writer = SummaryWriter(log_dir=str(self.log_dir / BOUNDS_RUN))
        return self._bounds_writer

    def write(self, reading: EpochReading) -> None:
        if not self._started:
            self._started = True
            if self._layout_shadows is not None:
                self.writer.add_custom_scalars(dashboard_layout(self._layout_shadows,
                                                                self.prefix))
        step = self.last_step = self.step_of(reading)
        for tag, value in scalar_tags(reading, self.prefix):
            self.writer.add_scalar(tag, value, global_step=step)
        self.writer.flush()
        bounds = list(bound_tags(reading, self.prefix))
        if bounds:
            writer = self._bounds()
            for tag, value in bounds:
                writer.add_scalar(tag, value, global_step=step)
            writer.flush()

    def write_layout(self, shadows: int) -> None:
        """A custom-scalars layout for ``shadows`` shadows, written with the first reading (so
        ``configure`` can still change the prefix)."""
        self._layout_shadows = int(shadows)
        if self._started:
            self.writer.add_custom_scalars(dashboard_layout(self._layout_shadows, self.prefix))
            self.writer.flush()

    def write_text(self, tag: str, text: str, step: int) -> None:
        """Markdown text under ``prefix + tag``."""
        self.writer.add_text(self.prefix + tag, text, global_step=step)
        self.writer.flush()

    def write_advice(self, advice_dict: Mapping[str, Any], summary: str) -> None:
        """The stop advice as Markdown under ``prefix + "advice"``, at the last reading's step."""
        self.write_text("advice", advice_markdown(advice_dict, summary), step=self.last_step)

    def close(self) -> None:
        if not self.closed:
            self.writer.close()
            if self._bounds_writer is not None:
                self._bounds_writer.close()
            self.closed = True


class RunSinks:
    """Everything a run directory receives: run.json, history.jsonl and TensorBoard events."""

    def __init__(self, log_dir: str | Path,
                 tensorboard: Mapping[str, Any] | None = None) -> None:
        self.log_dir = Path(log_dir)
        self.log_dir.mkdir(parents=True, exist_ok=True)
        self.history = JsonlSink(self.log_dir / "history.jsonl")
        self.tensorboard = TensorBoardSink(self.log_dir, **dict(tensorboard or {}))
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
        self.history.write(versioned(reading.to_dict()))
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
        record = versioned(advice.to_dict())
        with open(self.log_dir / "advice.json", "w", encoding="utf-8") as handle:
            json.dump(record, handle, indent=2, sort_keys=True)
        self.tensorboard.write_advice(record, advice.summary())

    def close(self) -> None:
        self.tensorboard.close()
