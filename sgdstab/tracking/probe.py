"""Probe evaluation: per-example losses of the main model and the shadows at an epoch's end.

The probe holds every swapped-out and swapped-in example plus a seeded sample of training and
replacement examples. From the per-example losses it computes the loss-difference estimate of the
stability constant and the on-average replace-one estimate of the generalization gap
(Shalev-Shwartz, Shamir, Srebro & Sridharan 2010; Shalev-Shwartz & Ben-David ch. 13).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from types import TracebackType
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils._pytree import tree_flatten, tree_map

from ..shadows.lockstep import LockstepError, preserved_rng, select_rows

__all__ = ["ProbeRows", "ProbeSummary", "PerExampleLoss", "evaluation_mode", "summarise_probe"]

KINDS = ("out", "in", "train", "holdout", "probe")


@dataclass
class ProbeRows:
    """Collated probe examples with a kind per row; ``owner`` is the shadow of out/in rows."""

    chunks: list[Any]
    lengths: list[int]
    kinds: np.ndarray
    owner: np.ndarray

    @classmethod
    def build(cls, examples: Sequence[Any], kinds: Sequence[str], owners: Sequence[int],
              collate: Callable[[list[Any]], Any], chunk: int = 256) -> ProbeRows:
        chunks, lengths = [], []
        with preserved_rng():
            for start in range(0, len(examples), chunk):
                part = list(examples[start:start + chunk])
                chunks.append(collate(part))
                lengths.append(len(part))
        return cls(chunks, lengths, np.asarray(kinds), np.asarray(owners, dtype=np.int64))


class evaluation_mode:
    """Context: model in eval mode, no grad, RNG untouched; every module's flag and every buffer
    restored after (a module may update buffers in eval mode too, e.g. the observers of
    quantization-aware training: the evaluation must not change the run)."""

    def __init__(self, model: nn.Module) -> None:
        self.model = model

    def __enter__(self) -> nn.Module:
        self.flags = [(m, m.training) for m in self.model.modules()]
        self.buffers = [(module, name, tensor, tensor.detach().clone())
                        for module in self.model.modules()
                        for name, tensor in module._buffers.items() if tensor is not None]
        self.no_grad = torch.no_grad()
        self.no_grad.__enter__()
        self.rng = preserved_rng()
        self.rng.__enter__()
        self.model.eval()
        return self.model

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 traceback: TracebackType | None) -> None:
        for module, flag in self.flags:
            module.training = flag
        with torch.no_grad():
            for module, name, tensor, saved in self.buffers:
                module._buffers[name] = tensor   # the very object, if it was reassigned
                if tensor.shape == saved.shape:
                    tensor.copy_(saved)
                else:
                    # set_(Tensor) is documented; torch's stubs list only the storage overloads
                    tensor.set_(saved)  # type: ignore[call-overload]
        self.rng.__exit__(exc_type, exc, traceback)
        self.no_grad.__exit__(exc_type, exc, traceback)


class PerExampleLoss:
    """Per-example losses for the readings, a chunk of rows at a time.

    With ``loss_fn`` (given alone or alongside ``step_loss``): ``loss_fn(outputs, targets,
    reduction="none")`` when it supports it, else one row at a time. With ``step_loss`` only:
    ``step_loss`` on every row at once through ``torch.func.vmap`` (each row seen as a one-row
    batch), else one row at a time; it is then the training loss, with any augmentation and
    ``1/accumulate`` factor it applies.
    """

    def __init__(self, loss_fn: Callable[..., torch.Tensor] | None,
                 step_loss: Callable[[nn.Module, Any], torch.Tensor] | None) -> None:
        self.loss_fn = loss_fn
        self.step_loss = None if loss_fn is not None else step_loss
        self.vectorised: bool | None = None if loss_fn is not None else False
        self.mapped: bool | None = None if self.step_loss is not None else False

    def _one(self, model: nn.Module, batch: Any) -> torch.Tensor:
        if self.step_loss is not None:
            return self.step_loss(model, batch)
        inputs, targets = self._pair(batch)
        assert self.loss_fn is not None  # step_loss is None only when loss_fn was given
        return self.loss_fn(model(inputs), targets)

    @staticmethod
    def _pair(batch: Any) -> tuple[Any, Any]:
        if not isinstance(batch, (list, tuple)) or len(batch) != 2:
            raise LockstepError("loss_fn is evaluated on (inputs, targets) batches; for other "
                                "batch structures give step_loss alone")
        return batch[0], batch[1]

    def _mapped(self, model: nn.Module, batch: Any, length: int) -> np.ndarray | None:
        """``step_loss`` on each row as a one-row batch, all rows at once (vmap), or None."""
        from torch.func import vmap

        step_loss = self.step_loss
        assert step_loss is not None  # self.mapped starts False when there is no step_loss

        def one_row(row: Any) -> torch.Tensor:
            return step_loss(model, tree_map(lambda t: t.unsqueeze(0), row)).reshape(())

        try:
            leaves = tree_flatten(batch)[0]
            if not leaves or not all(isinstance(t, torch.Tensor) and t.dim() > 0 and
                                     t.shape[0] == length for t in leaves):
                raise TypeError("not a batch of tensors with one row each")
            losses = vmap(one_row, randomness="different")(batch)
            ok = isinstance(losses, torch.Tensor) and losses.shape == (length,)
        except Exception:   # noqa: BLE001 - anything vmap cannot run falls back to the loop
            ok = False
        self.mapped = ok
        return losses.double().cpu().numpy() if ok else None

    def __call__(self, model: nn.Module, batch: Any, length: int) -> np.ndarray:
        if self.mapped is not False:
            values = self._mapped(model, batch, length)
            if values is not None:
                return values
        if self.vectorised is not False:
            inputs, targets = self._pair(batch)
            assert self.loss_fn is not None  # self.vectorised starts False without a loss_fn
            try:
                losses = _unreduced(self.loss_fn, model(inputs), targets)
                ok = isinstance(losses, torch.Tensor) and losses.dim() >= 1 and \
                    losses.shape[0] == length
            except TypeError:
                ok = False
            self.vectorised = ok
            if ok:
                return losses.reshape(length, -1).double().mean(dim=1).cpu().numpy()
        rows = [float(self._one(model, select_rows(batch, slice(r, r + 1), length)))
                for r in range(length)]
        return np.asarray(rows, dtype=np.float64)

    def notes(self) -> list[str]:
        """What the readings' per-example loss leaves out of ``loss_fn`` (for the notes)."""
        loss_fn = self.loss_fn
        if self.vectorised is not False or loss_fn is None or not _class_weighted(loss_fn):
            return []
        return [f"per-example loss: {type(loss_fn).__name__} has class weights and takes no "
                "reduction argument, so each example's loss is loss_fn on that example alone, "
                "where its weight cancels: train_loss, holdout_loss and the loss differences "
                "are unweighted (loss_fn on a batch weighs the classes)"]


