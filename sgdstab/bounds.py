"""Published stability bounds for SGD, their high-probability conversion, and a planner.

Pure functions of numpy arrays; imports only numpy, scipy and the standard library, so it loads
without torch. No function writes into its arguments. Notation follows /work/shared/SCIENCE.md:
step t (counted from 1) has step size alpha_t and batch size b_t, n training examples, the loss is
L-Lipschitz, beta-smooth, optionally gamma-strongly convex, with values in [0, M].

Provenance (what was checked with the search tool, and what is from memory):
- Hardt, Recht & Singer 2016, "Train faster, generalize better: stability of stochastic gradient
  descent": the theorem statements used here are FROM MEMORY. The stored copies of the paper
  (arXiv 1509.01240 on arxiv-vanity / ar5iv) came back only as their opening pages, not the
  theorem bodies, so theorem numbers are not given. A secondary restatement found with the search
  tool (zhenhuan-yang.github.io, "Algorithmic stability of SGD", 2020) agrees with the convex
  recursion (alpha_t <= 2/beta, increments 2 alpha_t L / n), the strongly convex one
  (alpha <= 1/beta, factor 1 - alpha gamma, limit 2L/(gamma n) on the divergence), the non-convex
  t0 lemma and the choice of t0 behind the non-convex closed form. The tests re-derive each
  closed form by hand.
- Bousquet & Elisseeff 2002 (JMLR 2, "Stability and generalization"), Thm 12 form
  2 beta + (4 n beta + M) sqrt(ln(1/delta) / (2n)): agrees with the restatement of that theorem in
  Zhou, "Machine Learning", Thm 12.8, found with the search tool.
- The McDiarmid form of SCIENCE.md §3 is derived in high_probability_gap's comment.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

REGIMES = ("convex", "strongly_convex", "nonconvex")
TARGET_BOUNDS = ("stability", "high_probability")
SCHEDULE_KINDS = ("constant", "step-decay", "cosine", "c-over-t")

HRS = 'Hardt, Recht & Singer 2016, "Train faster, generalize better"'
FROM_MEMORY = "(statement from memory)"
BOUSQUET_ELISSEEFF = 'Bousquet & Elisseeff 2002, "Stability and generalization", Thm 12'
MCDIARMID = "McDiarmid's bounded-differences inequality on the gap (SCIENCE.md §3)"

_RTOL = 1e-12  # step-size conditions are checked up to this relative round-off
_PLAIN_SGD = "plain SGD (no momentum, no adaptive step sizes)"
_SAMPLING = "the swapped index is in step t's batch b_t/n times on average (uniform sampling)"


@dataclass(frozen=True)
class Bound:
    """A published bound evaluated on given inputs, with its source and assumptions."""

    value: float | None  # None when not applicable
    applicable: bool
    reason: str  # why not applicable ('' when applicable)
    source: str
    assumptions: tuple[str, ...]
    t0: int | None = None  # nonconvex_schedule_bound: the t0 that gave the value

    def to_dict(self) -> dict:
        return {
            "value": None if self.value is None else float(self.value),
            "applicable": self.applicable,
            "reason": self.reason,
            "source": self.source,
            "assumptions": list(self.assumptions),
            "t0": self.t0,
        }


def _holds(value: float, source: str, assumptions: Sequence[str], t0: int | None = None) -> Bound:
    return Bound(float(value), True, "", source, tuple(assumptions), t0)


def _fails(reason: str, source: str, assumptions: Sequence[str]) -> Bound:
    return Bound(None, False, reason, source, tuple(assumptions))


# ---------------------------------------------------------------------------------------------
# Input checks (ValueError with a clear message)


def _positive(name: str, value: float) -> float:
    x = float(value)
    if not (math.isfinite(x) and x > 0):
        raise ValueError(f"{name} must be a finite number > 0, got {value!r}")
    return x


def _optional_positive(name: str, value: float | None) -> float | None:
    return None if value is None else _positive(name, value)


def _non_negative(name: str, value: float) -> float:
    x = float(value)
    if not (math.isfinite(x) and x >= 0):
        raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")
    return x


def _train_size(n: float) -> float:
    x = float(n)
    if not (math.isfinite(x) and x >= 2):
        raise ValueError(f"n (training-set size) must be >= 2, got {n!r}")
    return x


def _integer_train_size(n: int) -> int:
    x = _train_size(n)
    if x != int(x):
        raise ValueError(f"n (training-set size) must be an integer, got {n!r}")
    return int(x)


def _delta(delta: float) -> float:
    x = float(delta)
    if not 0 < x < 1:
        raise ValueError(f"delta must lie in (0, 1), got {delta!r}")
    return x


def _regime(regime: str) -> str:
    if regime not in REGIMES:
        raise ValueError(f"regime must be one of {REGIMES}, got {regime!r}")
    return regime


def _steps(steps: int) -> int:
    if isinstance(steps, bool) or int(steps) != steps or steps < 0:
        raise ValueError(f"steps must be an integer >= 0, got {steps!r}")
    return int(steps)


def _step_sizes(step_sizes: Sequence[float] | np.ndarray) -> np.ndarray:
    a = np.asarray(step_sizes, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"step sizes must be a 1-D sequence, got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError("step sizes must be finite numbers")
    if np.any(a < 0):
        t = int(np.flatnonzero(a < 0)[0])
        raise ValueError(f"step sizes must be >= 0: step {t + 1} has {a[t]!r}")
    return a


def _integers(name: str, values: Sequence[int] | np.ndarray) -> np.ndarray:
    x = np.asarray(values)
    if x.dtype.kind in "iu":
        return x.astype(np.int64, copy=False)
    if x.size and (
        x.dtype.kind not in "fb" or not np.all(np.isfinite(x)) or np.any(x != np.round(x))
    ):
        raise ValueError(f"{name} must be integers")
    return x.astype(np.int64)


def _batch_sizes(batch_sizes: Sequence[int] | np.ndarray | int, steps: int) -> np.ndarray:
    b = _integers("batch sizes", batch_sizes)
    if b.ndim == 0:
        b = np.full(steps, int(b), dtype=np.int64)
    if b.shape != (steps,):
        raise ValueError(f"batch sizes must have one entry per step ({steps}), got shape {b.shape}")
    if np.any(b < 1):
        raise ValueError("batch sizes must be >= 1")
    return b


def _expansion(expansion: Sequence[float] | np.ndarray, steps: int) -> np.ndarray:
    eta = np.asarray(expansion, dtype=float)
    if eta.shape != (steps,):
        raise ValueError(f"expansion must have one entry per step ({steps}), got shape {eta.shape}")
    if not np.all(np.isfinite(eta)) or np.any(eta < 0):
        raise ValueError("expansion factors must be finite and >= 0")
    return eta


def _hit_counts(hits: Sequence[int] | np.ndarray, batch_sizes: np.ndarray) -> np.ndarray:
    m = _integers("hits", hits)
    if m.shape[-1:] != batch_sizes.shape:
        raise ValueError(f"hits must have one count per step ({batch_sizes.size}), got {m.shape}")
    if np.any(m < 0) or np.any(m > batch_sizes):
        raise ValueError("hit counts must lie between 0 and the step's batch size")
    return m


# ---------------------------------------------------------------------------------------------
# Expansivity (HRS 2016 Sec. 2-3, from memory; SCIENCE.md §2)


def expansion_convex(step_sizes: Sequence[float], smoothness: float | None) -> np.ndarray:
    """eta_t = 1.

    Source: HRS 2016, expansivity of the gradient update (statement from memory).
    Assumes f(.; z) convex and beta-smooth with alpha_t <= 2/beta; not checked here (check_regime).
    """
    _optional_positive("smoothness", smoothness)
    return np.ones_like(_step_sizes(step_sizes))


def expansion_strongly_convex(
    step_sizes: Sequence[float], smoothness: float | None, strong_convexity: float
) -> np.ndarray:
    """eta_t = 1 - alpha_t * gamma.

    Source: SCIENCE.md §2 (f = h + gamma/2 ||w||^2, h convex and (beta - gamma)-smooth); HRS 2016
    state the weaker factor 1 - alpha beta gamma / (beta + gamma) (statement from memory).
    Assumes gamma-strongly convex, beta-smooth, alpha_t <= 2/(beta + gamma); not checked here.
    """
    _optional_positive("smoothness", smoothness)
    gamma = _positive("strong_convexity", strong_convexity)
    return 1.0 - _step_sizes(step_sizes) * gamma


def expansion_smooth(step_sizes: Sequence[float], smoothness: float) -> np.ndarray:
    """eta_t = 1 + alpha_t * beta.

    Source: HRS 2016, expansivity of the gradient update (statement from memory).
    Assumes only beta-smoothness (no convexity); holds for every step size.
    """
    return 1.0 + _step_sizes(step_sizes) * _positive("smoothness", smoothness)


def _first_excess(a: np.ndarray, limit: float, label: str) -> str:
    over = np.flatnonzero(a > limit * (1 + _RTOL))
    if over.size == 0:
        return ""
    t = int(over[0])
    more = f" ({over.size} steps exceed it)" if over.size > 1 else ""
    return f"step size {a[t]:.6g} at step {t + 1} exceeds {label} = {limit:.6g}{more}"


def check_regime(
    regime: str,
    step_sizes: Sequence[float],
    smoothness: float | None,
    strong_convexity: float = 0.0,
) -> str:
    """'' if the expansivity conditions of the regime hold at every step, else the reason.

    convex: alpha_t <= 2/beta; strongly_convex: 0 < gamma <= beta and alpha_t <= 2/(beta + gamma);
    nonconvex: beta declared (any step size). Source: HRS 2016 (from memory), SCIENCE.md §2.
    Steps are counted from 1 in the message.
    """
    regime = _regime(regime)
    a = _step_sizes(step_sizes)
    if smoothness is None:
        return "smoothness (beta) not declared: the expansivity conditions cannot be checked"
    beta = _positive("smoothness", smoothness)
    if regime == "nonconvex":
        return ""
    if regime == "convex":
        return _first_excess(a, 2.0 / beta, "2/beta")
    gamma = float(strong_convexity)
    if not (math.isfinite(gamma) and gamma > 0):
        return f"strong convexity (gamma) must be declared > 0, got {strong_convexity!r}"
    if gamma > beta * (1 + _RTOL):
        return f"strong convexity gamma = {gamma:.6g} exceeds smoothness beta = {beta:.6g}"
    return _first_excess(a, 2.0 / (beta + gamma), "2/(beta+gamma)")


def _expansion_for(regime: str, a: np.ndarray, beta: float | None, gamma: float) -> np.ndarray:
    if regime == "convex":
        return expansion_convex(a, beta)
    if regime == "strongly_convex":
        return expansion_strongly_convex(a, beta, gamma)
    return expansion_smooth(a, beta)


# ---------------------------------------------------------------------------------------------
# Divergence recursions


def _trajectory(factor: np.ndarray, increment: np.ndarray) -> np.ndarray:
    """x_0 = 0, x_{t+1} = factor_t x_t + increment_t (all >= 0), for t = 0..T; rows independent.

    Computed without a Python loop and without overflow: x_t = sum_{s<t} increment_s P_t / P_{s+1}
    with P_t = prod_{k<t} factor_k, accumulated in log space (np.logaddexp.accumulate). Factors of 0
    are raised to the smallest normal float, which can only enlarge the result (by ~1e-308).
    """
    shape = factor.shape[:-1] + (factor.shape[-1] + 1,)
    out = np.zeros(shape)
    if factor.shape[-1] == 0:
        return out
    if np.all(factor == 1.0):
        out[..., 1:] = np.cumsum(increment, axis=-1)
        return out
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        log_p = np.cumsum(np.log(np.maximum(factor, np.finfo(float).tiny)), axis=-1)  # log P_{t+1}
        acc = np.logaddexp.accumulate(np.log(increment) - log_p, axis=-1)
        out[..., 1:] = np.exp(log_p + acc)
    return out


def _suffix_log_products(factor: np.ndarray) -> np.ndarray:
    """log prod_{k > t} factor_k for each t (last axis), -inf where a later factor is 0."""
    with np.errstate(divide="ignore"):
        logs = np.log(factor)
    suffix = np.zeros_like(logs)
    suffix[..., :-1] = np.cumsum(logs[..., :0:-1], axis=-1)[..., ::-1]
    return suffix


def _final(factor: np.ndarray, increment: np.ndarray) -> np.ndarray:
    """x_T of the recursion of _trajectory, per row: sum_t increment_t prod_{k>t} factor_k."""
    with np.errstate(over="ignore", invalid="ignore"):
        terms = increment * np.exp(_suffix_log_products(factor))
    return np.where(increment > 0, terms, 0.0).sum(axis=-1)


def _pathwise_factors(
    a: np.ndarray, b: np.ndarray, m: np.ndarray, lipschitz: float, eta: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    # On a step with m of its b terms differing, the batch map is the mean of b - m shared maps
    # (each eta-expansive) and m differing pairs G, G'. For a differing pair, with sigma = alpha L,
    #   ||G(w) - G'(w')|| <= ||G(w) - G(w')|| + ||G(w') - w'|| + ||w' - G'(w')|| <= eta d + 2 sigma
    #   ||G(w) - G'(w')|| <= ||G(w) - w|| + ||w - w'|| + ||w' - G'(w')||       <=     d + 2 sigma
    # so it is min(eta, 1) d + 2 sigma (HRS 2016 growth lemma, from memory). Hence
    #   d_{t+1} <= ((b - m) eta + m min(eta, 1)) / b * d_t + 2 alpha L m / b.
    # For eta >= 1 (convex, non-convex) this is SCIENCE.md's ((b - m) eta + m) / b exactly; for
    # eta < 1 (strongly convex) it is the sharper eta d_t + 2 alpha L m / b, the form whose mean
    # over the sampling is SCIENCE.md's expected recursion.
    factor = eta - (eta - np.minimum(eta, 1.0)) * m / b
    return factor, 2.0 * a * lipschitz * m / b


def expected_divergence(
    step_sizes: Sequence[float],
    batch_sizes: Sequence[int],
    n: float,
    lipschitz: float,
    expansion: Sequence[float],
) -> np.ndarray:
    """E delta_{t+1} <= eta_t E delta_t + 2 alpha_t L / n from delta_0 = 0; returns t = 0..T.

    Source: HRS 2016 growth recursion (statement from memory), SCIENCE.md §2. Assumes step t is
    eta_t-expansive and (alpha_t L)-bounded and the swapped index is in step t's batch b_t/n times
    on average (uniform sampling or shuffled epochs); b_t cancels (b_t/n hits x 2 alpha_t L / b_t).
    Valid without independence between steps: the pathwise step is linear in the hit count.
    """
    a = _step_sizes(step_sizes)
    _batch_sizes(batch_sizes, a.size)
    n = _train_size(n)
    lipschitz = _positive("lipschitz", lipschitz)
    eta = _expansion(expansion, a.size)
    return _trajectory(eta, 2.0 * a * lipschitz / n)


def pathwise_divergence(
    step_sizes: Sequence[float],
    batch_sizes: Sequence[int],
    hits: Sequence[int],
    lipschitz: float,
    expansion: Sequence[float],
) -> np.ndarray:
    """delta_{t+1} <= ((b_t - m_t) eta_t + m_t min(eta_t, 1)) / b_t delta_t + 2 alpha_t L m_t / b_t.

    m_t = hits[t]: how many times the shadow's swapped index is in step t's batch. Returns t = 0..T.
    Source: HRS 2016 growth lemma for a fixed sampling path (statement from memory), SCIENCE.md §2.
    Assumes step t is eta_t-expansive on shared examples and (alpha_t L)-bounded.
    """
    a = _step_sizes(step_sizes)
    b = _batch_sizes(batch_sizes, a.size)
    m = _hit_counts(hits, b)
    if m.ndim != 1:
        raise ValueError("hits must be a 1-D sequence of per-step counts")
    eta = _expansion(expansion, a.size)
    return _trajectory(*_pathwise_factors(a, b, m, _positive("lipschitz", lipschitz), eta))


def _flat_batches(batch_indices: Sequence[Sequence[int]], b: np.ndarray, n: int) -> np.ndarray:
    """One array of all steps' indices; accepts T arrays, a (T, b) array, or the flat 1-D array."""
    if isinstance(batch_indices, np.ndarray) and batch_indices.ndim == 2:
        if batch_indices.shape[0] != b.size or np.any(b != batch_indices.shape[1]):
            raise ValueError("batch_indices rows must match the steps and their batch sizes")
        flat = batch_indices.reshape(-1)
    elif isinstance(batch_indices, np.ndarray) and batch_indices.ndim == 1:
        if batch_indices.size != b.sum():
            raise ValueError(f"flat batch_indices has {batch_indices.size} entries, not {b.sum()}")
        flat = batch_indices
    else:
        if len(batch_indices) != b.size:
            raise ValueError(f"batch_indices must have one array per step ({b.size})")
        lengths = np.fromiter((len(x) for x in batch_indices), dtype=np.int64, count=b.size)
        if np.any(lengths != b):
            t = int(np.flatnonzero(lengths != b)[0])
            raise ValueError(f"step {t + 1}: {lengths[t]} batch indices for batch size {b[t]}")
        flat = np.concatenate(batch_indices) if b.size else np.zeros(0, dtype=np.int64)
    flat = _integers("batch indices", flat)
    if flat.size and (flat.min() < 0 or flat.max() >= n):
        raise ValueError(f"batch indices must lie in [0, n) = [0, {n})")
    return flat


