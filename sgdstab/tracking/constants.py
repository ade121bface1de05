"""Estimating the Lipschitz and smoothness constants of a model's per-example loss.

The ``Constants`` record itself lives in ``sgdstab.theory.constants`` (re-exported here).

The stability bounds of Hardt, Recht & Singer 2016 ("Train faster, generalize better") need the
per-example loss ``f(w; z)`` to be ``L``-Lipschitz and ``beta``-smooth in the parameters ``w``.
When the user cannot state them, this module estimates both from the model and a probe batch:

- ``L`` as the largest per-example gradient norm (``torch.func.vmap`` over ``torch.func.grad``);
- ``beta`` as the top Hessian eigenvalue, found by power iteration on Hessian-vector products.

Both estimates are LOWER and local: they see only the probe batch at the current parameters.
They are labelled ``source="estimated"`` and never presented as certified constants.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from typing import Any

import torch
from torch import nn
from torch.func import functional_call, grad, vmap

from ..theory.constants import LIPSCHITZ_FLOOR, SMOOTHNESS_FLOOR, Constants

__all__ = [
    "Constants",
    "LIPSCHITZ_FLOOR",
    "SMOOTHNESS_FLOOR",
    "estimate_constants",
    "estimate_lipschitz",
    "estimate_smoothness",
    "per_example_gradient_norms",
]

_CURVATURES = ("magnitude", "top")

LossFn = Callable[[Any, Any], torch.Tensor]
StepLoss = Callable[[nn.Module, Any], torch.Tensor]


def estimate_constants(
    cls: type[Constants],
    model: nn.Module,
    batch: Any,
    *,
    loss_fn: LossFn | None = None,
    step_loss: StepLoss | None = None,
    convex: bool = False,
    strong_convexity: float = 0.0,
    loss_bound: float | None = None,
    **kwargs: Any,
) -> Constants:
    """``Constants.estimate``: L and beta on ``batch`` (LOWER, local estimates; see above).

    ``cls``: the record to build (``Constants``).

    ``kwargs``: ``chunk_size`` (per-example gradients) and ``iterations``, ``tolerance``,
    ``per_example``, ``seed``, ``curvature`` (see ``estimate_smoothness``). Convexity, strong
    convexity and the loss bound cannot be measured here and are taken as declared. Since
    beta >= gamma for any gamma-strongly convex beta-smooth loss, the smoothness is raised to
    the declared gamma if the estimate falls below it; L is floored at ``LIPSCHITZ_FLOOR``.
    """
    allowed = {"chunk_size", "iterations", "tolerance", "per_example", "seed", "curvature"}
    unknown = set(kwargs) - allowed
    if unknown:
        raise TypeError(f"Constants.estimate got unexpected arguments: {sorted(unknown)}")
    chunk_size = kwargs.pop("chunk_size", 128)
    norms = per_example_gradient_norms(
        model, batch, loss_fn=loss_fn, step_loss=step_loss, chunk_size=chunk_size
    )
    lipschitz = float(norms.max())
    smoothness = _smoothness(
        model, batch, loss_fn=loss_fn, step_loss=step_loss, norms=norms, **kwargs
    )
    return cls(
        lipschitz=max(lipschitz, LIPSCHITZ_FLOOR),
        smoothness=max(smoothness, float(strong_convexity)),
        strong_convexity=strong_convexity,
        loss_bound=loss_bound,
        convex=convex,
        source="estimated",
    )



# ---------------------------------------------------------------------------------------------
# Batch structure: leaves, slicing, rebuilding
# ---------------------------------------------------------------------------------------------


def _flatten(batch: Any) -> tuple[list[Any], Callable[[list[Any]], Any]]:
    """Leaves of a nested tuple/list/dict batch and a function rebuilding it from new leaves."""
    if isinstance(batch, Mapping):
        keys = list(batch.keys())
        parts = [_flatten(batch[key]) for key in keys]
        kind: type[Any] = type(batch)

        def rebuild_mapping(leaves: list[Any]) -> Any:
            out, start = {}, 0
            for key, (sub, sub_rebuild) in zip(keys, parts, strict=True):
                out[key] = sub_rebuild(leaves[start : start + len(sub)])
                start += len(sub)
            return out if kind is dict else kind(out)

        return [leaf for sub, _ in parts for leaf in sub], rebuild_mapping
    if isinstance(batch, (tuple, list)):
        parts = [_flatten(item) for item in batch]
        is_namedtuple = isinstance(batch, tuple) and hasattr(batch, "_fields")
        kind = type(batch)

        def rebuild_sequence(leaves: list[Any]) -> Any:
            items, start = [], 0
            for sub, sub_rebuild in parts:
                items.append(sub_rebuild(leaves[start : start + len(sub)]))
                start += len(sub)
            if is_namedtuple:
                return kind(*items)
            return kind(items) if kind in (tuple, list) else tuple(items)

        return [leaf for sub, _ in parts for leaf in sub], rebuild_sequence
    return [batch], lambda leaves: leaves[0]


def _batched(leaf: Any) -> bool:
    return isinstance(leaf, torch.Tensor) and leaf.dim() >= 1


def _batch_size(leaves: list[Any]) -> int:
    sizes = {leaf.shape[0] for leaf in leaves if _batched(leaf)}
    if not sizes:
        raise ValueError("batch contains no tensor with a leading example dimension")
    if len(sizes) > 1:
        raise ValueError(f"batch tensors disagree on the number of examples: {sorted(sizes)}")
    size = sizes.pop()
    if size == 0:
        raise ValueError("batch is empty")
    return size


def _slice_leaves(leaves: list[Any], start: int, stop: int) -> list[Any]:
    return [leaf[start:stop] if _batched(leaf) else leaf for leaf in leaves]


# ---------------------------------------------------------------------------------------------
# The loss as a module of the model's parameters
# ---------------------------------------------------------------------------------------------


class _BatchLoss(nn.Module):
    """``forward(batch)`` = mean loss of ``inner`` on ``batch``, so ``functional_call`` applies."""

    def __init__(self, inner: nn.Module, loss_of_batch: StepLoss) -> None:
        super().__init__()
        self.inner = inner
        self._loss_of_batch = (loss_of_batch,)  # a tuple keeps a Module loss unregistered

    def forward(self, batch: Any) -> torch.Tensor:
        return self._loss_of_batch[0](self.inner, batch)


def _loss_module(
    model: nn.Module, loss_fn: LossFn | None, step_loss: StepLoss | None
) -> _BatchLoss:
    if (loss_fn is None) == (step_loss is None):
        raise ValueError("give exactly one of loss_fn and step_loss")
    if step_loss is not None:
        return _BatchLoss(model, step_loss)
    assert loss_fn is not None  # exactly one of the two was given

    def supervised(inner: nn.Module, batch: Any) -> torch.Tensor:
        inputs, targets = batch
        return loss_fn(inner(inputs), targets)

    return _BatchLoss(model, supervised)


def _trainable(wrapper: _BatchLoss) -> dict[str, torch.Tensor]:
    params = {name: p.detach() for name, p in wrapper.named_parameters() if p.requires_grad}
    if not params:
        raise ValueError("model has no trainable parameters (requires_grad=True)")
    return params


@contextmanager
def _evaluation(model: nn.Module) -> Iterator[None]:
    """Eval mode and saved RNG for the duration; every module's flag restored exactly after."""
    flags = [(module, module.training) for module in model.modules()]
    rng_state = torch.get_rng_state()
    model.eval()
    try:
        with torch.enable_grad():
            yield
    finally:
        for module, flag in flags:
            module.training = flag
        torch.set_rng_state(rng_state)


