"""Closed forms of sgdstab.bounds against the published formulas and numpy/scipy.

Sources named beside each check. "HRS 2016" is Hardt, Recht & Singer 2016, "Train faster,
generalize better"; its statements are from memory (the stored copies of the paper only showed its
opening), so each closed form is also re-derived here from the recursion it summarises.
"""

import math

import numpy as np
import pytest
from scipy import optimize

from sgdstab.theory import bounds


def test_convex_closed_form_hand_value():
    # HRS 2016, convex case (from memory): eps <= (2 L^2 / n) sum_t alpha_t.
    # By hand: 2 * 2^2 / 10 * (0.1 + 0.2 + 0.3) = 0.8 * 0.6 = 0.48.
    bound = bounds.convex_bound([0.1, 0.2, 0.3], 10, 2.0, smoothness=4.0)
    assert bound.applicable
    assert bound.value == pytest.approx(0.48, rel=1e-15)
    assert "Thm 3.8" in bound.source   # theorem numbering as recalled (from memory)


def test_strongly_convex_limit_hand_value():
    # HRS 2016, strongly convex case (from memory): eps <= 2 L^2 / (gamma n).
    # By hand: 2 * 1 / (0.5 * 100) = 0.04, independent of the step size and of T.
    assert bounds.strongly_convex_bound(0.1, 100, 1.0, 0.5).value == pytest.approx(0.04, rel=1e-15)
    assert bounds.strongly_convex_bound(0.3, 100, 1.0, 0.5).value == pytest.approx(0.04, rel=1e-15)


def test_strongly_convex_finite_sum_hand_value():
    # HRS 2016 (from memory), finite-T form (2 alpha L^2 / n) sum_{k<T} (1 - alpha gamma)^k.
    # By hand, alpha = 0.1, gamma = 0.5, L = 1, n = 100, T = 2: 0.002 * (1 + 0.95) = 0.0039.
    value = bounds.strongly_convex_bound(0.1, 100, 1.0, 0.5, steps=2, smoothness=1.0).value
    assert value == pytest.approx(0.0039, rel=1e-14)


@pytest.mark.parametrize("steps", [0, 1, 7, 50, 400])
def test_strongly_convex_finite_sum_against_numpy(steps):
    # Same statement; the sum evaluated term by term with numpy.
    alpha, gamma, lipschitz, n = 0.05, 0.8, 1.7, 300
    direct = 2 * alpha * lipschitz**2 / n * np.sum((1 - alpha * gamma) ** np.arange(steps))
    value = bounds.strongly_convex_bound(alpha, n, lipschitz, gamma, steps=steps).value
    assert value == pytest.approx(direct, rel=1e-13, abs=1e-300)
    assert value <= 2 * lipschitz**2 / (gamma * n)


def test_nonconvex_closed_form_hand_value():
    # HRS 2016, non-convex case (from memory):
    # eps <= (1 + 1/(beta c)) / (n - 1) * (2 c L^2)^(1/(beta c + 1)) * T^(beta c / (beta c + 1)).
    # By hand, beta = c = L = 1, n = 11, T = 16: (2 / 10) * 2^(1/2) * 16^(1/2) = 0.8 sqrt(2).
    value = bounds.nonconvex_bound(1.0, 16, 11, 1.0, 1.0).value
    assert value == pytest.approx(0.8 * math.sqrt(2), rel=1e-14)


@pytest.mark.parametrize(
    "beta, c, lipschitz, n, steps", [(1, 1, 1, 11, 16), (2, 0.3, 1.5, 1000, 10**5)]
)
def test_nonconvex_closed_form_is_the_optimised_t0_trade_off(beta, c, lipschitz, n, steps):
    # HRS 2016 (from memory): for alpha_t <= c/t the t0 lemma gives
    #   eps <= t0 / n + L * E[delta_T | delta_t0 = 0],
    #   E[delta_T | delta_t0 = 0] <= 2 L / (beta (n - 1)) (T / t0)^(beta c)
    # (products bounded by exp((1 - 1/n) c beta / k), the sum by the integral of t^(-c beta - 1)).
    # With t0 / n <= t0 / (n - 1), setting the derivative in t0 to 0 gives
    # t0^(q+1) = 2 c L^2 T^q (q = beta c) and the value t0 (1 + 1/q) / (n - 1): the closed form.
    # Re-derived numerically with scipy:
    q = beta * c

    def trade_off(t0):
        return t0 / (n - 1) + 2 * lipschitz**2 / (beta * (n - 1)) * (steps / t0) ** q

    best = optimize.minimize_scalar(trade_off, bounds=(1e-9, 10 * steps), method="bounded",
                                    options={"xatol": 1e-10})  # fmt: skip
    assert best.x == pytest.approx(
        (2 * c * lipschitz**2) ** (1 / (q + 1)) * steps ** (q / (q + 1)), rel=1e-5
    )
    closed = bounds.nonconvex_bound(c, steps, n, lipschitz, beta).value
    assert closed == pytest.approx(best.fun, rel=1e-9)


