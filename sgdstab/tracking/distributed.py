"""Data-parallel tracking: shadows that follow a DistributedDataParallel run on every rank.

Every rank holds the main replica (inside ``DistributedDataParallel``) and the same K shadows. At
each step a rank replays its *local* batch on each shadow, substituting the swapped row only when
the swapped index is in that local batch; the shadow's gradients are then averaged across ranks
through DDP's own reducer, bucket by bucket, with the same scaling and the same communication hook
as the main model's. Equal inputs therefore give bit-equal averages, so the shadows stay identical
on all ranks and the null-swap audit reads exactly 0 for any number of ranks.

Each step's indices are gathered from all ranks: the *global* batch (rank 0's indices, then rank
1's, ...) decides lazy forks, identically on every rank, and is what the history records for the
bounds. Readings are computed on every rank, checked for agreement, and rank 0's reading is the one
every rank returns; only rank 0 writes the run directory.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator, Mapping
from dataclasses import replace
from typing import Any

import numpy as np
import torch
import torch.distributed as dist
from torch import nn
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DataLoader, Dataset
from torch.utils.data.distributed import DistributedSampler

from ..outputs.reading import EpochReading
from ..shadows.loaders import SizedBatches
from ..shadows.lockstep import LockstepError, NeighbourSpec, StepGroup, select_rows
from .spread import wait_for_ranks
from .tracker import LockstepWarning, StabilityTracker

__all__ = ["DataParallelStabilityTracker", "ReplicaGradientAverager"]


def _to_cpu(value: Any) -> Any:
    """A copy of a (nested) batch structure with every tensor moved to the CPU (for pickling)."""
    if isinstance(value, torch.Tensor):
        return value.detach().cpu()
    if isinstance(value, Mapping):
        items = {key: _to_cpu(item) for key, item in value.items()}
        try:
            return type(value)(items)  # type: ignore[call-arg]  # dict-like classes take a dict
        except TypeError:
            return items
    if isinstance(value, tuple) and hasattr(value, "_fields"):
        return type(value)(*(_to_cpu(item) for item in value))
    if isinstance(value, (list, tuple)):
        return type(value)(_to_cpu(item) for item in value)
    return value


def _communication_device(group: Any) -> torch.device:
    """Where small control tensors must live for ``group``'s backend (CUDA for NCCL)."""
    if dist.get_backend(group) == "nccl":
        return torch.device("cuda", torch.cuda.current_device())
    return torch.device("cpu")


