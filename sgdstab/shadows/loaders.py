"""Index recording for a user's DataLoader without changing what it yields.

A DataLoader refuses a new batch sampler after construction, so we build a sibling loader over
the same dataset, collate function, workers, generator and worker init, whose batch sampler wraps
the user's one and records each list of indices as it is drawn. Workers prefetch ahead of the loop,
but batches come back in order, so the recorded lists sit in a FIFO and one is popped per batch.
The sibling draws its base seed from the same generator (or the global RNG) exactly as the user's
loader would, so the main run is unchanged. A loader with ``persistent_workers=True`` draws that
seed once, when its workers start; its sibling is then kept as long as the user's loader lives
and persists too, so it draws the seed once as well and its workers' random state carries over
the epochs exactly as the user's would.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Iterator, Sized
from typing import Any

import numpy as np
import torch
from torch.utils.data import DataLoader, Dataset, IterableDataset

from .lockstep import LockstepError

__all__ = ["IndexRecorder", "SizedBatches", "recording_loader", "check_train_set",
           "check_batch_device", "drawable_indices", "check_drawn"]


class IndexRecorder:
    """A batch sampler that yields the wrapped one's index lists and keeps a copy of each."""

    def __init__(self, batch_sampler: Any) -> None:
        self.batch_sampler = batch_sampler
        self.drawn: deque[np.ndarray] = deque()

    def __iter__(self) -> Iterator[list[int]]:
        for indices in self.batch_sampler:
            self.drawn.append(np.asarray(list(indices), dtype=np.int64))
            yield indices

    def __len__(self) -> int:
        return len(self.batch_sampler)


class SizedBatches:
    """An iterator over a loader's batches that knows how many there are: ``len()`` is the
    loader's, so a progress bar (``tqdm(tracker.batches(loader))``) shows its total."""

    def __init__(self, batches: Iterator[Any], loader: Any) -> None:
        self._batches = batches
        self._loader = loader

    def __iter__(self) -> SizedBatches:
        return self

    def __next__(self) -> Any:
        return next(self._batches)

    def __len__(self) -> int:
        return len(self._loader)

    def close(self) -> None:
        """Stop early, like a generator's ``close()``."""
        close = getattr(self._batches, "close", None)
        if close is not None:
            close()


def check_train_set(train_set: Any) -> int:
    """The size of a map-style training set; anything else is refused with a clear error."""
    if isinstance(train_set, IterableDataset):
        raise LockstepError("train_set is an IterableDataset: the tracker needs a map-style "
                            "dataset whose examples it can address by index")
    if not isinstance(train_set, Sized):
        raise LockstepError("train_set has no len(): the tracker needs to know n, the number of "
                            "training examples")
    if not hasattr(train_set, "__getitem__"):
        raise LockstepError("train_set cannot be indexed (no __getitem__)")
    return len(train_set)


def drawable_indices(loader: DataLoader, size: int) -> np.ndarray | None:
    """The training indices the loader's sampler can draw, when it says so up front (a sampler
    with an ``indices`` attribute, such as ``SubsetRandomSampler``) and they are not all of
    ``range(size)``; None otherwise. Indices outside the training set are refused."""
    sampler = getattr(loader.batch_sampler, "sampler", None)
    if sampler is None:
        sampler = getattr(loader, "sampler", None)
    indices = getattr(sampler, "indices", None)
    if indices is None:
        return None
    try:
        values = np.unique(np.asarray(list(indices), dtype=np.int64))
    except (TypeError, ValueError):
        return None
    if values.size == 0:
        raise LockstepError(f"the loader's {type(sampler).__name__} has no indices to draw")
    check_drawn(values, size)
    if values.size == size:
        return None
    return values


def check_drawn(indices: np.ndarray, size: int) -> None:
    """Refuse indices outside ``[0, size)``: the sampler and ``len(train_set)`` disagree."""
    if indices.size and (int(indices.min()) < 0 or int(indices.max()) >= size):
        bad = int(indices.max()) if int(indices.max()) >= size else int(indices.min())
        raise LockstepError(f"the loader drew training index {bad}, but len(train_set) is "
                            f"{size}: the sampler and the dataset's __len__ disagree (make "
                            "__len__ return the number of examples the sampler draws from)")


def recording_loader(loader: DataLoader, train_set: Dataset) -> tuple[DataLoader, IndexRecorder]:
    """A sibling of ``loader`` that yields the same batches and records their indices.

    With ``persistent_workers=True`` the caller keeps the sibling for the next passes (see the
    module docstring) and clears ``recorder.drawn`` before each."""
    if not isinstance(loader, DataLoader):
        raise LockstepError(f"tracker.batches() takes a torch DataLoader, got "
                            f"{type(loader).__name__}")
    if loader.dataset is not train_set:
        raise LockstepError("the loader does not draw from train_set: pass the same dataset "
                            "object to the tracker and to the DataLoader")
    if isinstance(loader.dataset, IterableDataset):
        raise LockstepError("the loader reads an IterableDataset; the tracker needs a map-style "
                            "dataset")
    if loader.batch_sampler is None:
        raise LockstepError("the loader does not batch (batch_size=None): the tracker needs "
                            "batches of examples drawn by index")
    if not getattr(loader, "in_order", True):
        raise LockstepError("the loader has in_order=False: batches may arrive out of order, so "
                            "their indices cannot be matched")
    recorder = IndexRecorder(loader.batch_sampler)
    options: dict[str, Any] = {
        "batch_sampler": recorder,
        "num_workers": loader.num_workers,
        "collate_fn": loader.collate_fn,
        "pin_memory": loader.pin_memory,
        "timeout": loader.timeout,
        "worker_init_fn": loader.worker_init_fn,
        "multiprocessing_context": loader.multiprocessing_context,
        "generator": loader.generator,
    }
    if loader.num_workers > 0:
        options["prefetch_factor"] = loader.prefetch_factor
        options["persistent_workers"] = loader.persistent_workers
    return DataLoader(loader.dataset, **options), recorder


def check_batch_device(batch: Any, device: torch.device) -> None:
    """Refuse a batch with a tensor (at any depth of lists, tuples and dicts) off ``device``:
    the shadows substitute rows into the batch as the loader yields it."""
    tensors: list[torch.Tensor] = []
    stack = [batch]
    while stack:
        item = stack.pop()
        if isinstance(item, torch.Tensor):
            tensors.append(item)
        elif isinstance(item, dict):
            stack.extend(item.values())
        elif isinstance(item, (list, tuple)):
            stack.extend(item)
    for tensor in tensors:
        if tensor.device != device:
            raise LockstepError(f"a batch tensor is on {tensor.device} but the model is on "
                                f"{device}; move data inside step_loss instead")