def _unreduced(loss_fn: Callable[..., torch.Tensor], outputs: torch.Tensor, targets: Any
               ) -> torch.Tensor:
    """``loss_fn`` per example: ``reduction="none"`` as an argument, or for a torch loss module
    without class weights (whose per-example value is its value on that example alone) as its
    ``reduction`` attribute for this one call. TypeError when neither applies."""
    try:
        return loss_fn(outputs, targets, reduction="none")
    except TypeError:
        if not isinstance(loss_fn, nn.modules.loss._Loss) or _class_weighted(loss_fn):
            raise
    reduction = loss_fn.reduction
    loss_fn.reduction = "none"
    try:
        return loss_fn(outputs, targets)
    finally:
        loss_fn.reduction = reduction


def _class_weighted(loss_fn: Any) -> bool:
    return any(getattr(loss_fn, key, None) is not None for key in ("weight", "pos_weight"))


def model_losses(model: nn.Module, probe: ProbeRows, per_example: PerExampleLoss) -> np.ndarray:
    with evaluation_mode(model):
        parts = [per_example(model, chunk, length)
                 for chunk, length in zip(probe.chunks, probe.lengths)]
    return np.concatenate(parts) if parts else np.zeros(0)


@dataclass(frozen=True)
class ProbeSummary:
    loss_difference_max: float | None
    loss_difference_mean: float | None
    gap_estimate: float | None
    gap_stderr: float | None
    train_loss: float | None
    holdout_loss: float | None
    notes: tuple[str, ...]
    holdout_rows: int = 0                 # the probe's held-out rows behind holdout_loss
    holdout_stderr: float | None = None   # their standard error (at least 2 rows)


