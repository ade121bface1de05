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

from typing import Any

from torch import nn

from ..theory.constants import LIPSCHITZ_FLOOR, SMOOTHNESS_FLOOR, Constants
from .batch_loss import LossFn, StepLoss
from .lipschitz import estimate_lipschitz, per_example_gradient_norms
from .smoothness import _smoothness, estimate_smoothness

__all__ = [
    "Constants",
    "LIPSCHITZ_FLOOR",
    "SMOOTHNESS_FLOOR",
    "estimate_constants",
    "estimate_lipschitz",
    "estimate_smoothness",
    "per_example_gradient_norms",
]

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



