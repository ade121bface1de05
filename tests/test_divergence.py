"""Tests of sgdstab.theory.divergence: expansivity, the divergence recursions (expected, pathwise,
every index at once), the non-convex t0 bound of a schedule, and assess_run.

"HRS 2016" is Hardt, Recht & Singer 2016, "Train faster, generalize better" (statements from
memory); "SCIENCE.md" is /work/shared/SCIENCE.md. Checks of the recursions against the closed forms
of sgdstab.bounds live in tests/test_bounds.py.
"""

import numpy as np
import pytest

from sgdstab.theory import bounds, divergence


def _random_run(seed, steps=40, n=9, max_batch=5, with_replacement=True):
    rng = np.random.default_rng(seed)
    step_sizes = rng.uniform(0, 0.3, steps)
    batch_sizes = rng.integers(1, max_batch + 1, steps)
    if with_replacement:  # repeated indices within a batch
        batches = [rng.integers(0, n, b) for b in batch_sizes]
    else:
        batches = [rng.choice(n, b, replace=False) for b in batch_sizes]
    return step_sizes, batch_sizes, batches


def _hits(batches, j):
    return np.array([np.count_nonzero(batch == j) for batch in batches])


# --- recursions by hand --------------------------------------------------------------------------


def test_pathwise_with_eta_one_sums_the_hit_increments():
    # SCIENCE.md §2 pathwise recursion with eta = 1: ((b - m) + m) / b = 1, so by hand
    # delta_T = sum_t 2 alpha_t L m_t / b_t.
    step_sizes, batch_sizes = np.array([0.1, 0.2, 0.3, 0.4]), np.array([2, 3, 1, 4])
    hits = np.array([1, 0, 1, 2])
    path = divergence.pathwise_divergence(step_sizes, batch_sizes, hits, 2.0, np.ones(4))
    by_hand = [0, 2 * 0.1 * 2 / 2, 0.2, 0.2 + 2 * 0.3 * 2, 1.4 + 2 * 0.4 * 2 * 2 / 4]
    np.testing.assert_allclose(path, by_hand, rtol=1e-14)


def test_pathwise_hit_factor_hand_value():
    # SCIENCE.md §2 with eta = 1.5, b = 4, m = 1: factor ((4 - 1) 1.5 + 1) / 4 = 1.375.
    # Step 1 hits (delta_1 = 2 * 0.5 * 1 / 4 = 0.25), step 2 hits again: 0.25 * 1.375 + 0.25.
    path = divergence.pathwise_divergence([0.5, 0.5], [4, 4], [1, 1], 1.0, [1.5, 1.5])
    np.testing.assert_allclose(path, [0, 0.25, 0.25 * 1.375 + 0.25], rtol=1e-14)


@pytest.mark.parametrize("expansion", ["convex", "strongly_convex"])
def test_mean_over_indices_of_pathwise_is_the_expected_bound(expansion):
    # By hand: for eta <= 1 the pathwise step is linear in the hit count m_{t,j}, and
    # sum_j m_{t,j} = b_t, so the mean over the n indices is exactly the expected recursion.
    step_sizes, batch_sizes, batches = _random_run(3, steps=60, n=11)
    if expansion == "convex":
        eta = divergence.expansion_convex(step_sizes, 6.0)
    else:
        eta = divergence.expansion_strongly_convex(step_sizes, 6.0, 0.7)
    per_index = divergence.all_index_pathwise(step_sizes, batch_sizes, batches, 11, 1.3, eta)
    expected = divergence.expected_divergence(step_sizes, batch_sizes, 11, 1.3, eta)
    assert per_index.mean() == pytest.approx(expected[-1], rel=1e-12)


def test_nonconvex_schedule_bound_t0_extremes_by_hand():
    # t0 = T: M * min(1, sum b / n); t0 = 0: L E delta_T. One step of size 0.1, b = 2, n = 10,
    # L = M = 1: t0 = 1 gives 0.2, t0 = 0 gives 2 * 0.1 / 10 = 0.02 -> the minimum, t0 = 0.
    bound = divergence.nonconvex_schedule_bound([0.1], [2], 10, 1.0, 3.0, 1.0)
    assert bound.value == pytest.approx(0.02) and bound.t0 == 0
    big = divergence.nonconvex_schedule_bound([100.0], [2], 10, 1.0, 3.0, 1.0)
    assert big.value == pytest.approx(0.2) and big.t0 == 1