# ---------------------------------------------------------------------------------------------
# Per-example gradient norms and the Lipschitz estimate
# ---------------------------------------------------------------------------------------------


def _norms_vmap(
    wrapper: _BatchLoss, params: dict[str, torch.Tensor], leaves: list[Any],
    rebuild: Callable[[list[Any]], Any], n: int, chunk_size: int,
) -> torch.Tensor:
    mapped = [_batched(leaf) for leaf in leaves]
    in_dims = [0 if flag else None for flag in mapped]

    def example_norm(p: dict[str, torch.Tensor], example_leaves: list[Any]) -> torch.Tensor:
        one = [
            leaf.unsqueeze(0) if flag else leaf
            for leaf, flag in zip(example_leaves, mapped, strict=True)
        ]
        example = rebuild(one)
        grads = grad(lambda q: functional_call(wrapper, q, (example,)))(p)
        return torch.stack([g.pow(2).sum() for g in grads.values()]).sum().sqrt()

    batched_norm = vmap(example_norm, in_dims=(None, in_dims))
    out = [
        batched_norm(params, _slice_leaves(leaves, start, min(start + chunk_size, n)))
        for start in range(0, n, chunk_size)
    ]
    return torch.cat(out)


def _norms_loop(
    wrapper: _BatchLoss, params: dict[str, torch.Tensor], leaves: list[Any],
    rebuild: Callable[[list[Any]], Any], n: int,
) -> torch.Tensor:
    leaf_params = {name: p.clone().requires_grad_(True) for name, p in params.items()}
    inputs = list(leaf_params.values())
    out = []
    for i in range(n):
        example = rebuild(_slice_leaves(leaves, i, i + 1))
        loss = functional_call(wrapper, leaf_params, (example,))
        grads = torch.autograd.grad(loss, inputs, allow_unused=True)
        squares = [g.pow(2).sum() for g in grads if g is not None]
        total = torch.stack(squares).sum() if squares else loss.new_zeros(())
        out.append(total.sqrt().detach())
    return torch.stack(out)