class ReplicaGradientAverager:
    """Averages a shadow's gradients across ranks exactly as ``ddp`` averaged the main model's.

    Called by the engine on each shadow after its backward passes (``engine.gradient_sync``).
    With DDP's reducer available it fills a copy of each of the reducer's current gradient buckets
    with the shadow's gradients (pre-scaled by 1/world size unless a communication hook is
    registered, as the reducer does), runs the reducer's communication path on it and copies the
    result back: same bucket layout, same reduction order, same arithmetic. Otherwise it falls
    back to one all-reduce per parameter (bit-exact for two ranks only; see ``exact``).
    """

    def __init__(self, ddp: DistributedDataParallel) -> None:
        self.ddp = ddp
        self.group = ddp.process_group
        self.world_size = dist.get_world_size(self.group)
        self.source = dist.get_global_rank(self.group, 0)
        self.device = _communication_device(self.group)
        reducer = getattr(ddp, "reducer", None)
        self.exact = all(hasattr(reducer, name) for name in
                         ("_get_zeros_like_grad_buckets", "_run_comm_hook"))
        self.main_parameters = list(ddp.module.parameters())
        self._position = {id(p): k for k, p in enumerate(self.main_parameters)}
        ignored = getattr(ddp, "parameters_to_ignore", None) or ()
        self._ignored = set(ignored)
        self._buckets: list[tuple[Any, list[int]]] | None = None
        self._prescale = True

    def new_step(self) -> None:
        """Forget the bucket layout: DDP may rebuild its buckets between steps."""
        self._buckets = None

    def _layout(self) -> list[tuple[Any, list[int]]]:
        if self._buckets is None:
            for hook, state in getattr(self.ddp, "_comm_hooks", []):
                if state is not None and not isinstance(state, dist.ProcessGroup):
                    raise LockstepError(
                        f"the DDP communication hook {getattr(hook, '__qualname__', hook)} keeps "
                        f"state ({type(state).__name__}); replaying it for the shadows would "
                        "change the main run's state. Use a stateless hook or none")
            logging = self.ddp._get_ddp_logging_data() if hasattr(
                self.ddp, "_get_ddp_logging_data") else {}
            self._prescale = not logging.get("comm_hook")
            buckets = self.ddp.reducer._get_zeros_like_grad_buckets()
            self._buckets = [(bucket, [self._position[id(p)] for p in bucket.parameters()])
                             for bucket in buckets]
        return self._buckets

    def agree(self, finite: bool) -> bool:
        """Whether every rank's shadow loss was finite (one tiny all-reduce)."""
        flag = torch.tensor([1.0 if finite else 0.0], device=self.device)
        dist.all_reduce(flag, op=dist.ReduceOp.MIN, group=self.group)
        return bool(flag.item() > 0.5)

    def __call__(self, model: nn.Module, finite: bool = True) -> bool:
        """Average ``model``'s gradients across ranks; return whether all ranks were finite."""
        agreed = self.agree(finite)
        parameters = list(model.parameters())
        if len(parameters) != len(self.main_parameters):
            raise LockstepError("a shadow does not have the main model's parameters")
        with torch.no_grad():
            if self.exact:
                self._average_by_buckets(parameters)
            else:
                self._average_per_parameter(parameters)
            self._broadcast_buffers(model)
        return agreed

    def _set_gradient(self, k: int, parameter: nn.Parameter, value: torch.Tensor) -> None:
        if parameter.grad is not None:
            parameter.grad.copy_(value)
        elif self.main_parameters[k].grad is not None:   # DDP fills locally unused parameters
            parameter.grad = value.detach().clone().reshape(parameter.shape)

    def _average_by_buckets(self, parameters: list[nn.Parameter]) -> None:
        scale = 1.0 / self.world_size
        for bucket, positions in self._layout():
            buffer = bucket.buffer()
            buffer.zero_()
            views = bucket.gradients()
            for view, k in zip(views, positions):
                grad = parameters[k].grad
                if grad is None:
                    continue
                if grad.is_sparse:
                    raise LockstepError("sparse gradients are not supported in data-parallel "
                                        "tracking")
                if self._prescale:
                    torch.mul(grad, scale, out=view)
                else:
                    view.copy_(grad)
            result = self.ddp.reducer._run_comm_hook(bucket).wait()
            if isinstance(result, (list, tuple)):
                result = result[0]
            for view, k in zip(views, positions):
                offset = result.storage_offset() + view.storage_offset() - buffer.storage_offset()
                reduced = result.as_strided(view.size(), view.stride(), offset)
                self._set_gradient(k, parameters[k], reduced)

    def _average_per_parameter(self, parameters: list[nn.Parameter]) -> None:
        names = [name for name, _ in self.ddp.module.named_parameters()]
        for k, (name, parameter) in enumerate(zip(names, parameters)):
            if not parameter.requires_grad or name in self._ignored:
                continue
            grad = parameter.grad
            value = torch.zeros_like(parameter) if grad is None else grad.mul(1.0 / self.world_size)
            dist.all_reduce(value, group=self.group)
            self._set_gradient(k, parameter, value)

    def _broadcast_buffers(self, model: nn.Module) -> None:
        """Give every rank rank 0's buffers, as DDP does for the main model before each forward."""
        if not getattr(self.ddp, "broadcast_buffers", True):
            return
        buffers = [b for name, b in model.named_buffers() if name not in self._ignored]
        kinds: dict[tuple[torch.dtype, torch.device], list[torch.Tensor]] = {}
        for buffer in buffers:
            kinds.setdefault((buffer.dtype, buffer.device), []).append(buffer)
        for same in kinds.values():
            flat = torch.cat([b.reshape(-1) for b in same])
            dist.broadcast(flat, src=self.source, group=self.group)
            start = 0
            for b in same:
                b.copy_(flat[start:start + b.numel()].view_as(b))
                start += b.numel()