def all_index_pathwise(
    step_sizes: Sequence[float],
    batch_sizes: Sequence[int],
    batch_indices: Sequence[Sequence[int]],
    n: int,
    lipschitz: float,
    expansion: Sequence[float],
) -> np.ndarray:
    """Final pathwise bound (pathwise_divergence at step T) for every training index j = 0..n-1.

    batch_indices[t] holds the indices drawn at step t (repetition allowed); a (T, b) array or the
    flat 1-D concatenation of all steps' indices (length sum_t b_t) is accepted too. Source: HRS
    2016 growth lemma (statement from memory), SCIENCE.md §2-3; assumptions as pathwise_divergence
    (each index's bound holds whatever the data, so L max_j is the seeded algorithm's uniform
    stability). Vectorised: with eta_t <= 1 the per-step factor does not depend on hits, so the
    result is one weighted np.bincount (np.add.at's faster equivalent); otherwise each
    (index, step) hit carries a log-correction summed over that index's later hits.
    """
    a = _step_sizes(step_sizes)
    b = _batch_sizes(batch_sizes, a.size)
    n = _integer_train_size(n)
    lipschitz = _positive("lipschitz", lipschitz)
    eta = _expansion(expansion, a.size)
    return _all_index(a, b, _flat_batches(batch_indices, b, n), n, lipschitz, eta)


