"""The stacked engine's step: batched products forward, the backward written out by hand, one
optimizer step over the stacked tensors, a chunk of slots at a time within ``STEP_MEMORY_BUDGET``.

Used by ``shadows.stacked.StackedEngine`` (which re-exports ``STEP_MEMORY_BUDGET``).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from .chain import _Activation, _Dropout, _known_loss, _Linear, _plan
from .lockstep import (
    LockstepError,
    LossOf,
    StepGroup,
    substitute_rows,
)
from .stacking import SlotState, _CannotBatch, _Stack, _summed
from .stackloss import losses_and_gradient
from .stackstep import Views, _StackStepper

__all__ = ["STEP_MEMORY_BUDGET"]

# Bytes of gradients and activations one stacked step may hold at once (estimated from the
# shapes): above it the slots are stepped a chunk at a time, at least one slot per chunk. 16 MiB
# keeps a 64-256-256-10 MLP at batch 32-128 (0.5-1.0 MB a slot, 10 slots) in one chunk, where
# batching slots pays (at batch 256, 1.7 MB a slot, it makes chunks of 9); a 1024-wide layer's
# gradient alone is 4 MiB a slot, and one product per slot is already a large one there.
STEP_MEMORY_BUDGET = 16 * 2**20


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
        # the step's large intermediates, kept from step to step (``_kept``)
        self._workspace: dict[tuple[str, int], torch.Tensor] = {}

    def gradients(self, stack: _Stack, group: StepGroup, constants: Mapping[str, torch.Tensor],
                  views: Callable[[], list[nn.Module]]
                  ) -> tuple[dict[str, torch.Tensor], torch.Tensor]:
        finite = torch.ones(len(stack.members), dtype=torch.bool)
        total: dict[str, torch.Tensor] | None = None
        # one batch per step (no running sum to keep apart) within the step's memory budget
        keep = len(group.batches) == 1 and self.chunk_size(stack, group) >= len(stack.members)
        if not keep:
            self._workspace.clear()
        for number, (batch, rng_state) in enumerate(zip(group.batches, group.rng_states)):
            if not isinstance(batch, (list, tuple)) or len(batch) != 2 or \
                    not all(isinstance(t, torch.Tensor) for t in batch):
                raise _CannotBatch("the batch is not an (inputs, targets) pair of tensors")
            hits = self._hits(stack, group, number)
            torch.set_rng_state(rng_state)   # dropout masks as the main run drew them
            gradients, losses = self._one_batch(stack.parameters, batch, hits, keep=keep)
            if not self.verified and number == 0:
                self._verify(views, batch, rng_state, gradients)
            finite &= torch.isfinite(losses)
            total = _summed(total, gradients)
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
        for number, (batch, rng_state) in enumerate(zip(group.batches, group.rng_states)):
            if not isinstance(batch, (list, tuple)) or len(batch) != 2 or \
                    not all(isinstance(t, torch.Tensor) for t in batch):
                return None   # the whole-stack path says why it cannot step it
            hits = self._hits(stack, group, number)
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
                    total = _summed(total, gradients)
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

    def _hits(self, stack: _Stack, group: StepGroup, number: int
              ) -> dict[int, tuple[np.ndarray, Any]]:
        """The slots whose swapped example is in batch ``number`` of the group: its positions
        and their batch."""
        batch, rows = group.batches[number], len(group.indices[number])
        hits = {}
        for j, member in enumerate(stack.members):
            positions = group.positions(number, member.spec.index)
            if positions:
                hits[j] = (np.asarray(positions),
                           substitute_rows(batch, member.row, positions, rows))
        return hits

    # -- one batch, all slots -----------------------------------------------------------------
    def _one_batch(self, parameters: Mapping[str, torch.Tensor], batch: Any,
                   hits: Mapping[int, tuple[np.ndarray, Any]],
                   shared: tuple[dict[tuple[int, int], torch.Tensor | None], int] | None = None,
                   keep: bool = False) -> tuple[dict[str, torch.Tensor], torch.Tensor]:
        """Gradients and losses of the slots ``parameters`` hold. ``shared`` is a cache of the
        dropout masks by (batch number, layer) and this batch's number, when the slots are
        stepped a chunk at a time: the first chunk draws the masks, the others reuse them.
        ``keep``: the products and the dropout outputs go into tensors kept for the next step
        (``_kept``), and the gradients returned are those tensors: they hold until then."""
        place = self._kept if keep else _fresh
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
                    weight = parameters[layer.weight]
                    out = _affine(a, layer, parameters, place(
                        "out", position, (slots, rows, weight.shape[1]), weight))
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
                    out = a if noise is None else \
                        torch.mul(a, noise, out=place("drop", position, a.shape, a))
                    saved.append((a, noise))
                    a, fresh = out, False
                    continue
                out = layer.forward_in_place(a) if fresh else layer.forward(a)
                saved.append((a, out))
                a, fresh = out, False
        del x
        losses, grad = losses_and_gradient(self.loss_kind, self.loss_fn, a, targets, hits)
        gradients: dict[str, torch.Tensor] = {}
        with torch.no_grad():
            for number in range(len(self.layers) - 1, -1, -1):
                entry, saved[number] = saved[number], None   # freed once this layer is done
                assert entry is not None
                layer, (a_in, a_out) = self.layers[number], entry
                del entry
                if isinstance(layer, _Linear):
                    weight = parameters[layer.weight]
                    gradients[layer.weight] = torch.bmm(
                        grad.transpose(1, 2), a_in,
                        out=place("weight", number, weight.shape, weight))
                    if layer.bias is not None:
                        gradients[layer.bias] = grad.sum(1)
                    if number:
                        grad = torch.bmm(grad, weight, out=place(
                            "input", number, (slots, rows, weight.shape[2]), weight))
                elif isinstance(layer, _Dropout):
                    if a_out is not None:   # ``grad`` is this step's own: scaled in place
                        grad = grad.mul_(a_out)
                else:
                    grad = layer.backward(grad, a_in, a_out, in_place=True)
                del a_in, a_out
        return gradients, losses

    def _kept(self, kind: str, position: int, shape: Sequence[int], like: torch.Tensor
              ) -> torch.Tensor:
        """A tensor for one of the step's large intermediates, kept from step to step. Made
        afresh each step, tensors this size went back to the system when freed and were mapped
        in anew, page by page, at the next step (measured at batch 128, 9 runs: with glibc told
        to keep freed memory, the same step took 15 against 18 ms, the products included)."""
        found = self._workspace.get((kind, position))
        if found is None or found.shape != tuple(shape) or found.dtype != like.dtype:
            found = self._workspace[(kind, position)] = torch.empty(shape, dtype=like.dtype)
        return found

    # -- evaluation -----------------------------------------------------------------------------
    def evaluate(self, parameters: Mapping[str, torch.Tensor], batch: Any) -> np.ndarray | None:
        """Every slot's per-example loss on ``batch`` in evaluation mode (dropout off), as
        ``loss_fn(outputs, targets, reduction="none")`` gives it row by row: a [slots, rows]
        float64 array. Products a chunk of slots at a time within ``STEP_MEMORY_BUDGET``. None
        when the batch or the loss does not suit the stacked forward."""
        if not self.loss_kind or not isinstance(batch, (list, tuple)) or len(batch) != 2 or \
                not all(isinstance(t, torch.Tensor) for t in batch):
            return None
        inputs, targets = batch
        rows = inputs.shape[0] if inputs.dim() else 0
        first = parameters[self.layers[0].weight] if isinstance(self.layers[0], _Linear) \
            else None
        if first is None or rows == 0:
            return None
        x = inputs.reshape(rows, -1) if self.flatten_first else inputs
        if x.dim() != 2 or x.shape[1] != first.shape[2] or x.dtype != first.dtype:
            return None
        if self.loss_kind == "cross_entropy" and not (
                targets.dim() == 1 and not targets.is_floating_point() and
                bool((targets >= 0).all())):
            return None
        slots = first.shape[0]
        widths = [parameters[layer.weight].shape[1] for layer in self.layers
                  if isinstance(layer, _Linear)]
        # a product's input and output are held at once, within an eighth of the step's
        # budget: a 1024-wide layer's runs are then evaluated one at a time, as before (the
        # whole budget here raised the 1024-wide benchmark's peak by 18 MB, a quarter by 3 MB)
        size = max(1, STEP_MEMORY_BUDGET // 8 //
                   max(1, 2 * rows * max(widths) * x.element_size()))
        parts = []
        with torch.no_grad():
            for start in range(0, slots, size):
                a = x.unsqueeze(0).expand(min(size, slots - start), rows, x.shape[1])
                mine = {name: t[start:start + size] for name, t in parameters.items()}
                fresh = False   # whether ``a`` is a product nothing else reads
                for layer in self.layers:
                    if isinstance(layer, _Linear):
                        a, fresh = _affine(a, layer, mine), True
                    elif isinstance(layer, _Activation):
                        a = layer.forward_in_place(a) if fresh else layer.forward(a)
                outputs = a
                count = outputs.shape[0]
                if self.loss_kind == "cross_entropy":
                    per = F.cross_entropy(outputs.reshape(count * rows, -1),
                                          targets.repeat(count), reduction="none")
                elif targets.shape == outputs.shape[1:]:
                    per = F.mse_loss(outputs, targets.unsqueeze(0).expand_as(outputs),
                                     reduction="none")
                else:
                    return None
                parts.append(per.reshape(count, rows, -1).double().mean(dim=2))
        return torch.cat(parts).numpy()

    def _tune(self, group: dict[str, Any]) -> None:
        """The optimizer's foreach kernels over the stack where the user left the choice to
        torch."""
        _fastest_kernel(group)


def _affine(a: torch.Tensor, layer: _Linear, parameters: Mapping[str, torch.Tensor],
            out: torch.Tensor | None = None) -> torch.Tensor:
    """A Linear layer over every slot: one batched product, then the bias added in place
    (``out``: where the product goes)."""
    result = torch.bmm(a, parameters[layer.weight].transpose(1, 2), out=out)
    if layer.bias is not None:
        result += parameters[layer.bias].unsqueeze(1)
    return result


def _fresh(kind: str, position: int, shape: Sequence[int], like: torch.Tensor) -> None:
    """No kept tensor: the operation allocates its result (``_HandStepper._kept``'s
    stand-in when the step keeps nothing)."""
    return None


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