# --- all indices at once -------------------------------------------------------------------------


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("regime", ["convex", "strongly_convex", "nonconvex"])
def test_all_index_pathwise_equals_per_index_pathwise(seed, regime):
    n = 9
    step_sizes, batch_sizes, batches = _random_run(seed, n=n, with_replacement=seed % 2 == 0)
    eta = {
        "convex": divergence.expansion_convex(step_sizes, 5.0),
        "strongly_convex": divergence.expansion_strongly_convex(step_sizes, 5.0, 1.1),
        "nonconvex": divergence.expansion_smooth(step_sizes, 5.0),
    }[regime]
    per_index = divergence.all_index_pathwise(step_sizes, batch_sizes, batches, n, 0.8, eta)
    assert per_index.shape == (n,)
    for j in range(n):
        path = divergence.pathwise_divergence(step_sizes, batch_sizes, _hits(batches, j), 0.8, eta)
        assert per_index[j] == pytest.approx(path[-1], rel=1e-11, abs=1e-300)


def test_all_index_pathwise_mixed_expansion_and_two_dimensional_batches():
    rng = np.random.default_rng(7)
    steps, n, batch = 50, 6, 3
    step_sizes = rng.uniform(0, 0.5, steps)
    eta = rng.uniform(0.6, 1.6, steps)  # some steps contract, some expand
    batches = rng.integers(0, n, (steps, batch))
    per_index = divergence.all_index_pathwise(
        step_sizes, np.full(steps, batch), batches, n, 1.0, eta
    )
    for j in range(n):
        path = divergence.pathwise_divergence(
            step_sizes, np.full(steps, batch), _hits(batches, j), 1.0, eta
        )
        assert per_index[j] == pytest.approx(path[-1], rel=1e-11)


def test_all_index_pathwise_accepts_the_flat_concatenation():
    step_sizes, batch_sizes, batches = _random_run(8, n=10)
    eta = divergence.expansion_strongly_convex(step_sizes, 5.0, 0.5)
    listed = divergence.all_index_pathwise(step_sizes, batch_sizes, batches, 10, 1.0, eta)
    flat = divergence.all_index_pathwise(
        step_sizes, batch_sizes, np.concatenate(batches), 10, 1.0, eta
    )
    np.testing.assert_array_equal(listed, flat)
    with pytest.raises(ValueError, match="flat batch_indices"):
        divergence.all_index_pathwise(step_sizes, batch_sizes, np.zeros(3, int), 10, 1.0, eta)


def test_index_never_drawn_has_zero_bound_and_a_full_batch_of_one_index():
    per_index = divergence.all_index_pathwise(
        [0.1, 0.1], [2, 2], [[0, 0], [0, 0]], 3, 1.0, [1.2, 1.2]
    )
    # By hand: m = b = 2 at both steps, factor ((2-2) 1.2 + 2) / 2 = 1, increments 2 * 0.1 each.
    np.testing.assert_allclose(per_index, [0.4, 0.0, 0.0])


def test_divergence_overflow_gives_inf_not_nan():
    steps = 20000
    a = np.full(steps, 0.5)
    eta = divergence.expansion_smooth(a, 10.0)  # 6^20000 overflows
    # b = 2, m = 1: factor (6 + 1) / 2 = 3.5 per step (with m = b it would be min(eta, 1) = 1).
    path = divergence.pathwise_divergence(a, np.full(steps, 2), np.ones(steps, int), 1.0, eta)
    assert not np.any(np.isnan(path)) and np.isinf(path[-1])
    expected = divergence.expected_divergence(a, np.ones(steps, int), 100, 1.0, eta)
    assert not np.any(np.isnan(expected))
    # Strongly convex with eta = 0 at a step (beta = gamma, alpha = 1/beta): the past is forgotten.
    contract = divergence.pathwise_divergence([0.5, 0.5], [1, 1], [1, 1], 1.0, [0.0, 0.0])
    np.testing.assert_allclose(contract, [0, 1.0, 1.0], rtol=1e-12)