def per_example_gradient_norms(
    model: nn.Module,
    batch: Any,
    *,
    loss_fn: LossFn | None = None,
    step_loss: StepLoss | None = None,
    chunk_size: int = 128,
) -> torch.Tensor:
    """``||grad_w f(w; z_i)||_2`` for every example of ``batch`` (1-D tensor, length n).

    Gradients over all trainable parameters flattened into one vector, in eval mode, via
    ``torch.func.vmap(grad(...))`` in chunks; falls back to one backward per example (with a
    warning) when vmap cannot trace the model. Model, buffers, ``.grad``, training flags and
    torch's global RNG state are left as they were.
    """
    if chunk_size < 1:
        raise ValueError(f"chunk_size must be >= 1, got {chunk_size!r}")
    wrapper = _loss_module(model, loss_fn, step_loss)
    leaves, rebuild = _flatten(batch)
    n = _batch_size(leaves)
    with _evaluation(model):
        params = _trainable(wrapper)
        try:
            norms = _norms_vmap(wrapper, params, leaves, rebuild, n, chunk_size)
        except Exception as error:  # vmap cannot trace every model; the loop can
            warnings.warn(
                f"per-example gradients: vmap failed ({type(error).__name__}: {error}); "
                "falling back to one backward pass per example",
                RuntimeWarning,
                stacklevel=2,
            )
            norms = _norms_loop(wrapper, params, leaves, rebuild, n)
    return norms.detach()


def estimate_lipschitz(
    model: nn.Module,
    batch: Any,
    *,
    loss_fn: LossFn | None = None,
    step_loss: StepLoss | None = None,
    chunk_size: int = 128,
) -> float:
    """Largest per-example gradient norm on ``batch`` at the current parameters (common practice).

    A LOWER estimate of the Lipschitz constant L: the true L is a supremum over all examples
    and all parameters the iterates visit, of which this sees one batch at one point.
    """
    norms = per_example_gradient_norms(
        model, batch, loss_fn=loss_fn, step_loss=step_loss, chunk_size=chunk_size
    )
    return float(norms.max())


# ---------------------------------------------------------------------------------------------
# Hessian-vector products and the smoothness estimate
# ---------------------------------------------------------------------------------------------


