"""Parameter helpers shared by the engines and the tracker: finiteness, squared distance, the
trainable parameters. Re-exported by ``sgdstab.shadows.lockstep``.
"""

from __future__ import annotations

from collections.abc import Sequence

import torch
from torch import nn


def parameters_finite(params: Sequence[torch.Tensor]) -> bool:
    """Whether every parameter is finite, in one fused norm call (a norm that overflows, i.e.
    entries beyond ~1e19 in float32, counts as non-finite: such a run has diverged anyway)."""
    with torch.no_grad():
        try:
            norms = torch._foreach_norm(list(params))
        except (AttributeError, RuntimeError):   # pragma: no cover - older or exotic builds
            return all(bool(torch.isfinite(p).all()) for p in params)
        return bool(torch.isfinite(torch.stack(norms)).all())


def squared_distance(a: torch.Tensor, b: torch.Tensor | None = None, chunk: int = 1 << 16
                     ) -> float:
    """``sum((a - b)**2)`` (or ``sum(a**2)``) in float64, converted a chunk at a time so that no
    float64 copy of a whole large tensor is made (epoch-end peak memory)."""
    with torch.no_grad():
        flat_a = a.detach().reshape(-1)
        flat_b = None if b is None else b.detach().reshape(-1)
        total = 0.0
        for start in range(0, flat_a.numel(), chunk):
            part = flat_a[start:start + chunk].double()
            if flat_b is not None:
                part = part - flat_b[start:start + chunk].double()
            total += float(torch.dot(part, part))
        return total


def trainable_parameters(model: nn.Module) -> list[tuple[str, nn.Parameter]]:
    return [(name, p) for name, p in model.named_parameters() if p.requires_grad]