def _all_index(
    a: np.ndarray, b: np.ndarray, flat: np.ndarray, n: int, lipschitz: float, eta: np.ndarray
) -> np.ndarray:
    log_later = _suffix_log_products(eta)  # log prod_{k>t} eta_k
    if np.all(eta <= 1.0):
        weight = 2.0 * a * lipschitz / b * np.exp(log_later)
        return np.bincount(flat, weights=np.repeat(weight, b), minlength=n)
    steps = np.repeat(np.arange(a.size), b)
    # Group the hits by (index, step) with their multiplicity m, sorted by index then step.
    keys, m = np.unique(flat * a.size + steps, return_counts=True)
    j, t = np.divmod(keys, a.size)
    r = np.maximum(
        0.0, 1.0 - 1.0 / np.maximum(eta, np.finfo(float).tiny)
    )  # factor = eta(1 - r m/b)
    log_correction = np.log1p(-r[t] * m / b[t])
    running = np.cumsum(log_correction)
    last = np.flatnonzero(np.r_[j[1:] != j[:-1], True])  # last hit of each index
    group_last = last[np.cumsum(np.r_[0, j[1:] != j[:-1]])]
    with np.errstate(over="ignore", invalid="ignore"):
        growth = np.exp(log_later[t] + running[group_last] - running)
        terms = np.where(a[t] > 0, 2.0 * a[t] * lipschitz * m / b[t] * growth, 0.0)
    return np.bincount(j, weights=terms, minlength=n)


# ---------------------------------------------------------------------------------------------
# Closed forms (HRS 2016, statements from memory)


def _regime_assumptions(regime: str, lipschitz: float, smoothness: float | None, gamma: float):
    beta = "not declared" if smoothness is None else f"{smoothness:.6g}"
    if regime == "convex":
        return (
            f"f(.; z) convex, L-Lipschitz (L = {lipschitz:.6g}), beta-smooth (beta = {beta})",
            "alpha_t <= 2/beta at every step",
        )
    if regime == "strongly_convex":
        return (
            f"f(.; z) gamma-strongly convex (gamma = {gamma:.6g}), beta-smooth (beta = {beta})",
            f"L = {lipschitz:.6g} bounds the gradient over the region the iterates stay in "
            "(the paper projects onto a bounded convex set)",
            "alpha_t <= 2/(beta+gamma) at every step",
        )
    return (f"f(.; z) beta-smooth (beta = {beta}), L-Lipschitz (L = {lipschitz:.6g}), not convex",)


def _convex_value(total_step_size: float, n: float, lipschitz: float) -> float:
    return 2.0 * lipschitz**2 / n * total_step_size


def convex_bound(
    step_sizes: Sequence[float], n: float, lipschitz: float, *, smoothness: float | None = None
) -> Bound:
    """eps_stab <= (2 L^2 / n) * sum_t alpha_t.

    Source: HRS 2016, convex case (statement from memory). Assumes f(.; z) convex, L-Lipschitz,
    beta-smooth, alpha_t <= 2/beta (checked when smoothness is given), plain SGD, uniform sampling.
    """
    a = _step_sizes(step_sizes)
    n, lipschitz = _train_size(n), _positive("lipschitz", lipschitz)
    source = f"{HRS}, convex case {FROM_MEMORY}"
    assumptions = _regime_assumptions("convex", lipschitz, smoothness, 0.0) + (_PLAIN_SGD,)
    if smoothness is not None:
        reason = check_regime("convex", a, smoothness)
        if reason:
            return _fails(reason, source, assumptions)
    else:
        assumptions += ("alpha_t <= 2/beta not checked: smoothness not declared",)
    return _holds(_convex_value(float(a.sum()), n, lipschitz), source, assumptions)


