"""The part of ``train_set`` the loader's sampler draws: n, the swaps and the probe follow it.

``fix_sampling`` and ``set_part`` are ``StabilityTracker`` methods (assigned in its class body).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
from torch.utils.data import DataLoader

from ..shadows.errors import LockstepError
from ..shadows.loaders import drawable_indices
from ..shadows.lockstep import NeighbourSpec
from ..shadows.neighbours import seeded_neighbours
from .measure import default_probe_size

if TYPE_CHECKING:  # pragma: no cover
    from .tracker import StabilityTracker

__all__ = ["DrawnPart", "fix_sampling", "set_part"]


class DrawnPart:
    """The examples ``indices`` of ``dataset``, addressed 0..len-1 (for choosing swaps)."""

    def __init__(self, dataset: Any, indices: np.ndarray) -> None:
        self.dataset = dataset
        self.indices = indices

    def __len__(self) -> int:
        return int(self.indices.size)

    def __getitem__(self, position: int) -> Any:
        return self.dataset[int(self.indices[position])]


def fix_sampling(tracker: StabilityTracker, loader: DataLoader) -> None:
    """n, the swapped examples and the probe follow the part of ``train_set`` the loader's
    sampler can draw (``SubsetRandomSampler`` and any sampler with ``indices``); fixed by
    the first pass, and a later loader drawing from another part is refused."""
    if not isinstance(loader, DataLoader) or loader.batch_sampler is None:
        return   # recording_loader refuses it with the reason
    drawable = drawable_indices(loader, tracker.dataset_size)
    if tracker._sampling_fixed:
        same = drawable is None if tracker.drawable is None else \
            drawable is not None and np.array_equal(drawable, tracker.drawable)
        if not same:
            before = tracker.dataset_size if tracker.drawable is None else tracker.drawable.size
            now = tracker.dataset_size if drawable is None else drawable.size
            raise LockstepError(
                f"this loader's sampler draws from another part of train_set ({now} "
                f"examples) than the run's first pass ({before}): n and the swapped "
                "examples were fixed then; draw from the same examples for the whole run")
        return
    tracker._sampling_fixed = True
    if drawable is None:
        return
    tracker._set_part(drawable)
    if tracker._explicit_swap:
        never = [s.spec.index for s in tracker.shadows if tracker._position[s.spec.index] < 0]
        if never:
            raise LockstepError(
                f"swap indices {never} are never drawn: the loader's sampler draws "
                f"{tracker.n} of the {tracker.dataset_size} examples of train_set; swap examples "
                "it draws")
    else:
        part = DrawnPart(tracker.train_set, drawable)
        chosen = seeded_neighbours(len(tracker.shadows), tracker.n,
                                   np.random.default_rng(tracker.seed), tracker._fetch, part,
                                   tracker.replacements)
        tracker.specs = [NeighbourSpec(
            int(drawable[c.index]), c.replacement, c.origin,
            int(drawable[c.source_index]) if c.origin == "train" else c.source_index)
                         for c in chosen]
        for shadow, spec in zip(tracker.shadows, tracker.specs):
            shadow.spec = spec
    tracker._swapped = None
    tracker._collate_rows_for = None
    tracker._probe = None
    tracker._holdout = None
    if tracker.sinks is not None:
        tracker.sinks.write_run(tracker.describe())


def set_part(tracker: StabilityTracker, drawable: np.ndarray) -> None:
    """Use only the training indices ``drawable`` (sorted, distinct): n is their number."""
    if drawable.size < 2:
        raise LockstepError(f"the loader's sampler draws {drawable.size} example(s); "
                            "neighbouring datasets need at least 2")
    tracker.drawable = drawable
    tracker.n = int(drawable.size)
    tracker._position = np.full(tracker.dataset_size, -1, dtype=np.int64)
    tracker._position[drawable] = np.arange(tracker.n)
    if not tracker._probe_size_given:
        tracker.probe_size = default_probe_size(tracker.n)
    tracker._part_note = (f"n = {tracker.n}: the loader's sampler draws {tracker.n} of the "
                          f"{tracker.dataset_size} examples of train_set; the bounds, the swapped "
                          "examples and the probe's training sample use those")



