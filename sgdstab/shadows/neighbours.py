"""Choosing the neighbouring datasets: which training examples are swapped, and for what."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from .lockstep import LockstepError, NeighbourSpec, Shadow, preserved_rng, substitute_rows

__all__ = ["explicit_neighbours", "seeded_neighbours", "attach_rows"]

Fetch = Callable[[Any, int], Any]


def explicit_neighbours(swap: Sequence[tuple[int, Any]], n: int) -> list[NeighbourSpec]:
    """The user's ``[(index, replacement), ...]``; indices must be in range and distinct."""
    specs, seen = [], set()
    for entry in swap:
        index, example = entry
        index = int(index)
        if not 0 <= index < n:
            raise IndexError(f"swap index {index} is outside the training set (0..{n - 1})")
        if index in seen:
            raise ValueError(f"swap index {index} appears twice")
        seen.add(index)
        specs.append(NeighbourSpec(index, example, "explicit"))
    return specs


def seeded_neighbours(shadows: int, n: int, rng: np.random.Generator, fetch: Fetch,
                      train_set: Any, replacements: Any | None) -> list[NeighbourSpec]:
    """``shadows`` distinct training indices drawn with ``rng``, each replaced by an example from
    ``replacements`` (held out: origin "holdout") or, without one, by another training example
    (a duplicate: origin "train")."""
    if isinstance(shadows, bool) or not isinstance(shadows, int) or shadows < 0:
        raise ValueError(f"shadows must be a whole number >= 0, got {shadows!r}")
    if shadows > n:
        raise ValueError(f"shadows={shadows} is larger than the training set ({n})")
    indices = rng.choice(n, size=shadows, replace=False)
    if replacements is not None:
        size = len(replacements)
        if size < 1:
            raise ValueError("the replacement set is empty")
        sources = rng.choice(size, size=shadows, replace=shadows > size)
        return [NeighbourSpec(int(i), fetch(replacements, j), "holdout", int(j))
                for i, j in zip(indices, sources)]
    others = np.setdiff1d(np.arange(n), indices)
    sources = rng.choice(others, size=shadows, replace=shadows > len(others))
    return [NeighbourSpec(int(i), fetch(train_set, j), "train", int(j))
            for i, j in zip(indices, sources)]


def attach_rows(shadows: Sequence[Shadow], train_set: Any,
                collate: Callable[[list[Any]], Any]) -> None:
    """Give every shadow its replacement as a one-row batch made by ``collate``; a replacement
    whose structure differs from the training example it replaces is refused."""
    with preserved_rng():
        for shadow in shadows:
            shadow.row = collate([shadow.spec.replacement])
            own = collate([train_set[shadow.spec.index]])
            try:   # the replacement must have the training examples' structure
                substitute_rows(own, shadow.row, [0], 1)
            except LockstepError as error:
                raise LockstepError(
                    f"{shadow.label}: the replacement for training example "
                    f"{shadow.spec.index} does not match the training examples' structure: "
                    f"{error}") from None
