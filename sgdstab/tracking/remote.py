"""What a rank of a spread tracker holds of the shadows other ranks step, and the digests that
compare the ranks' runs (re-exported by ``tracking.spread``)."""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np
import torch
from torch.utils._pytree import tree_flatten

from ..shadows.lockstep import LockstepError, NeighbourSpec, Shadow

__all__ = ["RemoteShadow", "HeldHere", "digest", "model_digest"]


class RemoteShadow(Shadow):
    """The stand-in for a shadow another rank steps: its spec, row and label, no model.

    ``forked``, ``forked_at`` and ``fault`` are brought up to date at every epoch end.
    """

    def __init__(self, spec: NeighbourSpec, held_by: int, label: str) -> None:
        super().__init__(spec, None, None, None, label)   # type: ignore[arg-type]
        self.held_by = held_by

    @property
    def active(self) -> bool:   # never stepped, checked or evaluated here
        return False


def digest(*values: Any) -> str:
    """A short hash of nested values: tensors by dtype, shape and bytes, anything else by repr."""
    h = hashlib.blake2b(digest_size=12)
    for leaf in tree_flatten(list(values))[0]:
        if isinstance(leaf, torch.Tensor):
            t = leaf.detach().cpu().contiguous()
            h.update(f"{t.dtype}{tuple(t.shape)}".encode())
            h.update(t.reshape(-1).view(torch.uint8).numpy().tobytes() if t.numel() else b"")
        elif isinstance(leaf, np.ndarray):
            h.update(np.ascontiguousarray(leaf).tobytes())
        else:
            h.update(repr(leaf).encode())
    return h.hexdigest()


def model_digest(model: torch.nn.Module) -> str:
    return digest([(name, t) for name, t in model.state_dict().items()])


class HeldHere:
    """The tracker's engine as the checkpoint code sees it: remote shadows save and load only
    their rank, fork step and fault; the local ones go to the real engine."""

    def __init__(self, engine: Any) -> None:
        self._engine = engine

    def __getattr__(self, name: str) -> Any:
        return getattr(self._engine, name)

    def shadow_state(self, shadow: Shadow) -> dict[str, Any]:
        if isinstance(shadow, RemoteShadow):
            return {"held_by": shadow.held_by, "forked": shadow.forked,
                    "forked_at": shadow.forked_at, "fault": shadow.fault}
        return self._engine.shadow_state(shadow)

    def load_shadow_state(self, shadow: Shadow, state: Any) -> None:
        if isinstance(shadow, RemoteShadow) != ("held_by" in state):
            raise LockstepError(f"{shadow.label}: the checkpoint was saved by a rank that "
                                f"{'held' if 'held_by' not in state else 'did not hold'} it; "
                                "load each rank's own checkpoint on the same number of ranks")
        if isinstance(shadow, RemoteShadow):
            shadow.forked, shadow.forked_at = bool(state["forked"]), state["forked_at"]
            shadow.fault = state["fault"]
            return
        self._engine.load_shadow_state(shadow, state)