# --- not applicable ------------------------------------------------------------------------------


def test_non_sgd_reason_makes_every_bound_not_applicable():
    reason = "optimizer uses momentum 0.9: the bounds are proved for plain SGD"
    run = divergence.assess_run(
        regime="convex", step_sizes=[0.1] * 4, batch_sizes=[2] * 4, n=10, lipschitz=1.0,
        smoothness=1.0, loss_bound=1.0, shadow_hits=[[0, 1, 0, 0], [1, 1, 0, 0]],
        batch_indices=[[0, 1]] * 4, not_applicable_reason=reason,
    )  # fmt: skip
    assert run.path_bound == (None, None) and not run.path_applicable
    for bound in (run.expected, run.uniform_stability, run.high_probability):
        assert not bound.applicable and bound.value is None and bound.reason == reason
    assert run.path_reason == reason


def test_uniform_stability_needs_batch_indices_and_a_convex_regime():
    common = dict(step_sizes=[0.1] * 3, batch_sizes=[1] * 3, n=10, lipschitz=1.0, smoothness=1.0)
    run = divergence.assess_run(regime="convex", loss_bound=1.0, **common)
    assert run.uniform_stability.reason == "batch indices not recorded"
    assert not run.high_probability.applicable
    nonconvex = divergence.assess_run(regime="nonconvex", batch_indices=[[0], [1], [2]], **common)
    assert not nonconvex.uniform_stability.applicable
    assert "convex and strongly convex regimes only" in nonconvex.uniform_stability.reason


@pytest.mark.parametrize(
    "change, message",
    [
        (dict(lipschitz=0.0), "lipschitz"),
        (dict(lipschitz=float("nan")), "lipschitz"),
        (dict(smoothness=-1.0), "smoothness"),
        (dict(n=1), "n "),
        (dict(delta=1.0), "delta"),
        (dict(delta=0.0), "delta"),
        (dict(step_sizes=[0.1, -0.1, 0.1]), "step 2"),
        (dict(step_sizes=[0.1, float("nan"), 0.1]), "finite"),
        (dict(loss_bound=0.0), "loss_bound"),
        (dict(regime="quadratic"), "regime"),
        (dict(batch_sizes=[1, 0, 1]), "batch sizes"),
        (dict(shadow_hits=[[2, 0, 0]]), "hit counts"),
        (dict(batch_indices=[[0], [10], [1]]), "batch indices"),
        (dict(batch_indices=[[0], [1, 2], [1]]), "step 2"),
        (dict(regime="strongly_convex", strong_convexity=0.0), "strong_convexity"),
    ],
)
def test_assess_run_rejects_invalid_inputs(change, message):
    inputs = dict(
        regime="convex", step_sizes=[0.1] * 3, batch_sizes=[1] * 3, n=10, lipschitz=1.0,
        smoothness=1.0, delta=0.05,
    )  # fmt: skip
    inputs.update(change)
    with pytest.raises(ValueError, match=message):
        divergence.assess_run(**inputs)


# --- assess_run ----------------------------------------------------------------------------------


def test_assess_run_convex_numbers_by_hand():
    # n = 4, L = 2, alpha = 0.1, b = 2, batches {0,1}, {0,2}, {3,3}: index 0 is hit twice, so by
    # hand its pathwise bound is 2 * (2 * 0.1 * 2 / 2) = 0.4; index 3 is twice in one batch: 0.4.
    # Expected (HRS 2016 convex, from memory): 2 L^2 / n * 0.3 = 0.6.
    run = divergence.assess_run(
        regime="convex", step_sizes=[0.1] * 3, batch_sizes=[2] * 3, n=4, lipschitz=2.0,
        smoothness=1.0, loss_bound=1.0, shadow_hits=[[1, 1, 0], [0, 0, 2], [0, 0, 0]],
        batch_indices=[[0, 1], [0, 2], [3, 3]], delta=0.1,
    )  # fmt: skip
    assert run.path_bound == pytest.approx((0.4, 0.4, 0.0))
    assert run.expected.value == pytest.approx(0.6)
    assert run.uniform_stability.value == pytest.approx(2.0 * 0.4)
    assert run.high_probability.value == pytest.approx(
        bounds.high_probability_gap(0.8, 4, 1.0, 0.1).value
    )


