"""The smoothness estimate: Hessian-vector products and power iteration (torch.func).

The top Hessian eigenvalue over a probe batch, a LOWER and local estimate of beta (see
``sgdstab.tracking.constants``, which re-exports ``estimate_smoothness``).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import torch
from torch import nn
from torch.func import functional_call

from ..theory.constants import SMOOTHNESS_FLOOR
from .batch_loss import (
    LossFn,
    StepLoss,
    _batch_size,
    _BatchLoss,
    _evaluation,
    _flatten,
    _loss_module,
    _slice_leaves,
    _trainable,
)
from .lipschitz import per_example_gradient_norms

_CURVATURES = ("magnitude", "top")

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