def _strongly_convex_value(
    alpha: float, steps: int | None, n: float, lipschitz: float, gamma: float
):
    limit = 2.0 * lipschitz**2 / (gamma * n)
    if steps is None:
        return limit
    if steps == 0 or alpha == 0:
        return 0.0
    # (2 alpha L^2 / n) sum_{k<T} (1 - alpha gamma)^k = limit (1 - (1 - alpha gamma)^T), accurately.
    with np.errstate(divide="ignore"):
        return limit * -math.expm1(steps * np.log1p(-alpha * gamma))


def strongly_convex_bound(
    step_size: float,
    n: float,
    lipschitz: float,
    strong_convexity: float,
    steps: int | None = None,
    smoothness: float | None = None,
) -> Bound:
    """eps_stab <= 2 L^2 / (gamma n); steps = T: (2 alpha L^2 / n) sum_{k<T} (1 - alpha gamma)^k.

    Source: HRS 2016, strongly convex case with constant step size (statement from memory).
    Assumes f(.; z) gamma-strongly convex and beta-smooth, alpha <= 1/beta (checked when smoothness
    is given; alpha <= 1/gamma always), L the gradient bound over the iterates' region (projected
    SGD), plain SGD, uniform sampling.
    """
    alpha = _non_negative("step size", step_size)
    n, lipschitz = _train_size(n), _positive("lipschitz", lipschitz)
    gamma = _positive("strong_convexity", strong_convexity)
    steps = None if steps is None else _steps(steps)
    source = f"{HRS}, strongly convex case {FROM_MEMORY}"
    assumptions = _regime_assumptions("strongly_convex", lipschitz, smoothness, gamma)[:2] + (
        "constant step size alpha <= 1/beta",
        _PLAIN_SGD,
    )
    if smoothness is not None:
        beta = _positive("smoothness", smoothness)
        if gamma > beta * (1 + _RTOL):
            reason = f"strong convexity gamma = {gamma:.6g} exceeds smoothness beta = {beta:.6g}"
            return _fails(reason, source, assumptions)
        if alpha > (1 + _RTOL) / beta:
            reason = f"step size {alpha:.6g} exceeds 1/beta = {1 / beta:.6g}"
            return _fails(
                reason + " (the strongly convex theorem's condition)", source, assumptions
            )
    else:
        assumptions += ("alpha <= 1/beta not checked: smoothness not declared",)
        if alpha * gamma > 1 + _RTOL:
            reason = f"step size {alpha:.6g} exceeds 1/gamma = {1 / gamma:.6g} >= 1/beta"
            return _fails(reason, source, assumptions)
    return _holds(_strongly_convex_value(alpha, steps, n, lipschitz, gamma), source, assumptions)


def nonconvex_bound(
    c: float,
    steps: int,
    n: float,
    lipschitz: float,
    smoothness: float,
    *,
    step_sizes: Sequence[float] | None = None,
) -> Bound:
    """eps_stab <= (1 + 1/(beta c)) / (n - 1) (2 c L^2)^(1/(beta c + 1)) T^(beta c/(beta c + 1)).

    Source: HRS 2016, non-convex case (statement from memory). Assumes f(.; z) in [0, 1],
    L-Lipschitz, beta-smooth, alpha_t <= c/t non-increasing (checked when step_sizes is given),
    plain SGD sampling one example uniformly per step.
    """
    c, steps = _positive("c", c), _steps(steps)
    n, lipschitz = _train_size(n), _positive("lipschitz", lipschitz)
    beta = _positive("smoothness", smoothness)
    source = f"{HRS}, non-convex case {FROM_MEMORY}"
    assumptions = (
        f"f(.; z) in [0, 1], L-Lipschitz (L = {lipschitz:.6g}), beta-smooth (beta = {beta:.6g})",
        f"alpha_t <= c/t (c = {c:.6g}) and non-increasing",
        _PLAIN_SGD,
    )
    if step_sizes is not None:
        a = _step_sizes(step_sizes)
        if a.size != steps:
            raise ValueError(f"step_sizes has {a.size} entries for steps = {steps}")
        limit = c / np.arange(1, steps + 1)
        over = np.flatnonzero(a > limit * (1 + _RTOL))
        if over.size:
            t = int(over[0])
            reason = f"step size {a[t]:.6g} at step {t + 1} exceeds c/t = {limit[t]:.6g}"
            return _fails(reason, source, assumptions)
        rising = np.flatnonzero(np.diff(a) > 0)
        if rising.size:
            t = int(rising[0]) + 1
            reason = f"step sizes increase at step {t + 1} ({a[t - 1]:.6g} -> {a[t]:.6g})"
            return _fails(reason, source, assumptions)
    else:
        assumptions += ("alpha_t <= c/t not checked: step sizes not given",)
    q = beta * c
    value = (1 + 1 / q) / (n - 1) * (2 * c * lipschitz**2) ** (1 / (q + 1)) * steps ** (q / (q + 1))
    return _holds(value, source, assumptions)


def nonconvex_schedule_bound(
    step_sizes: Sequence[float],
    batch_sizes: Sequence[int],
    n: float,
    lipschitz: float,
    smoothness: float,
    loss_bound: float | None,
) -> Bound:
    """eps_stab <= min_t0 [ M min(1, sum_{t<=t0} b_t / n) + L E[delta_T | delta_t0 = 0] ].

    E[delta_T | delta_t0 = 0] runs the expected recursion with eta_t = 1 + alpha_t beta from t0.
    Source: HRS 2016, the t0 lemma for non-convex losses (statement from memory), SCIENCE.md §2.
    Assumes f(.; z) in [0, M], L-Lipschitz, beta-smooth, any step sizes, plain SGD, steps sampled
    independently (after no hit in the first t0 steps, later hits keep chance b_t/n).
    """
    a = _step_sizes(step_sizes)
    b = _batch_sizes(batch_sizes, a.size)
    n, lipschitz = _train_size(n), _positive("lipschitz", lipschitz)
    beta = _positive("smoothness", smoothness)
    source = f"{HRS}, t0 lemma with the expected growth recursion {FROM_MEMORY}"
    assumptions = (
        f"f(.; z) in [0, M], L-Lipschitz (L = {lipschitz:.6g}), beta-smooth (beta = {beta:.6g})",
        _PLAIN_SGD,
        "steps sample independently: P(hit in the first t0 steps) <= sum_{t<=t0} b_t/n",
    )
    if loss_bound is None:
        reason = "loss bound (M) not declared: the t0 argument needs sup f <= M"
        return _fails(reason, source, assumptions)
    loss_bound = _positive("loss_bound", loss_bound)
    eta = 1.0 + a * beta
    increment = 2.0 * a * lipschitz / n
    with np.errstate(over="ignore", invalid="ignore"):
        terms = np.where(increment > 0, increment * np.exp(_suffix_log_products(eta)), 0.0)
    after = np.zeros(a.size + 1)  # after[t0] = E[delta_T | delta_t0 = 0]
    after[:-1] = np.cumsum(terms[::-1])[::-1]
    early_hit = np.minimum(1.0, np.r_[0.0, np.cumsum(b)] / n)
    values = loss_bound * early_hit + lipschitz * after
    t0 = int(np.argmin(values))
    return _holds(values[t0], source, assumptions + (f"best t0 = {t0} of T = {a.size}",), t0=t0)