def _hessian_vector_product(
    wrapper: _BatchLoss, params: dict[str, torch.Tensor], batch: Any
) -> Callable[[torch.Tensor], torch.Tensor]:
    """``v -> H v`` for the Hessian of the loss on ``batch`` (autograd double backward).

    The gradient graph is built once and reused for every product.
    """
    leaf_params = {name: p.clone().requires_grad_(True) for name, p in params.items()}
    inputs = list(leaf_params.values())
    shapes = [p.shape for p in inputs]
    sizes = [p.numel() for p in inputs]
    loss = functional_call(wrapper, leaf_params, (batch,))
    grads = torch.autograd.grad(loss, inputs, create_graph=True, allow_unused=True)
    live = [i for i, g in enumerate(grads) if g is not None and g.requires_grad]

    def product(vector: torch.Tensor) -> torch.Tensor:
        if not live:  # the gradient does not depend on the parameters: zero Hessian
            return torch.zeros_like(vector)
        blocks = [b.reshape(s) for b, s in zip(vector.split(sizes), shapes, strict=True)]
        parts = torch.autograd.grad(
            [grads[i] for i in live],
            inputs,
            grad_outputs=[blocks[i] for i in live],
            retain_graph=True,
            allow_unused=True,
        )
        flat = [
            torch.zeros(size, dtype=vector.dtype) if part is None else part.reshape(-1)
            for part, size in zip(parts, sizes, strict=True)
        ]
        return torch.cat(flat).detach()

    return product


def _power_iteration(
    product: Callable[[torch.Tensor], torch.Tensor],
    start: torch.Tensor,
    shift: float,
    iterations: int,
    tolerance: float,
    radius_only: bool = False,
) -> tuple[float, float, bool]:
    """Power iteration on ``H - shift I``; returns (Rayleigh quotient of H, ||H v||, converged).

    Converged when the residual ``||(H - shift I) v - theta v|| <= tolerance * |theta|``: for a
    symmetric matrix some eigenvalue then lies within ``tolerance * |theta|`` of theta (residual
    bound for symmetric eigenproblems, common practice). With ``radius_only`` (and no shift) the
    same test is applied to H^2 and ``||H v||^2``, which settles even when +rho and -rho tie.
    """
    vector = start / start.norm()
    theta, radius, converged = 0.0, 0.0, False
    previous: tuple[torch.Tensor, float] | None = None
    for _ in range(iterations):
        hv = product(vector)
        image = hv - shift * vector
        theta = float(vector @ image)
        radius = float(hv.norm())
        if float((image - theta * vector).norm()) <= tolerance * abs(theta):
            converged = True
            break
        if radius_only and previous is not None:
            # H^2 v_prev = r_prev * H v and v_prev . H^2 v_prev = r_prev^2
            before, r_before = previous
            if float((hv - r_before * before).norm()) <= tolerance * r_before:
                converged = True
                break
        size = image.norm()
        if size == 0:  # vector lies in the null space of the shifted operator
            converged = True
            break
        previous = (vector, radius)
        vector = image / size
    return theta + shift, radius, converged


def _curvature(
    product: Callable[[torch.Tensor], torch.Tensor],
    dim: int,
    dtype: torch.dtype,
    generator: torch.Generator,
    iterations: int,
    tolerance: float,
    curvature: str,
) -> float:
    """Largest |eigenvalue| ("magnitude") or largest eigenvalue ("top") of H, from below.

    Power iteration finds the largest-|lambda| eigenvalue; ``||H v||`` (unit v) never exceeds
    ``max |lambda|``. For "top": if the dominant eigenvalue comes out negative (or the iteration
    does not settle), run again on ``H + rho I`` with ``rho = ||H v||`` (equal to -lambda for a
    converged dominant negative eigenvalue), whose top eigenvalue is ``lambda_max + rho``. Each
    pass yields a Rayleigh quotient of H, which never exceeds lambda_max; the larger is kept.
    """
    magnitude = curvature == "magnitude"
    start = torch.randn(dim, generator=generator, dtype=torch.float64).to(dtype)
    theta, radius, converged = _power_iteration(
        product, start, 0.0, iterations, tolerance, radius_only=magnitude
    )
    if magnitude:
        return radius
    if converged and theta >= 0:
        return theta
    start = torch.randn(dim, generator=generator, dtype=torch.float64).to(dtype)
    shifted, _, _ = _power_iteration(product, start, -radius, iterations, tolerance)
    return max(theta, shifted)


