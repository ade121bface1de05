"""Stacked shadows for models made of Linear layers: batched matrix products, explicit backward.

For a model that is a chain of ``nn.Linear`` layers and element-wise activations (inside
``nn.Sequential``), every run's weights are held stacked (``stacking``) and each layer is one
batched matrix product over all runs (``torch.bmm``); a run whose swapped example is not in the
batch reads the main batch's inputs as they are (a broadcast view, not a copy). The backward pass
is written out by hand (the transposed products and torch's own activation derivatives), the
loss's derivative comes from autograd on the stacked outputs only, and the update is one
optimizer step over the stacked tensors (foreach where the optimizer offers it). Where one step's
gradients and activations would exceed ``STEP_MEMORY_BUDGET``, forward, backward and update run a
chunk of slots at a time (the same values, bit for bit), so a step holds one chunk's share.

Why no single product of the shared inputs against all runs' concatenated first-layer weights:
that matrix product does not round every run's block of columns alike (measured on this torch:
4 of 60 shapes gave a block differing from the first in the last bits with equal weights), so a
null swap would drift from its reference; ``bmm`` over equal slots rounded them alike in every
shape tried, which keeps the null-swap audit exact. It costs no more arithmetic.

Like the vmap engine (``batched``), it steps a no-swap reference run beside the shadows and
measures them against it (stacked products do not round like the main model's unbatched
ones), keeps an unbatched twin of the null-swap audit, and falls back to per-shadow stepping,
with a warning, when a step cannot be followed. ``stacked_refusal`` says which models it takes.

In ``engine="auto"`` mode it also makes the choice between itself and per-shadow stepping, by
timing both on the run's own batch at the first step after the shadows fork (``AutoChoice``).
"""

from __future__ import annotations

import math
import os
import statistics
import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from .batched import BatchedEngine
from .lockstep import (
    LockstepError,
    LossOf,
    NeighbourSpec,
    PerShadowEngine,
    Shadow,
    StepGroup,
    substitute_rows,
)
from .stacking import SlotState, _CannotBatch, _Stack
from .stackstep import Views, _StackStepper

__all__ = ["StackedEngine", "stacked_refusal", "AUTO_OVERRIDE_VARIABLE", "AUTO_TIMED_STEPS",
           "STEP_MEMORY_BUDGET"]

# Environment variable fixing what engine="auto" picks ("stacked" or "per_shadow") instead of
# timing them (tests, and anyone who needs the same engine in every process).
AUTO_OVERRIDE_VARIABLE = "SGDSTAB_AUTO_ENGINE"
# Steps of each candidate timed by engine="auto", after one warm-up step each.
AUTO_TIMED_STEPS = 3
# Bytes of gradients and activations one stacked step may hold at once (estimated from the
# shapes): above it the slots are stepped a chunk at a time, at least one slot per chunk. 16 MiB
# keeps a 64-256-256-10 MLP at batch 32-128 (0.5-1.0 MB a slot, 10 slots) in one chunk, where
# batching slots pays (at batch 256, 1.7 MB a slot, it makes chunks of 9); a 1024-wide layer's
# gradient alone is 4 MiB a slot, and one product per slot is already a large one there.
STEP_MEMORY_BUDGET = 16 * 2**20

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

    def backward(self, grad: torch.Tensor, z: torch.Tensor, a: torch.Tensor) -> torch.Tensor:
        """The derivative through the activation, by torch's own backward kernels (the ones
        autograd uses), from its input ``z`` and output ``a``."""
        m, kind, aten = self.module, self.kind, torch.ops.aten
        if kind == "relu":
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


