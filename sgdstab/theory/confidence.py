"""High-probability conversion of a uniform stability bound (McDiarmid; Bousquet & Elisseeff 2002).

Pure functions; numpy, scipy and the standard library only, no torch. Built on
sgdstab.theory.bounds, which re-exports both public functions. Provenance: Bousquet & Elisseeff
2002 (JMLR 2, "Stability and generalization"), Thm 12 form
2 beta + (4 n beta + M) sqrt(ln(1/delta) / (2n)): agrees with the restatement of that theorem in
Zhou, "Machine Learning", Thm 12.8, found with the search tool. The McDiarmid form (bounded
differences of the gap) is derived in high_probability_gap's comment.
"""

from __future__ import annotations

import math

from .bounds import (
    BOUSQUET_ELISSEEFF,
    MCDIARMID,
    Bound,
    _delta,
    _fails,
    _holds,
    _positive,
    _train_size,
)

__all__ = ["high_probability_gap", "bousquet_elisseeff_gap"]


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

    two_sided: |R - R_S| <= the same with ln(2/delta). Source: McDiarmid's inequality
    (McDiarmid 1989; derivation below), as used by Bousquet & Elisseeff 2002. Assumes A is
    beta_n-uniformly stable under replacement of one example, loss in [0, M], i.i.d. sample of
    size n.
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
