"""Which models the stacked engine takes: a chain of Linear layers, element-wise activations and
dropout inside ``nn.Sequential``, read into a plan of layers; ``stacked_refusal`` says why not.

Re-exported by ``shadows.stacked``.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

from .stacking import _CannotBatch

__all__ = ["stacked_refusal"]


_ACTIVATIONS: dict[type[nn.Module], str] = {
    nn.ReLU: "relu", nn.LeakyReLU: "leaky_relu", nn.Tanh: "tanh", nn.Sigmoid: "sigmoid",
    nn.GELU: "gelu", nn.SiLU: "silu", nn.ELU: "elu", nn.Identity: "identity",
}
_HOOK_DICTS = ("_forward_hooks", "_forward_pre_hooks", "_backward_hooks", "_backward_pre_hooks",
               "_state_dict_hooks", "_load_state_dict_pre_hooks")


class _Linear:
    def __init__(self, weight: str, bias: str | None) -> None:
        self.weight = weight
        self.bias = bias


class _Activation:
    def __init__(self, kind: str, module: nn.Module) -> None:
        self.kind = kind
        self.module: Any = module   # its attributes (negative_slope, approximate, alpha) by kind

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        m, kind = self.module, self.kind
        if kind == "relu":
            return torch.relu(z)
        if kind == "leaky_relu":
            return F.leaky_relu(z, float(getattr(m, "negative_slope", 0.01)))
        if kind == "tanh":
            return torch.tanh(z)
        if kind == "sigmoid":
            return torch.sigmoid(z)
        if kind == "gelu":
            return F.gelu(z, approximate=m.approximate)
        if kind == "silu":
            return F.silu(z)
        if kind == "elu":
            return F.elu(z, m.alpha)
        return z

    def forward_in_place(self, z: torch.Tensor) -> torch.Tensor:
        """``forward``, overwriting ``z`` where the derivative reads the output alone (the same
        values: torch's in-place and out-of-place element-wise kernels agree bit for bit)."""
        if self.kind == "relu":
            return z.relu_()
        if self.kind == "tanh":
            return z.tanh_()
        if self.kind == "sigmoid":
            return z.sigmoid_()
        return self.forward(z)

    def backward(self, grad: torch.Tensor, z: torch.Tensor, a: torch.Tensor,
                 in_place: bool = False) -> torch.Tensor:
        """The derivative through the activation, by torch's own backward kernels (the ones
        autograd uses), from its input ``z`` and output ``a``; with ``in_place``, written over
        ``grad`` where the kernel allows (relu: it selects, so the values are the same)."""
        m, kind, aten = self.module, self.kind, torch.ops.aten
        if kind == "relu":
            if in_place:
                return aten.threshold_backward.grad_input(grad, a, 0, grad_input=grad)
            return aten.threshold_backward(grad, a, 0)
        if kind == "leaky_relu":
            return aten.leaky_relu_backward(grad, z, m.negative_slope, False)
        if kind == "tanh":
            return aten.tanh_backward(grad, a)
        if kind == "sigmoid":
            return aten.sigmoid_backward(grad, a)
        if kind == "gelu":
            return aten.gelu_backward(grad, z, approximate=m.approximate)
        if kind == "silu":
            return aten.silu_backward(grad, z)
        if kind == "elu":
            return aten.elu_backward(grad, m.alpha, 1, 1, False, z)
        return grad


class _Dropout:
    """``nn.Dropout``: every slot gets the mask the main run's module draws from the replayed RNG
    state (drawn as torch's CPU dropout draws it: Bernoulli noise of the input's shape, divided
    by 1 - p), as each shadow of the per-shadow engine does; checked once against autograd."""

    def __init__(self, module: nn.Module) -> None:
        self.module: Any = module   # an nn.Dropout: p and training

    def noise(self, a: torch.Tensor) -> torch.Tensor | None:
        p = float(self.module.p)
        if not self.module.training or p == 0.0:
            return None
        if not 0.0 < p < 1.0:
            raise _CannotBatch(f"dropout probability {p} outside (0, 1)")
        return torch.empty(a.shape[1:], dtype=a.dtype).bernoulli_(1 - p).div_(1 - p)


def _chain(model: nn.Module, prefix: str = "") -> list[tuple[str, nn.Module]] | str:
    """The model's modules in the order its forward runs them, or why that order is unknown."""
    if isinstance(model, nn.Sequential):
        if type(model).forward is not nn.Sequential.forward:
            return f"{type(model).__name__} overrides Sequential's forward"
        found: list[tuple[str, nn.Module]] = []
        for name, child in model.named_children():
            inner = _chain(child, f"{prefix}{name}.")
            if isinstance(inner, str):
                return inner
            found += inner
        return found
    return [(prefix, model)]


def _plan(model: nn.Module) -> tuple[list[_Linear | _Activation | _Dropout], bool] | str:
    """The layers (and whether the inputs are flattened first), or why the model is refused."""
    chain = _chain(model)
    if isinstance(chain, str):
        return chain
    layers: list[_Linear | _Activation | _Dropout] = []
    flatten_first = False
    for prefix, module in chain:
        label = f"module {prefix[:-1]!r}" if prefix else "the model"
        kind = type(module)
        if kind is nn.Linear:
            layers.append(_Linear(f"{prefix}weight",
                                  None if module.bias is None else f"{prefix}bias"))
        elif kind in _ACTIVATIONS:
            layers.append(_Activation(_ACTIVATIONS[kind], module))
        elif kind is nn.Dropout:
            layers.append(_Dropout(module))
        elif kind is nn.Flatten and not any(isinstance(x, _Linear) for x in layers) and \
                module.start_dim == 1 and module.end_dim == -1:
            flatten_first = True
        else:
            return (f"{label} ({kind.__name__}) is not a Linear layer, nn.Dropout or an "
                    "element-wise activation the stacked engine differentiates")
    if not layers or not isinstance(layers[0], _Linear):
        return "the model does not start with a Linear layer"
    return layers, flatten_first


def _known_loss(loss_fn: Any) -> str:
    """'cross_entropy' or 'mse' for a mean-reduced loss the stacked engine evaluates for all runs
    in one call; '' for any other loss (evaluated run by run)."""
    if loss_fn is F.cross_entropy:
        return "cross_entropy"
    if loss_fn is F.mse_loss:
        return "mse"
    if type(loss_fn) is nn.CrossEntropyLoss and loss_fn.weight is None and \
            loss_fn.reduction == "mean" and loss_fn.label_smoothing == 0.0 and \
            loss_fn.ignore_index == -100:
        return "cross_entropy"
    if type(loss_fn) is nn.MSELoss and loss_fn.reduction == "mean":
        return "mse"
    return ""


def stacked_refusal(model: nn.Module, optimizer: torch.optim.Optimizer,
                    loss_fn: Callable[..., torch.Tensor] | None) -> str:
    """Why the stacked engine cannot step this run ('' when it can)."""
    from .engines import ELEMENTWISE_OPTIMIZERS

    if loss_fn is None:
        return ("the loss is a step_loss(model, batch); the stacked engine needs "
                "loss_fn(outputs, targets)")
    if type(optimizer) not in ELEMENTWISE_OPTIMIZERS:
        return (f"the optimizer {type(optimizer).__name__} is not one known to update each "
                "element on its own")
    plan = _plan(model)
    if isinstance(plan, str):
        return plan
    for name, module in model.named_modules():
        if any(getattr(module, hooks, None) for hooks in _HOOK_DICTS):
            return f"module {name!r} has hooks, which the stacked engine does not run"
    from torch.nn.modules import module as module_globals
    if any(getattr(module_globals, f"_global_{kind}", None)
           for kind in ("forward_hooks", "forward_pre_hooks", "backward_hooks")):
        return "global module hooks are registered"
    parameters = list(model.named_parameters())
    in_optimizer = {id(p) for group in optimizer.param_groups for p in group["params"]}
    for name, p in parameters:
        if not p.requires_grad or id(p) not in in_optimizer:
            return f"parameter {name!r} is frozen or not in the optimizer"
        if p.device.type != "cpu" or not p.dtype.is_floating_point or \
                p.dtype != parameters[0][1].dtype:
            return f"parameter {name!r} is not a CPU floating tensor of the model's one dtype"
    if len({id(p) for _, p in parameters}) != len(parameters) or \
            len({p.data_ptr() for _, p in parameters}) != len(parameters):
        return "the model shares (ties) parameters between layers"
    return ""
