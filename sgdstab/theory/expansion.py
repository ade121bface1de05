"""Expansivity of one SGD step: the factor eta_t by which a step may stretch two runs' distance.

HRS 2016 Sec. 2-3 (statements from memory; provenance as in sgdstab.theory.bounds). Pure functions
of numpy arrays; numpy and the standard library only, no torch. Re-exported by
sgdstab.theory.divergence, whose recursions use the factors.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .bounds import _optional_positive, _positive, _step_sizes

__all__ = ["expansion_convex", "expansion_strongly_convex", "expansion_smooth"]


def expansion_convex(
    step_sizes: Sequence[float] | np.ndarray, smoothness: float | None
) -> np.ndarray:
    """eta_t = 1.

    Source: HRS 2016, expansivity of the gradient update (statement from memory).
    Assumes f(.; z) convex and beta-smooth with alpha_t <= 2/beta; not checked here (check_regime).
    """
    _optional_positive("smoothness", smoothness)
    return np.ones_like(_step_sizes(step_sizes))


def expansion_strongly_convex(
    step_sizes: Sequence[float] | np.ndarray, smoothness: float | None, strong_convexity: float
) -> np.ndarray:
    """eta_t = 1 - alpha_t * gamma.

    Source: a rescaling argument (f = h + gamma/2 ||w||^2, h convex and (beta - gamma)-smooth);
    HRS 2016 state the weaker factor 1 - alpha beta gamma / (beta + gamma) (statement from memory).
    Assumes gamma-strongly convex, beta-smooth, alpha_t <= 2/(beta + gamma); not checked here.
    """
    _optional_positive("smoothness", smoothness)
    gamma = _positive("strong_convexity", strong_convexity)
    return 1.0 - _step_sizes(step_sizes) * gamma


def expansion_smooth(step_sizes: Sequence[float] | np.ndarray, smoothness: float) -> np.ndarray:
    """eta_t = 1 + alpha_t * beta.

    Source: HRS 2016, expansivity of the gradient update (statement from memory).
    Assumes only beta-smoothness (no convexity); holds for every step size.
    """
    return 1.0 + _step_sizes(step_sizes) * _positive("smoothness", smoothness)


def _expansion_for(regime: str, a: np.ndarray, beta: float, gamma: float) -> np.ndarray:
    if regime == "convex":
        return expansion_convex(a, beta)
    if regime == "strongly_convex":
        return expansion_strongly_convex(a, beta, gamma)
    return expansion_smooth(a, beta)
