"""The optimizer settings the stacked-engine tests step with, by name (SGD with momentum, weight
decay, Nesterov or dampening; Adam; AdamW with AMSGrad; plain SGD otherwise)."""

from __future__ import annotations

import torch
from torch import nn


def _optimizer(kind: str, model: nn.Module) -> torch.optim.Optimizer:
    if kind == "momentum_decay":
        return torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9, weight_decay=1e-3)
    if kind == "nesterov":
        return torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9, nesterov=True,
                               weight_decay=1e-3)
    if kind == "dampening":
        return torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.8, dampening=0.3)
    if kind == "adam":
        return torch.optim.Adam(model.parameters(), lr=0.01, weight_decay=1e-4)
    if kind == "adamw":
        return torch.optim.AdamW(model.parameters(), lr=0.01, amsgrad=True)
    return torch.optim.SGD(model.parameters(), lr=0.1)