@pytest.mark.parametrize("regime", bounds.REGIMES)
def test_assess_run_with_zero_steps_gives_zero_bounds(regime):
    run = divergence.assess_run(
        regime=regime, step_sizes=[], batch_sizes=[], n=10, lipschitz=1.0, smoothness=1.0,
        strong_convexity=0.5, loss_bound=1.0, shadow_hits=[[], []], batch_indices=[],
    )  # fmt: skip
    assert run.path_bound == (0.0, 0.0) and run.expected.value == 0.0
    if regime != "nonconvex":
        assert run.uniform_stability.value == 0.0


@pytest.mark.parametrize("regime", bounds.REGIMES)
def test_assess_run_agrees_with_the_pieces(regime):
    step_sizes, batch_sizes, batches = _random_run(11, steps=80, n=12)
    hits = [_hits(batches, j) for j in (0, 5)]
    beta, gamma = 3.0, 0.4
    run = divergence.assess_run(
        regime=regime, step_sizes=step_sizes, batch_sizes=batch_sizes, n=12, lipschitz=0.7,
        smoothness=beta, strong_convexity=gamma, loss_bound=2.0, shadow_hits=hits,
        batch_indices=batches,
    )  # fmt: skip
    eta = divergence._expansion_for(regime, step_sizes, beta, gamma)
    for value, hit in zip(run.path_bound, hits):
        path = divergence.pathwise_divergence(step_sizes, batch_sizes, hit, 0.7, eta)
        assert value == pytest.approx(path[-1], rel=1e-11)
    if regime == "nonconvex":
        assert run.expected == divergence.nonconvex_schedule_bound(
            step_sizes, batch_sizes, 12, 0.7, beta, 2.0
        )
    else:
        expected = divergence.expected_divergence(step_sizes, batch_sizes, 12, 0.7, eta)[-1]
        assert run.expected.value == pytest.approx(0.7 * expected, rel=1e-12)
        per_index = divergence.all_index_pathwise(step_sizes, batch_sizes, batches, 12, 0.7, eta)
        assert run.uniform_stability.value == pytest.approx(0.7 * per_index.max(), rel=1e-12)


def test_no_function_mutates_its_inputs():
    step_sizes, batch_sizes, batches = _random_run(4, steps=30, n=7)
    hits = _hits(batches, 2)
    eta = divergence.expansion_smooth(step_sizes, 2.0)
    arrays = [step_sizes, batch_sizes, hits, eta, *batches]
    copies = [x.copy() for x in arrays]
    divergence.expansion_convex(step_sizes, 2.0)
    divergence.expansion_strongly_convex(step_sizes, 2.0, 0.3)
    bounds.check_regime("convex", step_sizes, 2.0)
    divergence.expected_divergence(step_sizes, batch_sizes, 7, 1.0, eta)
    divergence.pathwise_divergence(step_sizes, batch_sizes, hits, 1.0, eta)
    divergence.all_index_pathwise(step_sizes, batch_sizes, batches, 7, 1.0, eta)
    divergence.all_index_pathwise(step_sizes, batch_sizes, batches, 7, 1.0, np.ones(30))
    bounds.convex_bound(step_sizes, 7, 1.0, smoothness=2.0)
    bounds.nonconvex_bound(0.3, 30, 7, 1.0, 2.0, step_sizes=step_sizes)
    divergence.nonconvex_schedule_bound(step_sizes, batch_sizes, 7, 1.0, 2.0, 1.0)
    for regime in bounds.REGIMES:
        divergence.assess_run(
            regime=regime, step_sizes=step_sizes, batch_sizes=batch_sizes, n=7, lipschitz=1.0,
            smoothness=2.0, strong_convexity=0.3, loss_bound=1.0, shadow_hits=[hits],
            batch_indices=batches,
        )  # fmt: skip
    for original, copy in zip(arrays, copies):
        np.testing.assert_array_equal(original, copy)