# ---------------------------------------------------------------------------------------------
# High probability (McDiarmid; Bousquet & Elisseeff 2002)


def _high_probability_inputs(stability, n, loss_bound, delta, source, assumptions):
    n, delta = _train_size(n), _delta(delta)
    if stability is None:
        return None, _fails("no uniform stability bound", source, assumptions)
    stability = float(stability)
    if math.isnan(stability) or stability < 0:
        raise ValueError(f"stability must be >= 0, got {stability!r}")
    if loss_bound is None:
        return None, _fails("loss bound (M) not declared", source, assumptions)
    return (stability, n, _positive("loss_bound", loss_bound), delta), None


def high_probability_gap(
    stability: float | None,
    n: float,
    loss_bound: float | None,
    delta: float,
    two_sided: bool = False,
) -> Bound:
    """R - R_S <= beta_n + (2 n beta_n + M) sqrt(ln(1/delta) / (2n)) with probability >= 1 - delta.

    two_sided: |R - R_S| <= the same with ln(2/delta). Source: McDiarmid's inequality (SCIENCE.md
    §3; derivation below). Assumes A is beta_n-uniformly stable under
    replacement of one example, loss in [0, M], i.i.d. sample of size n.
    """
    # Derivation: replacing z_i moves R(A(S)) by <= beta_n and R_S(A(S)) by <= beta_n + M/n, so the
    # gap D has bounded differences c = 2 beta_n + M/n, and |E D| <= beta_n. McDiarmid:
    # P(D - E D >= eps) <= exp(-2 eps^2 / (n c^2)); solving for delta gives
    # eps = c sqrt(n ln(1/delta) / 2) = (2 n beta_n + M) sqrt(ln(1/delta) / (2n)).
    source = MCDIARMID + (", two-sided" if two_sided else ", one-sided")
    assumptions = (
        "A is beta_n-uniformly stable under replacement of one example",
        "loss values in [0, M]",
        "training examples drawn i.i.d.",
    )
    inputs, failed = _high_probability_inputs(stability, n, loss_bound, delta, source, assumptions)
    if failed:
        return failed
    beta_n, n, m, delta = inputs
    log_term = math.log((2.0 if two_sided else 1.0) / delta)
    value = beta_n + (2 * n * beta_n + m) * math.sqrt(log_term / (2 * n))
    return _holds(value, source, assumptions + (f"confidence 1 - delta = {1 - delta:.6g}",))


def bousquet_elisseeff_gap(
    stability: float | None, n: float, loss_bound: float | None, delta: float
) -> Bound:
    """R <= R_S + 2 beta + (4 n beta + M) sqrt(ln(1/delta) / (2n)) w.p. >= 1 - delta.

    Source: Bousquet & Elisseeff 2002, Thm 12 (checked against a restatement). Assumes A is
    beta-uniformly stable under removal of one example, loss in [0, M], i.i.d. sample of size n.
    """
    source = BOUSQUET_ELISSEEFF
    assumptions = (
        "A is beta-uniformly stable under removal of one example",
        "loss values in [0, M]",
        "training examples drawn i.i.d.",
    )
    inputs, failed = _high_probability_inputs(stability, n, loss_bound, delta, source, assumptions)
    if failed:
        return failed
    beta, n, m, delta = inputs
    value = 2 * beta + (4 * n * beta + m) * math.sqrt(math.log(1 / delta) / (2 * n))
    return _holds(value, source, assumptions + (f"confidence 1 - delta = {1 - delta:.6g}",))


# ---------------------------------------------------------------------------------------------
# A run's bounds (what the tracker asks for every epoch)


@dataclass(frozen=True)
class RunBounds:
    """The bounds implied by a recorded run."""

    regime: str
    path_bound: tuple[float | None, ...]  # per shadow: pathwise divergence bound at step T (no L)
    path_applicable: bool
    path_reason: str
    expected: Bound  # eps_stab <= L E delta_T
    uniform_stability: Bound  # L max_j all_index_pathwise_j (seeded algorithm)
    high_probability: Bound  # McDiarmid gap from uniform_stability

    def to_dict(self) -> dict:
        return {
            "regime": self.regime,
            "path_bound": [None if v is None else float(v) for v in self.path_bound],
            "path_applicable": self.path_applicable,
            "path_reason": self.path_reason,
            "expected": self.expected.to_dict(),
            "uniform_stability": self.uniform_stability.to_dict(),
            "high_probability": self.high_probability.to_dict(),
        }


def assess_run(
    *,
    regime: str,
    step_sizes: Sequence[float],
    batch_sizes: Sequence[int],
    n: int,
    lipschitz: float,
    smoothness: float | None,
    strong_convexity: float = 0.0,
    loss_bound: float | None = None,
    shadow_hits: Sequence[Sequence[int]] = (),
    batch_indices: Sequence[Sequence[int]] | None = None,
    delta: float = 0.05,
    not_applicable_reason: str = "",
) -> RunBounds:
    """Every bound of SCIENCE.md §2-3 for a recorded run of T steps and K shadows.

    path_bound: pathwise_divergence at step T per shadow; expected: L * expected_divergence at T
    (convex, strongly convex) or nonconvex_schedule_bound; uniform_stability: L * max_j
    all_index_pathwise (convex, strongly convex); high_probability: high_probability_gap of it.
    Sources and assumptions are carried by each Bound.
    """
    regime = _regime(regime)
    a = _step_sizes(step_sizes)
    b = _batch_sizes(batch_sizes, a.size)
    n = _integer_train_size(n)
    lipschitz = _positive("lipschitz", lipschitz)
    beta = _optional_positive("smoothness", smoothness)
    gamma = _non_negative("strong_convexity", strong_convexity)
    if regime == "strongly_convex" and gamma == 0:
        raise ValueError("strong_convexity must be > 0 in the strongly convex regime")
    loss_bound = _optional_positive("loss_bound", loss_bound)
    delta = _delta(delta)
    hits = _hit_counts(np.asarray(shadow_hits).reshape(len(shadow_hits), a.size), b)
    flat = None if batch_indices is None else _flat_batches(batch_indices, b, n)

    reason = not_applicable_reason or check_regime(regime, a, beta, gamma)
    assumptions = _regime_assumptions(regime, lipschitz, beta, gamma) + (_PLAIN_SGD,)
    expected_source = f"{HRS}, expected growth recursion {FROM_MEMORY}"
    uniform_source = (
        f"{HRS}, growth lemma on the recorded sampling path, max over indices {FROM_MEMORY}"
    )
    if reason:
        unusable = _fails(reason, uniform_source, assumptions)
        return RunBounds(
            regime, (None,) * len(hits), False, reason,
            _fails(reason, expected_source, assumptions), unusable,
            _fails(reason, MCDIARMID, ()),
        )  # fmt: skip

    eta = _expansion_for(regime, a, beta, gamma)
    path = _final(*_pathwise_factors(a, b, hits, lipschitz, eta))
    if regime == "nonconvex":
        expected = nonconvex_schedule_bound(a, b, n, lipschitz, beta, loss_bound)
        uniform = _fails(
            "seeded uniform stability is reported for the convex and strongly convex regimes only "
            "(the non-convex pathwise bound compounds 1 + alpha_t beta at every step)",
            uniform_source,
            assumptions,
        )
    else:
        value = lipschitz * _final(eta, 2.0 * a * lipschitz / n)
        expected = _holds(value, expected_source, assumptions + (_SAMPLING,))
        if flat is None:
            uniform = _fails("batch indices not recorded", uniform_source, assumptions)
        else:
            per_index = _all_index(a, b, flat, n, lipschitz, eta)
            uniform = _holds(
                lipschitz * float(per_index.max(initial=0.0)),
                uniform_source,
                assumptions + ("sampling order fixed by the seed; the data may be anything",),
            )
    if uniform.applicable:
        high = high_probability_gap(uniform.value, n, loss_bound, delta)
    else:
        high = _fails(f"needs the seeded uniform stability: {uniform.reason}", MCDIARMID, ())
    return RunBounds(regime, tuple(float(v) for v in path), True, "", expected, uniform, high)