class DataParallelStabilityTracker(StabilityTracker):
    """A ``StabilityTracker`` for a ``DistributedDataParallel`` model, created on every rank.

    Give it the DDP-wrapped model and the optimizer over its parameters; ``train_set`` is the whole
    training set (n is its length) and the loader should draw from it through a
    ``DistributedSampler``. Every rank must pass the same options (in particular the same
    ``seed``): the shadows' swapped examples are chosen from it, and the ranks check they agree.
    """

    def __init__(self, model: DistributedDataParallel, optimizer: torch.optim.Optimizer, *,
                 train_set: Dataset, **options: Any) -> None:
        if not isinstance(model, DistributedDataParallel):
            raise TypeError("DataParallelStabilityTracker takes a "
                            "torch.nn.parallel.DistributedDataParallel model; for a single "
                            "process use StabilityTracker")
        if not dist.is_available() or not dist.is_initialized():
            raise LockstepError("torch.distributed is not initialised: call "
                                "init_process_group() before wrapping the model")
        if getattr(model, "mixed_precision", None) is not None:
            raise LockstepError("DDP mixed_precision is not supported: the shadows would not "
                                "reduce gradients in the main model's precision")
        self.ddp = model
        self.process_group = model.process_group
        self.world_size = dist.get_world_size(self.process_group)
        self.rank = dist.get_rank(self.process_group)
        self._source = dist.get_global_rank(self.process_group, 0)
        self._device = _communication_device(self.process_group)
        self.averager = ReplicaGradientAverager(model)
        self._gathered: tuple[StepGroup, np.ndarray] | None = None
        self._pending_notes: list[str] = []
        self._last_epoch_seen: int | None = None
        self._closed_together = False   # close() waits for the other ranks once
        super().__init__(model.module, optimizer, train_set=train_set, **options)
        self.engine.gradient_sync = self.averager
        try:
            self._check_ranks_agree()
        except Exception:
            self.close()
            raise
        if not self.averager.exact:
            self._warn_once("fallback", "DDP's reducer internals are not available in this torch "
                            "version: shadow gradients are averaged per parameter, which matches "
                            "DDP bit for bit only with two ranks", UserWarning)

    def close(self) -> None:
        """Remove the hooks and close the writers, then wait (once, at most a minute) until
        every rank has closed too: with rank 0 still writing its files, a rank that went on to
        tear the process group down was seen to abort (SIGABRT in gloo's teardown; twice in the
        full suite, in the torchrun example)."""
        super().close()
        if self._closed_together or self.world_size < 2:
            return
        self._closed_together = True
        wait_for_ranks(self.process_group, self.rank,
                       dist.get_backend(self.process_group) == "gloo", 60.0, "process group")

    # -- agreement between ranks -------------------------------------------------------------
    def _gather_objects(self, value: Any) -> list[Any]:
        gathered: list[Any] = [None] * self.world_size
        dist.all_gather_object(gathered, value, group=self.process_group)
        return gathered

    def _check_ranks_agree(self) -> None:
        mine = {
            "n": self.n, "seed": self.seed, "audit": self.audit_shadow is not None,
            "lazy_fork": self.lazy_fork, "engine": self.engine.name,
            "optimizer": type(self.optimizer).__name__,
            "shadows": [(s.spec.index, s.spec.origin, s.spec.source_index)
                        for s in self.shadows],
        }
        everyone = self._gather_objects(mine)
        differing = sorted({key for other in everyone for key in mine if other[key] != mine[key]})
        if differing:
            raise LockstepError(
                f"the ranks disagree on {', '.join(differing)}: every rank must create the tracker "
                "with the same training set and options (in particular the same seed, not one "
                "offset by the rank)")

    def _gather_indices(self, local: np.ndarray) -> list[np.ndarray]:
        size = torch.tensor([len(local)], dtype=torch.int64, device=self._device)
        sizes = [torch.zeros_like(size) for _ in range(self.world_size)]
        dist.all_gather(sizes, size, group=self.process_group)
        lengths = [int(s.item()) for s in sizes]
        padded = torch.zeros(max(lengths), dtype=torch.int64, device=self._device)
        padded[:len(local)] = torch.as_tensor(local, dtype=torch.int64)
        parts = [torch.zeros_like(padded) for _ in range(self.world_size)]
        dist.all_gather(parts, padded, group=self.process_group)
        return [part[:length].cpu().numpy() for part, length in zip(parts, lengths)]

    def _drawn_indices(self, group: StepGroup) -> np.ndarray:
        """The step's global batch: every rank's local indices, rank 0's first."""
        if self._gathered is not None and self._gathered[0] is group:
            return self._gathered[1]
        per_rank = self._gather_indices(group.all_indices())
        sizes = [len(part) for part in per_rank]
        if len(set(sizes)) > 1:
            self._warn_once("uneven", f"at step {self.steps} the ranks' local batches have "
                            f"different sizes {sizes}: DDP averages per-rank mean losses, which "
                            "weights examples unequally, while the bounds treat the step as one "
                            f"mean over the global batch of {sum(sizes)}", UserWarning)
        elif self.world_size > 1 and sizes[0] > 1 and all(
                np.array_equal(part, per_rank[0]) for part in per_rank[1:]):
            self._warn_once("replicated", "every rank drew the same examples at step "
                            f"{self.steps}: shard the data with a DistributedSampler; the global "
                            "batch counts each example once per rank", UserWarning)
        drawn = np.concatenate(per_rank) if per_rank else np.zeros(0, dtype=np.int64)
        self._gathered = (group, drawn)
        return drawn

    # -- the loop -----------------------------------------------------------------------------
    def batches(self, loader: DataLoader) -> SizedBatches:
        """Yield exactly the loader's batches; the ranks first check they will take equal steps
        (``len()`` is the loader's)."""
        return SizedBatches(self._rank_batches(loader), loader)

    def _rank_batches(self, loader: DataLoader) -> Iterator[Any]:
        try:
            steps = len(loader)
        except TypeError:
            steps = -1
        counts = self._gather_objects(steps)
        if len(set(counts)) > 1:
            raise LockstepError(f"the ranks' loaders have different lengths {counts}: they would "
                                "take different numbers of steps (use a DistributedSampler)")
        sampler = getattr(loader, "sampler", None)
        if isinstance(sampler, DistributedSampler) and sampler.shuffle:
            if self._last_epoch_seen is not None and sampler.epoch == self._last_epoch_seen:
                self._warn_once("set_epoch", "the DistributedSampler's epoch did not change since "
                                "the last pass: call sampler.set_epoch(epoch) before each epoch, "
                                "or every epoch repeats the same order", UserWarning)
            self._last_epoch_seen = sampler.epoch
        yield from super().batches(loader)

    def _on_batch(self, batch: Any, indices: np.ndarray) -> None:
        if self.audit_shadow is not None and self.audit_shadow.spec.index < 0:
            # The null swap uses the global batch's first example (rank 0's), on every rank.
            payload: list[Any] = [None, None]
            if self.rank == 0:
                payload = [int(indices[0]), _to_cpu(select_rows(batch, [0], len(indices)))]
            dist.broadcast_object_list(payload, src=self._source, group=self.process_group)
            index, row = payload
            self.audit_shadow.spec = NeighbourSpec(index, None, "self", index)
            self.audit_shadow.row = row
        super()._on_batch(batch, indices)

    def _after_main_step(self, optimizer: torch.optim.Optimizer, args: Any, kwargs: Any) -> None:
        self.averager.new_step()
        try:
            super()._after_main_step(optimizer, args, kwargs)
        finally:
            self._gathered = None

    def _writes_files(self) -> bool:
        return self.rank == 0

    # -- readings -----------------------------------------------------------------------------
    def _divergences(self) -> tuple[list[float], dict[str, float], float | None]:
        values, layer, audit = super()._divergences()
        mine = torch.tensor(values + [audit if audit is not None else -1.0],
                            dtype=torch.float64, device=self._device)
        everyone = [torch.zeros_like(mine) for _ in range(self.world_size)]
        dist.all_gather(everyone, mine, group=self.process_group)
        reference = everyone[0].cpu().numpy()
        others = [other.cpu().numpy() for other in everyone[1:]]
        if not all(np.array_equal(other, reference, equal_nan=True) for other in others):
            spread = max(float(np.nanmax(np.abs(other - reference), initial=0.0))
                         for other in others)
            warnings.warn(f"the shadows differ between ranks (divergences differ by up to "
                          f"{spread:.3e}): the ranks did not replay the same steps; rank 0's "
                          "reading is reported", LockstepWarning, stacklevel=3)
            self._pending_notes.append(f"ranks disagree: divergences differ by up to "
                                       f"{spread:.3e}")
        return values, layer, audit

    def finish_epoch(self) -> EpochReading:
        """Close the epoch on every rank; all ranks return rank 0's reading, rank 0 writes it."""
        sinks, self.sinks = self.sinks, None
        try:
            reading = super().finish_epoch()
        finally:
            self.sinks = sinks
        if self._pending_notes:
            reading = replace(reading, notes=reading.notes + tuple(self._pending_notes))
            self._pending_notes = []
        payload = [reading]
        dist.broadcast_object_list(payload, src=self._source, group=self.process_group)
        reading = payload[0]
        self.readings[-1] = reading
        if self.sinks is not None:
            self.sinks.write(reading)
        return reading

    def describe(self) -> dict[str, Any]:
        """The run's configuration, with the data-parallel set-up."""
        description = super().describe()
        description["data_parallel"] = {
            "world_size": self.world_size, "backend": str(dist.get_backend(self.process_group)),
            "gradient_average": "ddp_buckets" if self.averager.exact else "per_parameter",
        }
        return description