def _smoothness(
    model: nn.Module,
    batch: Any,
    *,
    loss_fn: LossFn | None,
    step_loss: StepLoss | None,
    norms: torch.Tensor | None,
    iterations: int = 100,
    tolerance: float = 1e-4,
    per_example: int = 8,
    seed: int = 0,
    curvature: str = "magnitude",
) -> float:
    if curvature not in _CURVATURES:
        raise ValueError(f"curvature must be one of {_CURVATURES}, got {curvature!r}")
    if iterations < 1:
        raise ValueError(f"iterations must be >= 1, got {iterations!r}")
    if not tolerance > 0:
        raise ValueError(f"tolerance must be > 0, got {tolerance!r}")
    if per_example < 0:
        raise ValueError(f"per_example must be >= 0, got {per_example!r}")
    wrapper = _loss_module(model, loss_fn, step_loss)
    leaves, rebuild = _flatten(batch)
    n = _batch_size(leaves)
    if per_example > 0 and norms is None:
        norms = per_example_gradient_norms(model, batch, loss_fn=loss_fn, step_loss=step_loss)
    generator = torch.Generator().manual_seed(seed)
    with _evaluation(model):
        params = _trainable(wrapper)
        dim = sum(p.numel() for p in params.values())
        dtype = next(iter(params.values())).dtype

        def top(sub_batch: Any) -> float:
            product = _hessian_vector_product(wrapper, params, sub_batch)
            return _curvature(
                product, dim, dtype, generator, iterations, tolerance, curvature
            )

        best = top(batch)
        if per_example > 0:
            assert norms is not None
            chosen = torch.argsort(norms, descending=True, stable=True)[: min(per_example, n)]
            for i in chosen.tolist():
                best = max(best, top(rebuild(_slice_leaves(leaves, i, i + 1))))
    return max(best, SMOOTHNESS_FLOOR)


def estimate_smoothness(
    model: nn.Module,
    batch: Any,
    *,
    loss_fn: LossFn | None = None,
    step_loss: StepLoss | None = None,
    iterations: int = 100,
    tolerance: float = 1e-4,
    per_example: int = 8,
    seed: int = 0,
    curvature: str = "magnitude",
) -> float:
    """Local curvature of the loss on ``batch`` from its Hessian, an estimate of beta.

    ``curvature="magnitude"`` (default): the largest |eigenvalue|, i.e. the Hessian's spectral
    norm, which is what beta-smoothness (gradient beta-Lipschitz) bounds and what the non-convex
    expansivity ``1 + alpha*beta`` (Hardt, Recht & Singer 2016) needs when negative curvature
    dominates. ``curvature="top"``: the most positive eigenvalue lambda_max (same thing for a
    convex loss). The larger of the value for (a) the mean-loss Hessian over ``batch`` and (b) the
    per-example Hessians of the ``per_example`` examples with the largest gradient norms (0
    disables b). Power iteration on Hessian-vector products (autograd double backward), at most
    ``iterations`` steps per pass, stopping at relative residual ``tolerance``; a dominant
    negative eigenvalue is handled by a shifted second pass. A LOWER, local estimate: beta bounds
    the curvature everywhere, this sees one batch at one point, and neither a Rayleigh quotient
    nor ``||H v||`` exceeds the quantity sought. Never below ``SMOOTHNESS_FLOOR`` (1e-12), so a
    flat loss still gives valid ``Constants``. ``seed`` drives a private generator.
    """
    return _smoothness(
        model,
        batch,
        loss_fn=loss_fn,
        step_loss=step_loss,
        norms=None,
        iterations=iterations,
        tolerance=tolerance,
        per_example=per_example,
        seed=seed,
        curvature=curvature,
    )
