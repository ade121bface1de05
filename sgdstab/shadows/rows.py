"""A batch's rows: its length, one example substituted at given positions, rows selected.

Works on tensors and on lists, tuples and dicts of them; re-exported by
``sgdstab.shadows.lockstep``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import torch

from .errors import LockstepError

__all__ = ["batch_length", "substitute_rows", "select_rows"]


def batch_length(batch: Any) -> int | None:
    """The number of rows of a collated batch (dim 0 of its first tensor), or None."""
    if isinstance(batch, torch.Tensor):
        return int(batch.shape[0]) if batch.dim() > 0 else None
    if isinstance(batch, Mapping):
        for value in batch.values():
            length = batch_length(value)
            if length is not None:
                return length
        return None
    if isinstance(batch, (list, tuple)):
        for value in batch:
            length = batch_length(value)
            if length is not None:
                return length
        return None
    return None


def _is_leaf_list(value: Any) -> bool:
    """A list or tuple of plain values (e.g. collated strings), one per row."""
    return isinstance(value, (list, tuple)) and all(
        not isinstance(item, (torch.Tensor, Mapping, list, tuple)) for item in value
    )


def substitute_rows(batch: Any, row: Any, positions: Sequence[int], rows: int, path: str = "batch"
                    ) -> Any:
    """Return ``batch`` with rows ``positions`` replaced by row 0 of the one-row batch ``row``.

    Only the leaves that change are copied (cloned); everything else is shared with ``batch``.
    ``rows`` is the batch's number of rows. Structures that do not line up raise LockstepError.
    """
    if isinstance(batch, torch.Tensor):
        if not isinstance(row, torch.Tensor):
            raise LockstepError(f"{path}: the batch holds a tensor but the replacement holds "
                                f"{type(row).__name__}")
        if batch.dim() == 0 or batch.shape[0] != rows:
            raise LockstepError(f"{path}: tensor of shape {tuple(batch.shape)} has no row "
                                f"dimension of size {rows}; cannot substitute a row")
        if row.dim() == 0 or row.shape[0] != 1 or row.shape[1:] != batch.shape[1:]:
            raise LockstepError(f"{path}: replacement row of shape {tuple(row.shape)} does not fit "
                                f"batch rows of shape {tuple(batch.shape[1:])}")
        out = batch.clone()
        replacement = row[0].to(dtype=batch.dtype, device=batch.device)
        for position in positions:
            out[position] = replacement
        return out
    if isinstance(batch, Mapping):
        if not isinstance(row, Mapping) or set(row.keys()) != set(batch.keys()):
            raise LockstepError(f"{path}: replacement keys do not match the batch keys "
                                f"{sorted(map(str, batch.keys()))}")
        changed = {key: substitute_rows(value, row[key], positions, rows, f"{path}[{key!r}]")
                   for key, value in batch.items()}
        try:
            return type(batch)(changed)  # type: ignore[call-arg]  # dict-like classes take a dict
        except TypeError:
            return changed
    if isinstance(batch, (list, tuple)):
        if _is_leaf_list(batch) and len(batch) == rows and isinstance(row, (list, tuple)) \
                and len(row) == 1 and _is_leaf_list(row):
            out_list = list(batch)
            for position in positions:
                out_list[position] = row[0]
            return type(batch)(out_list) if isinstance(batch, tuple) else out_list
        if not isinstance(row, (list, tuple)) or len(row) != len(batch):
            raise LockstepError(f"{path}: replacement structure (length "
                                f"{len(row) if isinstance(row, (list, tuple)) else 'n/a'}) does "
                                f"not match the batch (length {len(batch)})")
        items = [substitute_rows(value, other, positions, rows, f"{path}[{number}]")
                 for number, (value, other) in enumerate(zip(batch, row))]
        if isinstance(batch, tuple):
            if hasattr(batch, "_fields"):  # namedtuple
                return type(batch)(*items)
            return tuple(items)
        return items
    # A plain value shared by the whole batch (e.g. a flag): it must agree with the replacement.
    if batch != row:
        raise LockstepError(f"{path}: non-tensor value {batch!r} differs from the replacement's "
                            f"{row!r} and is not one value per row")
    return batch


def select_rows(batch: Any, rows: slice | Sequence[int], length: int) -> Any:
    """The sub-batch of ``rows`` (a slice or index list) of a collated batch of ``length`` rows."""
    if isinstance(batch, torch.Tensor):
        if batch.dim() > 0 and batch.shape[0] == length:
            return batch[rows] if isinstance(rows, slice) else batch[list(rows)]
        return batch
    if isinstance(batch, Mapping):
        return {key: select_rows(value, rows, length) for key, value in batch.items()}
    if isinstance(batch, (list, tuple)):
        if _is_leaf_list(batch) and len(batch) == length:
            picked = batch[rows] if isinstance(rows, slice) else [batch[i] for i in rows]
            return type(batch)(picked) if isinstance(batch, tuple) else list(picked)
        items = [select_rows(value, rows, length) for value in batch]
        if isinstance(batch, tuple):
            return type(batch)(*items) if hasattr(batch, "_fields") else tuple(items)
        return items
    return batch
