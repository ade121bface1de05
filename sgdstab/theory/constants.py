"""The constants of the per-example loss that the SGD stability bounds need, as a record.

Declared by the user or estimated from a model (``Constants.estimate``, which runs the torch
estimators of ``sgdstab.tracking.constants``); this module itself needs no torch.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from typing import Any

__all__ = ["Constants", "LIPSCHITZ_FLOOR", "SMOOTHNESS_FLOOR"]

#: Smallest value ``estimate_smoothness`` returns, so that a flat loss (zero curvature on the
#: probe batch) still yields a valid ``Constants`` (smoothness must be > 0).
SMOOTHNESS_FLOOR = 1e-12
#: Same floor for the Lipschitz estimate inside ``Constants.estimate`` (all gradients zero).
LIPSCHITZ_FLOOR = 1e-12

_SOURCES = ("declared", "estimated")


def _finite_float(name: str, value: Any) -> float:
    if isinstance(value, bool):
        raise ValueError(f"{name} must be a real number, got {value!r}")
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a real number, got {value!r}") from None
    if not math.isfinite(number):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return number


@dataclass(frozen=True)
class Constants:
    """Constants of the per-example loss ``f(w; z)`` used by the SGD stability bounds.

    ``lipschitz`` L (``||grad f|| <= L``), ``smoothness`` beta (gradient beta-Lipschitz),
    ``strong_convexity`` gamma (only with ``convex=True``), ``loss_bound`` M (``f`` in ``[0, M]``),
    ``source`` "declared" (stated by the user) or "estimated" (measured by ``estimate``).
    Notation of Hardt, Recht & Singer 2016, Sec. 2.
    """

    lipschitz: float
    smoothness: float
    strong_convexity: float = 0.0
    loss_bound: float | None = None
    convex: bool = False
    source: str = "declared"

    def __post_init__(self) -> None:
        lipschitz = _finite_float("lipschitz", self.lipschitz)
        if lipschitz <= 0:
            raise ValueError(f"lipschitz must be > 0, got {self.lipschitz!r}")
        smoothness = _finite_float("smoothness", self.smoothness)
        if smoothness <= 0:
            raise ValueError(f"smoothness must be > 0, got {self.smoothness!r}")
        if not isinstance(self.convex, bool):
            raise ValueError(f"convex must be a bool, got {self.convex!r}")
        strong_convexity = _finite_float("strong_convexity", self.strong_convexity)
        if strong_convexity < 0:
            raise ValueError(f"strong_convexity must be >= 0, got {self.strong_convexity!r}")
        if strong_convexity > 0 and not self.convex:
            raise ValueError(
                f"strong_convexity={self.strong_convexity!r} > 0 requires convex=True"
            )
        if strong_convexity > smoothness:
            raise ValueError(
                f"strong_convexity={self.strong_convexity!r} exceeds "
                f"smoothness={self.smoothness!r}"
            )
        loss_bound = None
        if self.loss_bound is not None:
            loss_bound = _finite_float("loss_bound", self.loss_bound)
            if loss_bound <= 0:
                raise ValueError(f"loss_bound must be None or > 0, got {self.loss_bound!r}")
        if self.source not in _SOURCES:
            raise ValueError(f"source must be one of {_SOURCES}, got {self.source!r}")
        object.__setattr__(self, "lipschitz", lipschitz)
        object.__setattr__(self, "smoothness", smoothness)
        object.__setattr__(self, "strong_convexity", strong_convexity)
        object.__setattr__(self, "loss_bound", loss_bound)

    @property
    def regime(self) -> str:
        """"strongly_convex" (convex, gamma > 0), "convex" or "nonconvex"."""
        if not self.convex:
            return "nonconvex"
        return "strongly_convex" if self.strong_convexity > 0 else "convex"

    def with_weight_decay(self, weight_decay: float, *, radius: float | None = None) -> Constants:
        """Constants of ``f + lambda/2 ||w||^2`` (SGD's ``weight_decay=lambda``; HRS 2016 Sec. 2).

        Smoothness grows by lambda; strong convexity grows by lambda when the loss is convex.
        The gradient gains ``lambda * w``: with ``radius`` R (a bound on ``||w||`` over the
        iterates) the Lipschitz constant grows by ``lambda * R``; without it L is left as is.
        """
        decay = _finite_float("weight_decay", weight_decay)
        if decay < 0:
            raise ValueError(f"weight_decay must be >= 0, got {weight_decay!r}")
        lipschitz = self.lipschitz
        if radius is not None:
            bound = _finite_float("radius", radius)
            if bound < 0:
                raise ValueError(f"radius must be >= 0, got {radius!r}")
            lipschitz += decay * bound
        return Constants(
            lipschitz=lipschitz,
            smoothness=self.smoothness + decay,
            strong_convexity=self.strong_convexity + decay if self.convex else 0.0,
            loss_bound=self.loss_bound,
            convex=self.convex,
            source=self.source,
        )

    def merged_max(self, other: Constants) -> Constants:
        """Running maxima of L and beta over two readings (re-estimation along the trajectory).

        Both must agree on ``convex``. The smaller strong convexity and the larger loss bound
        are kept (the weaker assumption); the result is "estimated" if either input is.
        """
        if not isinstance(other, Constants):
            raise TypeError(f"merged_max expects Constants, got {type(other).__name__}")
        if other.convex != self.convex:
            raise ValueError(
                f"cannot merge constants with convex={self.convex} and convex={other.convex}"
            )
        if self.loss_bound is None:
            loss_bound = other.loss_bound
        elif other.loss_bound is None:
            loss_bound = self.loss_bound
        else:
            loss_bound = max(self.loss_bound, other.loss_bound)
        estimated = "estimated" in (self.source, other.source)
        return Constants(
            lipschitz=max(self.lipschitz, other.lipschitz),
            smoothness=max(self.smoothness, other.smoothness),
            strong_convexity=min(self.strong_convexity, other.strong_convexity),
            loss_bound=loss_bound,
            convex=self.convex,
            source="estimated" if estimated else "declared",
        )

    def to_dict(self) -> dict[str, Any]:
        """Plain dict of the fields (JSON-serialisable); ``from_dict`` inverts it."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Constants:
        """Rebuild from ``to_dict`` output; unknown keys are a ValueError."""
        known = {f.name for f in fields(cls)}
        unknown = set(data) - known
        if unknown:
            raise ValueError(f"unknown Constants fields: {sorted(unknown)}")
        return cls(**dict(data))

    @classmethod
    def estimate(cls, model: Any, batch: Any, **options: Any) -> Constants:
        """Estimate L and beta of ``model``'s per-example loss on ``batch`` (LOWER, local).

        Runs ``sgdstab.tracking.constants.estimate_constants`` (torch), whose keywords it takes:
        ``loss_fn`` or ``step_loss``, the declared ``convex``, ``strong_convexity`` and
        ``loss_bound``, and the estimators' ``chunk_size``, ``iterations``, ``tolerance``,
        ``per_example``, ``seed``, ``curvature``.
        """
        from ..tracking.constants import estimate_constants  # torch, loaded only when estimating

        return estimate_constants(cls, model, batch, **options)