# ---------------------------------------------------------------------------------------------
# Planned runs: step-size schedules, the bound after T planned steps, and its inversions


@dataclass(frozen=True)
class Schedule:
    """Step sizes alpha_t for steps t = 1, 2, ...; every kind is non-increasing, largest at t = 1.

    constant: base; step-decay: base * decay_factor ** ((t - 1) // decay_every);
    cosine: base * (1 + cos(pi (t - 1) / total_steps)) / 2 for t <= total_steps; c-over-t: base / t.
    """

    kind: str = "constant"
    base_step_size: float = 0.1
    decay_factor: float = 0.1
    decay_every: int = 1
    total_steps: int | None = None

    def __post_init__(self) -> None:
        if self.kind not in SCHEDULE_KINDS:
            raise ValueError(f"schedule kind must be one of {SCHEDULE_KINDS}, got {self.kind!r}")
        _positive("base_step_size", self.base_step_size)
        if not 0 < float(self.decay_factor) <= 1:
            raise ValueError(f"decay_factor must lie in (0, 1], got {self.decay_factor!r}")
        if _steps(self.decay_every) < 1:
            raise ValueError("decay_every must be >= 1 step")
        if self.kind == "cosine" and (self.total_steps is None or _steps(self.total_steps) < 1):
            raise ValueError("a cosine schedule needs total_steps >= 1")

    @property
    def peak(self) -> float:
        return float(self.base_step_size)

    @property
    def horizon(self) -> int | None:
        """Last step the schedule defines (None: unlimited)."""
        return int(self.total_steps) if self.kind == "cosine" else None

    def with_peak(self, peak: float) -> Schedule:
        return dataclasses.replace(self, base_step_size=float(peak))

    def step_sizes(self, steps: int) -> np.ndarray:
        steps = _steps(steps)
        if self.horizon is not None and steps > self.horizon:
            raise ValueError(
                f"the cosine schedule stops at {self.horizon} steps, asked for {steps}"
            )
        t = np.arange(1, steps + 1)
        base = self.peak
        if self.kind == "constant":
            return np.full(steps, base)
        if self.kind == "step-decay":
            return base * float(self.decay_factor) ** ((t - 1) // int(self.decay_every))
        if self.kind == "cosine":
            return base * (1 + np.cos(np.pi * (t - 1) / int(self.total_steps))) / 2
        return base / t

    def total_step_size(self, steps: int) -> float:
        """sum_{t <= steps} alpha_t (closed form except for cosine)."""
        steps, base = _steps(steps), self.peak
        if self.kind == "constant":
            return steps * base
        if self.kind == "c-over-t":  # base * H_T, H_T = digamma(T + 1) + Euler's gamma
            return base * float(special.digamma(steps + 1) + np.euler_gamma) if steps else 0.0
        if self.kind == "step-decay" and self.decay_factor < 1:
            blocks, rest = divmod(steps, int(self.decay_every))
            log_f = math.log(self.decay_factor)
            full = -math.expm1(blocks * log_f) / -math.expm1(log_f)  # sum_{k<blocks} f^k
            return base * (int(self.decay_every) * full + rest * math.exp(blocks * log_f))
        if self.kind == "step-decay":
            return steps * base
        return float(self.step_sizes(steps).sum())

    def describe(self) -> str:
        if self.kind == "constant":
            return f"constant step size {self.peak:.6g}"
        if self.kind == "c-over-t":
            return f"step size c/t with c = {self.peak:.6g}"
        if self.kind == "cosine":
            return f"cosine from {self.peak:.6g} over {self.total_steps} steps"
        factor, every = f"{self.decay_factor:.6g}", self.decay_every
        return f"step size {self.peak:.6g} times {factor} every {every} steps"


@dataclass(frozen=True, eq=False)
class _Recorded:
    """A given array of per-step sizes used as a schedule (a private copy)."""

    values: np.ndarray
    kind = "recorded"

    @property
    def peak(self) -> float:
        return float(self.values.max())

    @property
    def horizon(self) -> int:
        return int(self.values.size)

    def with_peak(self, peak: float) -> _Recorded:
        return _Recorded(self.values * (float(peak) / self.peak))

    def step_sizes(self, steps: int) -> np.ndarray:
        steps = _steps(steps)
        if steps > self.horizon:
            raise ValueError(f"the given schedule has {self.horizon} steps, asked for {steps}")
        return self.values[:steps]

    def total_step_size(self, steps: int) -> float:
        return float(self.step_sizes(steps).sum())

    def describe(self) -> str:
        return f"{self.horizon} given step sizes (largest {self.peak:.6g})"


def _as_schedule(schedule: Schedule | float | Sequence[float]) -> Schedule | _Recorded:
    if isinstance(schedule, (Schedule, _Recorded)):
        return schedule
    if np.ndim(schedule) == 0:
        return Schedule("constant", _positive("step size", schedule))
    values = _step_sizes(schedule).copy()
    if values.size == 0 or values.max() <= 0:
        raise ValueError("a given schedule needs at least one step size > 0")
    values.flags.writeable = False
    return _Recorded(values)


def _mean_gap_note() -> str:
    return (
        "eps_stab (in expectation over the sampling) used as beta_n: the statement holds for the "
        "gap averaged over the sampling, E_A[R - R_S]"
    )


def planned_bounds(
    horizons: Sequence[int],
    *,
    regime: str,
    n: float,
    lipschitz: float,
    schedule: Schedule | float | Sequence[float],
    smoothness: float | None = None,
    strong_convexity: float = 0.0,
    batch_size: int = 1,
    loss_bound: float | None = None,
    delta: float = 0.05,
    bound: str = "stability",
) -> tuple[Bound, ...]:
    """The bound after T planned steps, for each T in horizons (constant batch size).

    convex: (2 L^2 / n) sum_{t<=T} alpha_t; strongly convex: L * expected_divergence with
    eta_t = 1 - alpha_t gamma (for a constant step size the finite-T sum of strongly_convex_bound);
    nonconvex: nonconvex_schedule_bound. bound='high_probability' passes that eps_stab through
    high_probability_gap. Sources and assumptions: those functions' (HRS 2016 from memory;
    McDiarmid).
    """
    regime, n = _regime(regime), _train_size(n)
    lipschitz = _positive("lipschitz", lipschitz)
    beta = _optional_positive("smoothness", smoothness)
    gamma = _non_negative("strong_convexity", strong_convexity)
    batch = int(_batch_sizes(batch_size, 1)[0])
    loss_bound = _optional_positive("loss_bound", loss_bound)
    if bound not in TARGET_BOUNDS:
        raise ValueError(f"bound must be one of {TARGET_BOUNDS}, got {bound!r}")
    if bound == "high_probability":
        delta = _delta(delta)
    horizons = [_steps(h) for h in horizons]
    sched = _as_schedule(schedule)
    last = max(horizons, default=0)
    if sched.horizon is not None and last > sched.horizon:
        raise ValueError(f"{sched.describe()} defines {sched.horizon} steps, asked for {last}")

    # Every Schedule kind is largest at step 1, so its condition is checked there.
    probe = (
        sched.step_sizes(last)
        if isinstance(sched, _Recorded)
        else np.full(min(last, 1), sched.peak)
    )
    assumptions = _regime_assumptions(regime, lipschitz, beta, gamma) + (_PLAIN_SGD,)
    if regime == "nonconvex" or beta is not None:
        reason = check_regime(regime, probe, beta, gamma)
    elif regime == "strongly_convex" and gamma == 0:
        reason = "strong convexity (gamma) must be declared > 0 in this regime"
    else:
        assumptions += ("step-size condition not checked: smoothness not declared",)
        reason = "" if regime == "convex" else _first_excess(probe, 1 / gamma, "1/gamma")
    if regime == "convex":
        source = f"{HRS}, convex case {FROM_MEMORY}"
    elif regime == "strongly_convex":
        source = f"{HRS}, expected growth recursion, eta = 1 - alpha*gamma {FROM_MEMORY}"
    else:
        source = f"{HRS}, t0 lemma with the expected growth recursion {FROM_MEMORY}"
    if not reason and regime == "nonconvex" and loss_bound is None:
        reason = "loss bound (M) not declared: the t0 argument needs sup f <= M"
    if reason:
        return tuple(_fails(reason, source, assumptions) for _ in horizons)

    if regime == "convex":
        stability = [
            _holds(_convex_value(sched.total_step_size(t), n, lipschitz), source, assumptions)
            for t in horizons
        ]
    elif regime == "strongly_convex" and sched.kind == "constant":
        stability = [
            _holds(_strongly_convex_value(sched.peak, t, n, lipschitz, gamma), source, assumptions)
            for t in horizons
        ]
    elif regime == "strongly_convex":
        a = sched.step_sizes(last)
        curve = lipschitz * _trajectory(1.0 - a * gamma, 2.0 * a * lipschitz / n)
        stability = [_holds(curve[t], source, assumptions + (_SAMPLING,)) for t in horizons]
    else:
        stability = [
            nonconvex_schedule_bound(sched.step_sizes(t), batch, n, lipschitz, beta, loss_bound)
            for t in horizons
        ]
    if bound == "stability":
        return tuple(stability)
    out = []
    for eps in stability:
        high = high_probability_gap(eps.value, n, loss_bound, delta)
        extra = (eps.source, *eps.assumptions, _mean_gap_note())
        out.append(dataclasses.replace(high, assumptions=high.assumptions + extra, t0=eps.t0))
    return tuple(out)


def planned_bound(steps: int, **problem) -> Bound:
    """planned_bounds for one horizon: the bound after `steps` planned steps."""
    return planned_bounds([steps], **problem)[0]


@dataclass(frozen=True)
class PlanAnswer:
    """The planner's answer: most steps / largest step size, or fewest examples, within target."""

    value: float | None  # int for steps and train_size; None when no answer exists or unbounded
    applicable: bool  # False when the bound's assumptions fail for these inputs
    reason: str  # why not applicable, or why there is no answer ('' otherwise)
    quantity: str  # "steps", "step_size" or "train_size"
    target: float
    bound: str = "stability"  # which bound the target applies to (TARGET_BOUNDS)
    bound_at_value: float | None = None
    unbounded: bool = False  # every value of the quantity meets the target
    note: str = ""  # qualifiers: capped by a step-size condition, search limit reached, ...
    source: str = ""

    def to_dict(self) -> dict:
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}


