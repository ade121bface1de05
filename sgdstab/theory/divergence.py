"""Divergence recursions of SGD and the bounds of a recorded run.

The growth recursions of HRS 2016 Sec. 2-3 (in expectation over the sampling, along one sampling
path, for every training index at once) of the expansivity of one step (sgdstab.theory.expansion,
re-exported here), the non-convex t0 bound of a step-size schedule, and assess_run, which the
tracker asks every epoch. Pure functions of numpy arrays, built on sgdstab.bounds (numpy, scipy and
the standard library only; no torch). Provenance as in sgdstab.bounds: HRS 2016 from memory.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .bounds import (
    _PLAIN_SGD,
    HRS,
    MCDIARMID,
    Bound,
    _batch_sizes,
    _delta,
    _fails,
    _holds,
    _integer_train_size,
    _integers,
    _non_negative,
    _optional_positive,
    _positive,
    _regime,
    _regime_assumptions,
    _step_sizes,
    _train_size,
    check_regime,
)
from .confidence import high_probability_gap
from .expansion import _expansion_for, expansion_convex, expansion_smooth, expansion_strongly_convex

__all__ = ["expansion_convex", "expansion_strongly_convex", "expansion_smooth",
           "expected_divergence", "pathwise_divergence", "all_index_pathwise",
           "nonconvex_schedule_bound", "RunBounds", "assess_run"]

_SAMPLING = "the swapped index is in step t's batch b_t/n times on average (uniform sampling)"


# ---------------------------------------------------------------------------------------------
# Input checks of the recursions (ValueError with a clear message)


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
    # For eta >= 1 (convex, non-convex) this is the paper's ((b - m) eta + m) / b exactly; for
    # eta < 1 (strongly convex) it is the sharper eta d_t + 2 alpha L m / b, the form whose mean
    # over the sampling is the paper's expected recursion.
    factor = eta - (eta - np.minimum(eta, 1.0)) * m / b
    return factor, 2.0 * a * lipschitz * m / b


def expected_divergence(
    step_sizes: Sequence[float] | np.ndarray,
    batch_sizes: Sequence[int] | np.ndarray | int,
    n: float,
    lipschitz: float,
    expansion: Sequence[float] | np.ndarray,
) -> np.ndarray:
    """E delta_{t+1} <= eta_t E delta_t + 2 alpha_t L / n from delta_0 = 0; returns t = 0..T.

    Source: HRS 2016 growth recursion (statement from memory). Assumes step t is
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
    step_sizes: Sequence[float] | np.ndarray,
    batch_sizes: Sequence[int] | np.ndarray | int,
    hits: Sequence[int] | np.ndarray,
    lipschitz: float,
    expansion: Sequence[float] | np.ndarray,
) -> np.ndarray:
    """delta_{t+1} <= ((b_t - m_t) eta_t + m_t min(eta_t, 1)) / b_t delta_t + 2 alpha_t L m_t / b_t.

    m_t = hits[t]: how many times the shadow's swapped index is in step t's batch. Returns t = 0..T.
    Source: HRS 2016 growth lemma for a fixed sampling path (statement from memory).
    Assumes step t is eta_t-expansive on shared examples and (alpha_t L)-bounded.
    """
    a = _step_sizes(step_sizes)
    b = _batch_sizes(batch_sizes, a.size)
    m = _hit_counts(hits, b)
    if m.ndim != 1:
        raise ValueError("hits must be a 1-D sequence of per-step counts")
    eta = _expansion(expansion, a.size)
    return _trajectory(*_pathwise_factors(a, b, m, _positive("lipschitz", lipschitz), eta))


def _flat_batches(
    batch_indices: Sequence[Sequence[int] | np.ndarray] | np.ndarray, b: np.ndarray, n: int
) -> np.ndarray:
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
    step_sizes: Sequence[float] | np.ndarray,
    batch_sizes: Sequence[int] | np.ndarray | int,
    batch_indices: Sequence[Sequence[int] | np.ndarray] | np.ndarray,
    n: int,
    lipschitz: float,
    expansion: Sequence[float] | np.ndarray,
) -> np.ndarray:
    """Final pathwise bound (pathwise_divergence at step T) for every training index j = 0..n-1.

    batch_indices[t] holds the indices drawn at step t (repetition allowed); a (T, b) array or the
    flat 1-D concatenation of all steps' indices (length sum_t b_t) is accepted too. Source: HRS
    2016 growth lemma (statement from memory), HRS 2016 Sec. 2-3; assumptions as pathwise_divergence
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
# The t0 bound of a schedule for non-convex losses (HRS 2016, from memory)


def nonconvex_schedule_bound(
    step_sizes: Sequence[float] | np.ndarray,
    batch_sizes: Sequence[int] | np.ndarray | int,
    n: float,
    lipschitz: float,
    smoothness: float,
    loss_bound: float | None,
) -> Bound:
    """eps_stab <= min_t0 [ M min(1, sum_{t<=t0} b_t / n) + L E[delta_T | delta_t0 = 0] ].

    E[delta_T | delta_t0 = 0] runs the expected recursion with eta_t = 1 + alpha_t beta from t0.
    Source: HRS 2016, the t0 lemma for non-convex losses (statement from memory).
    Assumes f(.; z) in [0, M], L-Lipschitz, beta-smooth, any step sizes, plain SGD, steps sampled
    independently (after no hit in the first t0 steps, later hits keep chance b_t/n).
    """
    a = _step_sizes(step_sizes)
    b = _batch_sizes(batch_sizes, a.size)
    n, lipschitz = _train_size(n), _positive("lipschitz", lipschitz)
    beta = _positive("smoothness", smoothness)
    source = f"{HRS}, Lemma 3.11 (t0) with the expected growth recursion"
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
    step_sizes: Sequence[float] | np.ndarray,
    batch_sizes: Sequence[int] | np.ndarray | int,
    n: int,
    lipschitz: float,
    smoothness: float | None,
    strong_convexity: float = 0.0,
    loss_bound: float | None = None,
    shadow_hits: Sequence[Sequence[int] | np.ndarray] | np.ndarray = (),
    batch_indices: Sequence[Sequence[int] | np.ndarray] | np.ndarray | None = None,
    delta: float = 0.05,
    not_applicable_reason: str = "",
) -> RunBounds:
    """Every bound of HRS 2016 Sec. 2-3 for a recorded run of T steps and K shadows.

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
    expected_source = f"{HRS}, growth recursion (Sec. 3) in expectation over the sampling"
    uniform_source = (
        f"{HRS}, growth recursion (Sec. 3) on the recorded sampling path, max over indices"
    )
    if reason:
        unusable = _fails(reason, uniform_source, assumptions)
        return RunBounds(
            regime, (None,) * len(hits), False, reason,
            _fails(reason, expected_source, assumptions), unusable,
            _fails(reason, MCDIARMID, ()),
        )  # fmt: skip

    assert beta is not None  # check_regime gave a reason above when smoothness is not declared
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
        value = lipschitz * float(_final(eta, 2.0 * a * lipschitz / n))
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