def test_mcdiarmid_gap_hand_value():
    # SCIENCE.md §3 (McDiarmid): beta_n + (2 n beta_n + M) sqrt(ln(1/delta) / (2n)).
    # By hand with ln(1/delta) = 2, n = 100: sqrt(2/200) = 0.1, so 0.01 + (2 + 1) * 0.1 = 0.31.
    delta = math.exp(-2)
    assert bounds.high_probability_gap(0.01, 100, 1.0, delta).value == pytest.approx(
        0.31, rel=1e-14
    )
    # Two-sided: ln(2/delta) = ln 2 + 2.
    two = bounds.high_probability_gap(0.01, 100, 1.0, delta, two_sided=True).value
    assert two == pytest.approx(0.01 + 3 * math.sqrt((math.log(2) + 2) / 200), rel=1e-14)


def test_mcdiarmid_gap_solves_the_inequality():
    # McDiarmid's inequality: P(D - E D >= eps) <= exp(-2 eps^2 / (n c^2)) with bounded differences
    # c = 2 beta_n + M / n (SCIENCE.md §3). Solve exp(...) = delta for eps (scipy); E D <= beta_n.
    beta_n, n, m, delta = 0.003, 500, 2.0, 0.01
    c = 2 * beta_n + m / n
    eps = optimize.brentq(lambda e: math.exp(-2 * e**2 / (n * c**2)) - delta, 0, 10)
    value = bounds.high_probability_gap(beta_n, n, m, delta).value
    assert value == pytest.approx(beta_n + eps, rel=1e-10)


def test_bousquet_elisseeff_hand_value():
    # Bousquet & Elisseeff 2002, Thm 12 (also as restated in Zhou, "Machine Learning", Thm 12.8):
    # R <= R_emp + 2 beta + (4 n beta + M) sqrt(ln(1/delta) / (2n)).
    # By hand with ln(1/delta) = 2, n = 100, beta = 0.01, M = 1: 0.02 + 5 * 0.1 = 0.52.
    value = bounds.bousquet_elisseeff_gap(0.01, 100, 1.0, math.exp(-2)).value
    assert value == pytest.approx(0.52, rel=1e-14)


def test_expansion_factors_hand_values():
    # HRS 2016 expansivity (from memory) and SCIENCE.md §2: 1, 1 - alpha gamma, 1 + alpha beta.
    alpha = [0.1, 0.25]
    np.testing.assert_array_equal(bounds.expansion_convex(alpha, 4.0), [1.0, 1.0])
    np.testing.assert_allclose(bounds.expansion_strongly_convex(alpha, 4.0, 0.4), [0.96, 0.9])
    np.testing.assert_allclose(bounds.expansion_smooth(alpha, 4.0), [1.4, 2.0])


@pytest.mark.parametrize("seed", range(5))
def test_expansion_factors_bound_the_gradient_map_of_quadratics(seed):
    # SCIENCE.md §2, checked with numpy.linalg.norm on quadratics f(w) = w^T H w / 2, whose gradient
    # map G(w) = (I - alpha H) w has Lipschitz constant ||I - alpha H||_2.
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.normal(size=(6, 6)))
    beta, gamma = 3.0, 0.5
    eigen_convex = np.r_[gamma, beta, rng.uniform(gamma, beta, 4)]
    hessian = q @ np.diag(eigen_convex) @ q.T
    for alpha in [0.1, 2 / (beta + gamma)]:  # strongly convex: alpha <= 2/(beta + gamma)
        lipschitz_g = np.linalg.norm(np.eye(6) - alpha * hessian, 2)
        assert lipschitz_g <= bounds.expansion_strongly_convex([alpha], beta, gamma)[0] + 1e-12
    hessian0 = q @ np.diag(np.r_[0.0, beta, rng.uniform(0, beta, 4)]) @ q.T  # convex
    assert np.linalg.norm(np.eye(6) - 2 / beta * hessian0, 2) <= 1 + 1e-12
    hessian_any = q @ np.diag(np.r_[-beta, beta, rng.uniform(-beta, beta, 4)]) @ q.T  # non-convex
    for alpha in [0.1, 1.0, 5.0]:
        lipschitz_g = np.linalg.norm(np.eye(6) - alpha * hessian_any, 2)
        assert lipschitz_g <= bounds.expansion_smooth([alpha], beta)[0] + 1e-12


@pytest.mark.parametrize(
    "schedule",
    [
        bounds.Schedule("constant", 0.2),
        bounds.Schedule("step-decay", 0.5, decay_factor=0.3, decay_every=7),
        bounds.Schedule("step-decay", 0.5, decay_factor=1.0, decay_every=7),
        bounds.Schedule("c-over-t", 0.9),
        bounds.Schedule("cosine", 0.4, total_steps=60),
    ],
)
def test_schedule_total_step_size_against_numpy_sum(schedule):
    # Closed-form sums (geometric series; harmonic numbers via scipy.special.digamma) vs np.sum.
    for steps in [0, 1, 6, 7, 8, 45, 60]:
        direct = float(np.sum(schedule.step_sizes(steps)))
        assert schedule.total_step_size(steps) == pytest.approx(direct, rel=1e-13, abs=1e-300)