def _last_true(ok: Callable[[int], bool], lo: int, hi: int, guess: int | None = None) -> int:
    """Largest x in [lo, hi] with ok(x), for ok monotone (True, then False) and ok(lo) True.

    Gallops away from the guess (a closed form is usually off by at most one), then bisects.
    """
    good, bad = lo, hi + 1  # ok(good) holds; ok fails at bad (hi + 1 stands for "beyond hi")
    downward = False
    if guess is not None and lo < guess <= hi:
        good, bad, downward = (guess, bad, False) if ok(guess) else (good, guess, True)
    span = 1
    while bad - good > 1:
        probe = max(good + 1, bad - span) if downward else min(good + span, bad - 1)
        if ok(probe) == downward:  # the gallop crossed the boundary: bisect from here
            good, bad = (probe, bad) if downward else (good, probe)
            break
        good, bad = (good, probe) if downward else (probe, bad)
        span *= 2
    while bad - good > 1:
        mid = (good + bad) // 2
        good, bad = (mid, bad) if ok(mid) else (good, mid)
    return good


def _stability_target(target: float, bound: str, n: float, loss_bound, delta) -> float:
    """The eps_stab whose high-probability gap equals target (inverse of high_probability_gap)."""
    if bound == "stability":
        return target
    s = math.sqrt(math.log(1 / delta) / (2 * n))
    return (target - loss_bound * s) / (1 + 2 * n * s)


def max_steps(
    target: float,
    *,
    regime: str,
    n: float,
    lipschitz: float,
    schedule: Schedule | float | Sequence[float],
    smoothness: float | None = None,
    strong_convexity: float = 0.0,
    batch_size: int = 1,
    loss_bound: float | None = None,
    delta: float = 0.05,
    bound: str = "stability",
    max_horizon: int = 10**7,
) -> PlanAnswer:
    """Largest T with planned_bound(T) <= target.

    Exact for a constant step size (convex: T = target n / (2 L^2 alpha); strongly convex:
    T = ln(1 - target gamma n / (2 L^2)) / ln(1 - alpha gamma)), integer bisection otherwise;
    'unbounded' when the bound's limit in T is within target. Sources: planned_bounds'.
    max_horizon limits the search where each evaluation needs per-step arrays.
    """
    target = _positive("target", target)
    sched = _as_schedule(schedule)
    problem = dict(
        regime=regime, n=n, lipschitz=lipschitz, schedule=sched, smoothness=smoothness,
        strong_convexity=strong_convexity, batch_size=batch_size, loss_bound=loss_bound,
        delta=delta, bound=bound,
    )  # fmt: skip
    at = functools.lru_cache(maxsize=None)(lambda t: planned_bound(t, **problem))
    first = at(1)  # every schedule defines step 1; its conditions are checked there
    plan = _plan_answer("steps", target, bound, first.source)
    if not first.applicable:
        return plan(None, False, first.reason)
    if at(0).value > target:
        return plan(None, True, f"even 0 steps give a {bound} bound of {at(0).value:.6g} > target")
    constant = sched.kind == "constant"
    n_value, lipschitz_value = float(n), float(lipschitz)
    eps = _stability_target(target, bound, n_value, loss_bound, delta)
    guess, limit = None, None
    if regime == "convex" and constant:
        guess = math.floor(eps * n_value / (2 * lipschitz_value**2 * sched.peak))
    elif regime == "convex" and sched.kind == "step-decay" and sched.decay_factor < 1:
        total = sched.peak * sched.decay_every / (1 - sched.decay_factor)
        limit = _convex_value(total, n_value, lipschitz_value)
    elif regime == "strongly_convex" and constant:
        limit = 2 * lipschitz_value**2 / (float(strong_convexity) * n_value)
        rate = sched.peak * float(strong_convexity)
        if eps < limit:
            guess = 0 if rate >= 1 else math.floor(math.log1p(-eps / limit) / math.log1p(-rate))
    if limit is not None and limit <= eps and sched.horizon is None:
        value = _limit_value(limit, problem)
        note = f"the {bound} bound stays below its limit {value:.6g} <= target: any number of steps"
        return plan(None, True, "", unbounded=True, note=note)
    cheap = regime == "convex" or (regime == "strongly_convex" and constant)
    hi = sched.horizon if sched.horizon is not None else (10**15 if cheap else _steps(max_horizon))

    def ok(t: int) -> bool:
        b = at(t)
        return b.applicable and b.value <= target

    best = _last_true(ok, 0, hi, None if guess is None else max(0, min(guess, hi)))
    note = ""
    if best == hi:
        note = (
            f"the whole schedule ({hi} steps) stays within target"
            if sched.horizon is not None
            else f"the bound stays within target up to the search limit of {hi} steps"
        )
    elif not at(best + 1).applicable:
        note = f"step {best + 1} breaks the bound's condition: {at(best + 1).reason}"
    return plan(best, True, "", bound_at_value=at(best).value, note=note)