def _mean(values: np.ndarray) -> float | None:
    return float(values.mean()) if values.size else None


def mean_and_error(values: np.ndarray) -> tuple[float | None, float | None]:
    """Mean and standard error of the finite values (None where there are too few)."""
    finite = values[np.isfinite(values)]
    if not finite.size:
        return None, None
    error = float(finite.std(ddof=1) / math.sqrt(finite.size)) if finite.size > 1 else None
    return float(finite.mean()), error


def summarise_probe(main: np.ndarray, shadows: Sequence[np.ndarray], probe: ProbeRows,
                    fresh_replacements: bool, fresh_reason: str,
                    difference_kinds: Sequence[str],
                    reference: np.ndarray | None = None) -> ProbeSummary:
    """Loss differences, gap estimate with standard error, and the main model's probe losses.

    ``reference``: the losses the shadows are compared with when they are not the main model's
    (the batched engine's no-swap reference run, which shares the shadows' rounding).

    Gap estimate: for shadow k swapping z_i for z', the sample
    ``((f(w'_k; z_i) - f(w; z_i)) + (f(w; z') - f(w'_k; z'))) / 2``; mean over shadows, standard
    error ``std(ddof=1) / sqrt(K)``. Unbiased for the expected gap only when z' is a fresh draw.
    """
    notes: list[str] = []
    base = main if reference is None else reference
    use = np.isin(probe.kinds, list(difference_kinds))
    if shadows:
        differences = np.abs(np.stack([s[use] for s in shadows]) - base[use][None, :])
        finite = differences[np.isfinite(differences)]
        difference_max = float(finite.max()) if finite.size else None
        difference_mean = float(finite.mean()) if finite.size else None
    else:
        difference_max = difference_mean = None
        notes.append("loss difference: no shadows")
    gap = stderr = None
    if not fresh_replacements:
        notes.append(f"gap estimate not applicable: {fresh_reason}")
    elif shadows:
        samples = []
        for k, losses in enumerate(shadows):
            out_rows = (probe.kinds == "out") & (probe.owner == k)
            in_rows = (probe.kinds == "in") & (probe.owner == k)
            sample = 0.5 * ((losses[out_rows] - base[out_rows]).mean()
                            + (base[in_rows] - losses[in_rows]).mean())
            samples.append(sample)
        samples_array = np.asarray(samples)
        if not np.all(np.isfinite(samples_array)):
            notes.append("gap estimate leaves out shadows whose losses are not finite")
            samples_array = samples_array[np.isfinite(samples_array)]
            samples = list(samples_array)
        if samples_array.size:
            gap = float(samples_array.mean())
            if len(samples) >= 2:
                stderr = float(samples_array.std(ddof=1) / math.sqrt(len(samples)))
            else:
                notes.append("gap standard error needs at least 2 shadows")
        else:
            notes.append("gap estimate: no shadow has finite losses")
    train_rows = np.isin(probe.kinds, ["out", "train"])
    # the seeded sample of the held-out set (distinct examples, the main run never trains on
    # them); the swapped-in rows only when there is no such sample (they repeat its examples)
    holdout_rows = probe.kinds == "holdout"
    if not holdout_rows.any():
        holdout_rows = probe.kinds == "in"
    train_loss = _mean(main[train_rows])
    held = main[holdout_rows] if fresh_replacements else np.zeros(0)
    holdout_loss = _mean(held) if fresh_replacements else None
    if not fresh_replacements:
        notes.append("holdout loss not available: no held-out replacement set")
    held_error = mean_and_error(held)[1] if np.isfinite(held).all() else None
    return ProbeSummary(difference_max, difference_mean, gap, stderr, train_loss, holdout_loss,
                        tuple(notes), int(held.size), held_error)