class _HandStepper(_StackStepper):
    """Per-slot gradients of a Linear/activation chain by batched products and a hand-written
    backward; hooks, verification and the update as ``_StackStepper``."""

    def __init__(self, main_model: nn.Module, main_optimizer: torch.optim.Optimizer,
                 loss_of: LossOf, skeleton: nn.Module, stepped: Sequence[str],
                 loss_fn: Callable[..., torch.Tensor]) -> None:
        super().__init__(main_model, main_optimizer, loss_of, skeleton, stepped)
        plan = _plan(main_model)
        assert not isinstance(plan, str), plan
        self.layers, self.flatten_first = plan
        self.loss_fn = loss_fn
        self.loss_kind = _known_loss(loss_fn)

    def gradients(self, stack: _Stack, group: StepGroup, constants: Mapping[str, torch.Tensor],
                  views: Callable[[], list[nn.Module]]
                  ) -> tuple[dict[str, torch.Tensor], torch.Tensor]:
        finite = torch.ones(len(stack.members), dtype=torch.bool)
        total: dict[str, torch.Tensor] | None = None
        for number, (batch, indices, rng_state) in enumerate(
                zip(group.batches, group.indices, group.rng_states)):
            if not isinstance(batch, (list, tuple)) or len(batch) != 2 or \
                    not all(isinstance(t, torch.Tensor) for t in batch):
                raise _CannotBatch("the batch is not an (inputs, targets) pair of tensors")
            hits = self._hits(stack, batch, indices)
            torch.set_rng_state(rng_state)   # dropout masks as the main run drew them
            gradients, losses = self._one_batch(stack.parameters, batch, hits)
            if not self.verified and number == 0:
                self._verify(views, batch, rng_state, gradients)
            finite &= torch.isfinite(losses)
            if total is None:
                total = gradients
            else:
                for name in total:
                    total[name] += gradients[name]
        assert total is not None
        return total, finite

    # -- a few slots at a time ----------------------------------------------------------------
    def chunk_size(self, stack: _Stack, group: StepGroup) -> int:
        """How many slots one chunk steps: as many as keep the chunk's gradients and saved
        activations (estimated from the shapes) within ``STEP_MEMORY_BUDGET``, at least one."""
        first = next(iter(stack.parameters.values()))
        size = first.element_size()
        gradients = sum(t[0].numel() for t in stack.parameters.values()) * size
        if len(group.batches) > 1:
            gradients *= 2   # the running sum over the batches and one batch's gradients
        widths = [stack.parameters[layer.weight].shape[1] for layer in self.layers
                  if isinstance(layer, _Linear)]
        # per row: each Linear output (or the activation overwriting it), each Dropout output,
        # two gradients of the widest layer in the backward, the slot's own input rows
        kept = sum(widths) + 2 * max(widths) + \
            sum(1 for layer in self.layers if isinstance(layer, _Dropout)) * max(widths)
        rows = max((_rows(batch) for batch in group.batches), default=0)
        fan_in = stack.parameters[self.layers[0].weight].shape[2] \
            if isinstance(self.layers[0], _Linear) else 0
        per_slot = gradients + rows * (kept + fan_in) * size
        return max(1, STEP_MEMORY_BUDGET // max(per_slot, 1))

    def step_in_chunks(self, stack: _Stack, group: StepGroup, views: Views
                       ) -> tuple[torch.Tensor, dict[int, SlotState]] | None:
        """Forward, backward and update of a few slots at a time (``chunk_size``), so the step
        holds one chunk's gradients and activations instead of every slot's. Every slot gets
        the values of the whole-stack step: each slot's products, loss and update read only its
        own tensors, the dropout masks are drawn once and shared, and the loss takes the same
        path in every chunk. None (step the whole stack) when one chunk holds every slot, for a
        loss evaluated slot by slot, or for targets that would take another loss path."""
        slots = len(stack.members)
        size = self.chunk_size(stack, group)
        if size >= slots or not self.loss_kind:
            return None
        prepared = []
        for batch, indices, rng_state in zip(group.batches, group.indices, group.rng_states):
            if not isinstance(batch, (list, tuple)) or len(batch) != 2 or \
                    not all(isinstance(t, torch.Tensor) for t in batch):
                return None   # the whole-stack path says why it cannot step it
            hits = self._hits(stack, batch, indices)
            targets = [batch[1], *(other[1] for _, other in hits.values())]
            if self.loss_kind == "cross_entropy" and not all(
                    t.dim() == 1 and not t.is_floating_point() and bool((t >= 0).all())
                    for t in targets):
                return None
            prepared.append((batch, hits, rng_state))
        finite = torch.ones(slots, dtype=torch.bool)
        held: dict[int, SlotState] = {}
        noises: dict[tuple[int, int], torch.Tensor | None] = {}
        pending: dict[tuple[str, str], Any] = {}
        for start in range(0, slots, size):
            stop = min(start + size, slots)
            try:
                parameters = {name: t[start:stop] for name, t in stack.parameters.items()}
                total: dict[str, torch.Tensor] | None = None
                for number, (batch, hits, rng_state) in enumerate(prepared):
                    mine = {j - start: hit for j, hit in hits.items() if start <= j < stop}
                    torch.set_rng_state(rng_state)
                    gradients, losses = self._one_batch(parameters, batch, mine,
                                                        (noises, number))
                    if not self.verified and number == 0 and start == 0:
                        self._verify(views, batch, rng_state, gradients)
                    finite[start:stop] &= torch.isfinite(losses)
                    if total is None:
                        total = gradients
                    else:
                        for name in total:
                            total[name] += gradients[name]
                    del gradients
                assert total is not None
                held.update(self.update_slots(stack, total, finite, start, stop, pending))
                del total
            except LockstepError:
                raise
            except Exception as error:
                if start == 0:
                    raise   # nothing is updated yet: the engine falls back as for a whole step
                raise LockstepError(
                    f"the stacked step failed at slot {start} after slots 0-{start - 1} were "
                    f"updated ({type(error).__name__}: {error})") from error
        self.finish_slots(stack, pending)
        return finite, held

    def _hits(self, stack: _Stack, batch: Any, indices: np.ndarray
              ) -> dict[int, tuple[np.ndarray, Any]]:
        """The slots whose swapped example is in the batch: its positions and their batch."""
        hits = {}
        for j, member in enumerate(stack.members):
            positions = np.flatnonzero(indices == member.spec.index)
            if positions.size:
                hits[j] = (positions, substitute_rows(batch, member.row, positions.tolist(),
                                                      len(indices)))
        return hits

    # -- one batch, all slots -----------------------------------------------------------------
    def _one_batch(self, parameters: Mapping[str, torch.Tensor], batch: Any,
                   hits: Mapping[int, tuple[np.ndarray, Any]],
                   shared: tuple[dict[tuple[int, int], torch.Tensor | None], int] | None = None
                   ) -> tuple[dict[str, torch.Tensor], torch.Tensor]:
        """Gradients and losses of the slots ``parameters`` hold. ``shared`` is a cache of the
        dropout masks by (batch number, layer) and this batch's number, when the slots are
        stepped a chunk at a time: the first chunk draws the masks, the others reuse them."""
        inputs, targets = batch
        rows = inputs.shape[0]
        first = self.layers[0]
        if not isinstance(first, _Linear):
            raise _CannotBatch("the model starts with an activation")  # pragma: no cover
        weight = parameters[first.weight]
        slots, width, fan_in = weight.shape
        x = inputs.reshape(rows, -1) if self.flatten_first else inputs
        if x.dim() != 2 or x.shape[1] != fan_in or x.dtype != weight.dtype:
            raise _CannotBatch(f"inputs of shape {tuple(inputs.shape)} and dtype {inputs.dtype} "
                               "do not meet the first Linear layer as a [batch, features] matrix")
        if hits:   # the slots whose swap is in the batch get their own input rows
            x = x.unsqueeze(0).repeat(slots, 1, 1)
            for j, (positions, other) in hits.items():
                own = other[0].reshape(rows, -1) if self.flatten_first else other[0]
                x[j, positions] = own[positions]
        else:
            x = x.unsqueeze(0).expand(slots, rows, fan_in)
        with torch.no_grad():
            # (input, output or noise) per layer; a Linear layer's output is not kept (its
            # backward reads its input only), so an activation whose derivative reads its output
            # alone (relu, tanh, sigmoid) overwrites that fresh output in place: one tensor per
            # hidden layer is held for the backward instead of two
            saved: list[tuple[torch.Tensor, Any] | None] = []
            a = x
            fresh = False   # whether ``a`` is a Linear output nothing else reads
            for position, layer in enumerate(self.layers):
                if isinstance(layer, _Linear):
                    out = torch.bmm(a, parameters[layer.weight].transpose(1, 2))
                    if layer.bias is not None:
                        out += parameters[layer.bias].unsqueeze(1)
                    saved.append((a, None))
                    a, fresh = out, True
                    continue
                if isinstance(layer, _Dropout):
                    if shared is None:
                        noise = layer.noise(a)
                    else:
                        masks, key = shared[0], (shared[1], position)
                        if key not in masks:
                            masks[key] = layer.noise(a)
                        noise = masks[key]
                    out = a if noise is None else a * noise
                    saved.append((a, noise))
                    a, fresh = out, False
                    continue
                out = layer.forward_in_place(a) if fresh else layer.forward(a)
                saved.append((a, out))
                a, fresh = out, False
        del x
        with torch.enable_grad():
            outputs = a.detach().requires_grad_(True)
            losses = self._losses(outputs, targets, hits, rows)
            (grad,) = torch.autograd.grad(losses.sum(), outputs)
        losses = losses.detach()
        gradients: dict[str, torch.Tensor] = {}
        with torch.no_grad():
            for number in range(len(self.layers) - 1, -1, -1):
                entry, saved[number] = saved[number], None   # freed once this layer is done
                assert entry is not None
                layer, (a_in, a_out) = self.layers[number], entry
                del entry
                if isinstance(layer, _Linear):
                    gradients[layer.weight] = torch.bmm(grad.transpose(1, 2), a_in)
                    if layer.bias is not None:
                        gradients[layer.bias] = grad.sum(1)
                    if number:
                        grad = torch.bmm(grad, parameters[layer.weight])
                elif isinstance(layer, _Dropout):
                    if a_out is not None:
                        grad = grad * a_out
                else:
                    grad = layer.backward(grad, a_in, a_out)
                del a_in, a_out
        return gradients, losses

    def _losses(self, outputs: torch.Tensor, targets: torch.Tensor,
                hits: Mapping[int, tuple[np.ndarray, Any]], rows: int) -> torch.Tensor:
        """Each slot's loss on its own targets (a vector over slots, differentiable)."""
        slots = outputs.shape[0]
        if hits:
            stacked = targets.unsqueeze(0).repeat(slots, *[1] * targets.dim())
            for j, (_, other) in hits.items():
                stacked[j] = other[1]
        else:
            stacked = targets.unsqueeze(0).expand(slots, *targets.shape)
        kind = self.loss_kind
        if kind == "cross_entropy" and targets.dim() == 1 and not targets.is_floating_point() \
                and bool((stacked >= 0).all()):
            per = F.cross_entropy(outputs.reshape(slots * rows, -1), stacked.reshape(-1),
                                  reduction="none")
            return per.view(slots, rows).mean(1)
        if kind == "mse" and targets.shape == outputs.shape[1:]:
            per = F.mse_loss(outputs, stacked, reduction="none")
            return per.reshape(slots, -1).mean(1)
        values = []
        for j in range(slots):
            value = self.loss_fn(outputs[j], stacked[j])
            if not isinstance(value, torch.Tensor) or value.numel() != 1:
                raise _CannotBatch("the loss is not a scalar tensor")
            values.append(value.reshape(()))
        return torch.stack(values)

    def _tune(self, group: dict[str, Any]) -> None:
        """The optimizer's foreach kernels over the stack where the user left the choice to
        torch."""
        _fastest_kernel(group)


def _rows(batch: Any) -> int:
    inputs = batch[0] if isinstance(batch, (list, tuple)) and batch else None
    return int(inputs.shape[0]) if isinstance(inputs, torch.Tensor) and inputs.dim() else 0


def _fastest_kernel(group: dict[str, Any]) -> None:
    """Let the stack's optimizer use its foreach kernels where the user's settings leave the
    choice to torch. Not the fused kernels, though faster (0.29 against 0.36-0.44 ms per
    SGD-with-momentum step of 9 stacked 64-256-256-10 MLPs, one thread): they did not round every
    slot alike (null swaps drifted 9e-10 from the reference), where foreach did."""
    if "foreach" in group and group["foreach"] is None and not group.get("fused") and \
            not group.get("differentiable", False):
        group["foreach"] = True


class StackedEngine(BatchedEngine):
    """Steps the forked shadows (and a no-swap reference) of a Linear/activation chain as
    stacked tensors with batched products and an explicit backward (module docstring).

    With ``auto=True`` the engine times itself against per-shadow stepping at the first step
    after the shadows fork and keeps the faster one (``choice`` says which and why)."""

    name = "stacked"

    def __init__(self, main_model: nn.Module, main_optimizer: torch.optim.Optimizer,
                 loss_of: LossOf, before_step: Callable[[nn.Module], Any] | None, *,
                 loss_fn: Callable[..., torch.Tensor], auto: bool = False) -> None:
        super().__init__(main_model, main_optimizer, loss_of, before_step)
        self.loss_fn = loss_fn
        self._stepper = _HandStepper(main_model, main_optimizer, loss_of, self._skeleton,
                                     self._stepped, loss_fn)
        self.auto = auto
        self.choice = ("stacked: engine='stacked' was asked for" if not auto else
                       "auto: not chosen yet (timed at the first step after the shadows fork)")
        self.decided = not auto
        self.pending_notes: list[str] = []

    # -- the auto choice ------------------------------------------------------------------------
    def step(self, shadows: Sequence[Shadow], group: StepGroup, step: int) -> list[Shadow]:
        if not self.decided and self.reference.forked and shadows and self._fallback is None:
            self._decide(group, step)
        return super().step(shadows, group, step)

    def _decide(self, group: StepGroup, step: int) -> None:
        self.decided = True
        runs = [s for s in self.shadows if s.spec.origin != "self"]
        override = os.environ.get(AUTO_OVERRIDE_VARIABLE, "").strip()
        if override in ("stacked", "per_shadow"):
            kind, why = override, f"set by the environment variable {AUTO_OVERRIDE_VARIABLE}"
        elif not runs:
            kind, why = "per_shadow", "no shadows remain after the null-swap audit"
        elif self.gradient_sync is not None:
            kind, why = "stacked", ("data-parallel run: not timed, so that every process makes "
                                    "the same choice")
        else:
            stacked_s, per_shadow_s, refused = self._time_candidates(group, step, runs)
            kind = "stacked" if stacked_s < per_shadow_s else "per_shadow"
            why = f"the stacked engine cannot step this run: {refused}" if refused else (
                f"timed on this run's batch with {torch.get_num_threads()} torch thread(s): "
                f"stacked {stacked_s * 1e3:.2f} ms per step for {len(runs)} shadow(s) and its "
                f"reference, per-shadow {per_shadow_s * 1e3:.2f} ms, medians of "
                f"{AUTO_TIMED_STEPS} steps after a warm-up")
        self.choice = f"{kind}: {why}"
        self.pending_notes.append(f"engine auto chose {self.choice}")
        if kind == "per_shadow":
            self.use_per_shadow()

    def _time_candidates(self, group: StepGroup, step: int, runs: Sequence[Shadow]
                         ) -> tuple[float, float, str]:
        """Seconds per step of the stacked engine over ``runs`` (plus a reference) and of the
        per-shadow engine over ``runs``, interleaved, on copies forked from the main run now:
        the run's own shadows are not touched, so the readings do not depend on the timing.
        The third value is why the stacked engine could not step this run ('' when it could)."""
        stacked = StackedEngine(self.main_model, self.main_optimizer, self.loss_of, None,
                                loss_fn=self.loss_fn)
        per_shadow = PerShadowEngine(self.main_model, self.main_optimizer, self.loss_of, None)
        trial = [stacked.add_shadow(NeighbourSpec(s.spec.index, None, s.spec.origin), s.row,
                                    s.label) for s in runs]
        # every run as its own model: one model stepped over and over would stay in the cache
        # and flatter per-shadow stepping (measured: chosen at batch 256, where it was slower)
        singles = [per_shadow.add_shadow(NeighbourSpec(s.spec.index, None, s.spec.origin),
                                         s.row, s.label) for s in runs]
        for shadow in trial:
            stacked.fork(shadow, step, group.buffers)
        for single in singles:
            per_shadow.fork(single, step, group.buffers)
        times: dict[str, list[float]] = {"stacked": [], "per_shadow": []}
        clock = time.perf_counter
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")   # the trial's own fallback is reported as the choice
            for round_ in range(AUTO_TIMED_STEPS + 1):
                order = (("stacked", stacked, trial), ("per_shadow", per_shadow, singles))
                for name, engine, members in order if round_ % 2 else order[::-1]:
                    start = clock()
                    engine.step(members, group, step)
                    if round_:
                        times[name].append(clock() - start)
                    if engine is stacked and stacked.fallback_reason is not None:
                        return math.inf, 0.0, stacked.fallback_reason
        return statistics.median(times["stacked"]), statistics.median(times["per_shadow"]), \
            ""

    def use_per_shadow(self) -> None:
        """Step every run one by one from now on (auto chose it, or a checkpoint made with it is
        loaded); no stacked step has been taken, so the runs move over exactly."""
        if self._fallback is not None:
            return
        if self._twin is not None:   # the audit itself is now stepped as the main run is
            self._twin_engine.remove_shadow(self._twin)
            self._twin = None
        self._switch()
        self.name = "per_shadow"

    def _switch(self) -> None:
        inner = PerShadowEngine(self.main_model, self.main_optimizer, self.loss_of,
                                self.before_step)
        inner.gradient_sync = self.gradient_sync
        states = {id(m): self._state_of(m) for m in self.shadows
                  if m.forked and self._has_state(m)}
        keep_reference = self.reference.forked and self._stepper.updates > 0
        assert not keep_reference, "the choice is made before any stacked step"
        self._stack = None
        for member in self.shadows:
            self._adopt(inner, member)
            if id(member) in states:
                self._load_into_module(member, states[id(member)], self._constants)
        inner.shadows = list(self.shadows)
        self.reference.forked = False
        self._fallback = inner

    # -- the choice travels with a checkpoint ---------------------------------------------------
    def shadow_state(self, shadow: Shadow) -> dict[str, Any]:
        state = super().shadow_state(shadow)
        state["engine_choice"] = self.choice if self.decided else None
        state["engine_kind"] = self.name if self.decided else None
        return state

    def load_shadow_state(self, shadow: Shadow, state: Mapping[str, Any]) -> None:
        kind = state.get("engine_kind")
        if kind is not None and not self.decided:
            self.decided = True
            self.choice = state["engine_choice"]
            if kind == "per_shadow":
                self.use_per_shadow()
        super().load_shadow_state(shadow, state)