def _limit_value(stability_limit: float, problem: dict) -> float:
    if problem["bound"] == "stability":
        return stability_limit
    return high_probability_gap(
        stability_limit, problem["n"], problem["loss_bound"], problem["delta"]
    ).value


def _plan_answer(quantity: str, target: float, bound: str, source: str):
    def make(value, applicable, reason, **extra) -> PlanAnswer:
        return PlanAnswer(
            value, applicable, reason, quantity, target, bound, source=source, **extra
        )

    return make


def _step_size_cap(regime: str, smoothness: float | None, gamma: float) -> tuple[float | None, str]:
    """The largest peak step size the regime's conditions allow (None: no limit)."""
    if regime == "convex":
        return (None, "") if smoothness is None else (2 / float(smoothness), "2/beta")
    if regime == "strongly_convex" and gamma > 0:
        if smoothness is None:
            return 1 / gamma, "1/gamma"
        return 2 / (float(smoothness) + gamma), "2/(beta+gamma)"
    return None, ""


def max_step_size(
    target: float,
    *,
    regime: str,
    n: float,
    lipschitz: float,
    steps: int,
    schedule: Schedule | float | Sequence[float] | None = None,
    smoothness: float | None = None,
    strong_convexity: float = 0.0,
    batch_size: int = 1,
    loss_bound: float | None = None,
    delta: float = 0.05,
    bound: str = "stability",
) -> PlanAnswer:
    """Largest peak step size alpha_1 with planned_bound(steps) <= target, schedule shape kept.

    Exact for the convex bound (alpha_1 = target n / (2 L^2 sum_t alpha_t / alpha_1)), root finding
    (scipy.optimize.brentq) otherwise; capped by the regime's step-size condition. A given array of
    step sizes is rescaled so that its largest entry is the answer. Sources: planned_bounds'.
    """
    target, steps = _positive("target", target), _steps(steps)
    shape = _as_schedule(1.0 if schedule is None else schedule)
    gamma = _non_negative("strong_convexity", strong_convexity)
    problem = dict(
        regime=_regime(regime), n=n, lipschitz=lipschitz, smoothness=smoothness,
        strong_convexity=gamma, batch_size=batch_size, loss_bound=loss_bound, delta=delta,
        bound=bound,
    )  # fmt: skip
    at = functools.lru_cache(maxsize=None)(
        lambda peak: planned_bound(steps, schedule=shape.with_peak(peak), **problem)
    )
    floor = at(shape.peak * 1e-300)  # the bound as the step sizes vanish
    plan = _plan_answer("step_size", target, bound, floor.source)
    if not floor.applicable:
        return plan(None, False, floor.reason)
    if floor.value > target:
        return plan(None, True, f"even vanishing step sizes give {floor.value:.6g} > target")
    cap, label = _step_size_cap(regime, smoothness, gamma)
    if cap is not None:
        if at(cap).value <= target:
            note = f"capped by the condition peak step size <= {label} = {cap:.6g}"
            return plan(cap, True, "", bound_at_value=at(cap).value, note=note)
        hi = cap
    else:  # nonconvex: the t0 = T branch, M min(1, T b / n), does not grow with the step size
        saturated = float(loss_bound) * min(1.0, steps * int(batch_size) / float(n))
        if _limit_value(saturated, problem) <= target:
            note = "the bound saturates at M min(1, T b / n) within target: any step size"
            return plan(None, True, "", unbounded=True, note=note)
        hi = shape.peak
        while at(hi).value <= target:
            hi *= 2
    guess = None
    if regime == "convex" and bound == "stability":
        unit = _convex_value(
            shape.with_peak(1.0).total_step_size(steps), float(n), float(lipschitz)
        )
        guess = min(target / unit, hi)
    if guess is None or at(guess).value > target:
        guess = optimize.brentq(lambda x: at(x).value - target, hi * 1e-300, hi, rtol=1e-14)
    for _ in range(60):  # make sure the answer meets the target despite round-off
        if at(guess).value <= target:
            break
        guess = guess * (1 - 2**-40)
    return plan(guess, True, "", bound_at_value=at(guess).value)


def min_train_size(
    target: float,
    *,
    regime: str,
    lipschitz: float,
    steps: int,
    schedule: Schedule | float | Sequence[float],
    smoothness: float | None = None,
    strong_convexity: float = 0.0,
    batch_size: int = 1,
    loss_bound: float | None = None,
    delta: float = 0.05,
    bound: str = "stability",
    max_train_size: int = 10**15,
) -> PlanAnswer:
    """Smallest n >= 2 with planned_bound(steps) <= target for a fixed number of steps.

    Exact where the bound is C / n (convex, strongly convex: n = ceil(C / target)), root finding
    (scipy.optimize.brentq) on n otherwise, then the integer boundary. Sources: planned_bounds'.
    """
    target, steps = _positive("target", target), _steps(steps)
    problem = dict(
        regime=_regime(regime), lipschitz=lipschitz, schedule=_as_schedule(schedule),
        smoothness=smoothness, strong_convexity=strong_convexity, batch_size=batch_size,
        loss_bound=loss_bound, delta=delta, bound=bound,
    )  # fmt: skip
    at = functools.lru_cache(maxsize=None)(lambda size: planned_bound(steps, n=size, **problem))
    plan = _plan_answer("train_size", target, bound, at(2).source)
    if not at(2).applicable:
        return plan(None, False, at(2).reason)

    def too_big(size: int) -> bool:
        return at(size).value > target

    if not too_big(2):
        return plan(2, True, "", bound_at_value=at(2).value, note="n = 2 is the smallest size")
    hi = _steps(max_train_size)
    if too_big(hi):
        return plan(None, True, f"even n = {hi} gives {at(hi).value:.6g} > target")
    if regime != "nonconvex" and bound == "stability":
        guess = math.ceil(2 * at(2).value / target)
    else:
        upper = 4
        while too_big(upper):
            upper *= 4
        root = optimize.brentq(lambda x: at(x).value - target, max(2, upper / 4), upper, rtol=1e-14)
        guess = math.ceil(root)
    best = _last_true(too_big, 2, hi, max(2, min(guess - 1, hi))) + 1
    return plan(best, True, "", bound_at_value=at(best).value)
