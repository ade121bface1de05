"""Random-number state around shadow steps: the torch CPU state replayed, the host RNGs guarded.

Python's ``random`` and NumPy's global state matter only when the user's step code draws from
them; ``HostRngGuard`` decides when to preserve them. Re-exported by ``sgdstab.shadows.lockstep``.
"""

from __future__ import annotations

import contextlib
import random
from collections.abc import Iterator
from typing import Any

import numpy as np
import torch


@contextlib.contextmanager
def preserved_rng() -> Iterator[None]:
    """Run a block without disturbing torch's CPU RNG, Python's ``random`` or NumPy's global RNG."""
    torch_state = torch.get_rng_state()
    python_state = random.getstate()
    numpy_state = np.random.get_state()
    try:
        yield
    finally:
        torch.set_rng_state(torch_state)
        random.setstate(python_state)
        np.random.set_state(numpy_state)


class HostRngGuard:
    """Keeps Python's ``random`` and NumPy's global RNG as they were across the shadows' steps.

    Only torch's RNG is replayed for the shadows. Saving the host states costs ~70 us a step, so
    with ``mode=None`` they are guarded during the first epoch and, after it, at every
    ``sample_every``-th step only (~2 us a step), where the guard also checks whether the
    shadows' steps draw from them (``used``); once a draw is seen, guarding stays on at every
    step. ``mode=True`` always guards, ``mode=False`` never does.
    """

    def __init__(self, mode: bool | None = None, sample_every: int = 32) -> None:
        self.mode = mode
        self.used = False
        self.sample_every = sample_every

    def save(self, first_epoch: bool, step: int = 0) -> tuple[Any, Any] | None:
        if self.mode is False:
            return None
        if self.mode is None and not self.used and not first_epoch and \
                step % self.sample_every:
            return None
        return random.getstate(), np.random.get_state()

    def restore(self, states: tuple[Any, Any]) -> bool:
        """Put the states back; True when this is the first time a draw was detected."""
        python_state, numpy_state = states
        detected = False
        if self.mode is None and not self.used:
            now: Any = np.random.get_state()   # the legacy tuple (name, keys, pos, ...)
            if random.getstate() != python_state or now[2:] != numpy_state[2:] or \
                    not np.array_equal(now[1], numpy_state[1]):
                self.used = detected = True
        random.setstate(python_state)
        np.random.set_state(numpy_state)
        return detected
