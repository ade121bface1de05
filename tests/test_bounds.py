"""Tests of sgdstab.bounds: recursions, applicability, monotonicity, Monte Carlo, planner, runs.

"HRS 2016" is Hardt, Recht & Singer 2016, "Train faster, generalize better" (statements from
memory); "SCIENCE.md" is /work/shared/SCIENCE.md. Closed forms against outside values live in
tests/test_reference_bounds.py.
"""

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from sgdstab import bounds

BOUNDS_FILE = Path(bounds.__file__)


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


# --- import hygiene ----------------------------------------------------------------------------


def test_bounds_imports_without_torch():
    # bounds.py loaded by path (not through the package __init__) with torch made unimportable.
    code = f"""
import importlib.abc, importlib.util, sys
class NoTorch(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name == "torch" or name.startswith("torch."):
            raise ImportError("torch is blocked in this test")
sys.meta_path.insert(0, NoTorch())
spec = importlib.util.spec_from_file_location("standalone_bounds", {str(BOUNDS_FILE)!r})
module = sys.modules["standalone_bounds"] = importlib.util.module_from_spec(spec)
spec.loader.exec_module(module)
assert not [m for m in sys.modules if m == "torch" or m.startswith("torch.")]
print(module.convex_bound([0.1], 10, 1.0).value)
"""
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    assert float(result.stdout) == pytest.approx(0.02)


def test_bounds_imports_only_numpy_scipy_and_the_standard_library():
    source = BOUNDS_FILE.read_text()
    imported = {
        line.split()[1].split(".")[0]
        for line in source.splitlines()
        if line.startswith(("import ", "from "))
    }
    standard = {"__future__", "collections", "dataclasses", "functools", "math"}
    assert imported <= standard | {"numpy", "scipy"}


# --- recursions reproduce the closed forms -------------------------------------------------------


@pytest.mark.parametrize("batch", [1, 4])
def test_expected_recursion_with_eta_one_is_the_convex_sum(batch):
    # HRS 2016 convex case (from memory). By hand: with eta = 1 the recursion only adds,
    # E delta_T = sum_t 2 alpha_t L / n, so L E delta_T = (2 L^2 / n) sum_t alpha_t exactly.
    step_sizes = np.array([0.1, 0.05, 0.2, 0.2, 0.01])
    n, lipschitz = 50, 1.5
    expected = bounds.expected_divergence(
        step_sizes, np.full(5, batch), n, lipschitz, bounds.expansion_convex(step_sizes, 4.0)
    )
    np.testing.assert_allclose(expected, np.r_[0, np.cumsum(2 * step_sizes * lipschitz / n)])
    closed = bounds.convex_bound(step_sizes, n, lipschitz, smoothness=4.0).value
    assert lipschitz * expected[-1] == pytest.approx(closed, rel=1e-14)


@pytest.mark.parametrize("batch", [1, 8])
def test_expected_recursion_is_the_strongly_convex_finite_sum(batch):
    # HRS 2016 strongly convex case (from memory). By hand: x_{t+1} = q x_t + 2 alpha L / n with
    # q = 1 - alpha gamma gives x_T = (2 alpha L / n) sum_{k<T} q^k <= 2 L / (gamma n).
    alpha, gamma, lipschitz, n, steps = 0.2, 0.9, 1.2, 64, 300
    a = np.full(steps, alpha)
    eta = bounds.expansion_strongly_convex(a, 2.0, gamma)
    expected = bounds.expected_divergence(a, np.full(steps, batch), n, lipschitz, eta)
    for t in [0, 1, 2, 17, steps]:
        finite = bounds.strongly_convex_bound(alpha, n, lipschitz, gamma, steps=t, smoothness=2.0)
        assert lipschitz * expected[t] == pytest.approx(finite.value, rel=1e-12, abs=1e-300)
    limit = bounds.strongly_convex_bound(alpha, n, lipschitz, gamma).value
    assert lipschitz * expected[-1] <= limit


def test_pathwise_with_eta_one_sums_the_hit_increments():
    # SCIENCE.md §2 pathwise recursion with eta = 1: ((b - m) + m) / b = 1, so by hand
    # delta_T = sum_t 2 alpha_t L m_t / b_t.
    step_sizes, batch_sizes = np.array([0.1, 0.2, 0.3, 0.4]), np.array([2, 3, 1, 4])
    hits = np.array([1, 0, 1, 2])
    path = bounds.pathwise_divergence(step_sizes, batch_sizes, hits, 2.0, np.ones(4))
    by_hand = [0, 2 * 0.1 * 2 / 2, 0.2, 0.2 + 2 * 0.3 * 2, 1.4 + 2 * 0.4 * 2 * 2 / 4]
    np.testing.assert_allclose(path, by_hand, rtol=1e-14)


def test_pathwise_hit_factor_hand_value():
    # SCIENCE.md §2 with eta = 1.5, b = 4, m = 1: factor ((4 - 1) 1.5 + 1) / 4 = 1.375.
    # Step 1 hits (delta_1 = 2 * 0.5 * 1 / 4 = 0.25), step 2 hits again: 0.25 * 1.375 + 0.25.
    path = bounds.pathwise_divergence([0.5, 0.5], [4, 4], [1, 1], 1.0, [1.5, 1.5])
    np.testing.assert_allclose(path, [0, 0.25, 0.25 * 1.375 + 0.25], rtol=1e-14)


@pytest.mark.parametrize("expansion", ["convex", "strongly_convex"])
def test_mean_over_indices_of_pathwise_is_the_expected_bound(expansion):
    # By hand: for eta <= 1 the pathwise step is linear in the hit count m_{t,j}, and
    # sum_j m_{t,j} = b_t, so the mean over the n indices is exactly the expected recursion.
    step_sizes, batch_sizes, batches = _random_run(3, steps=60, n=11)
    if expansion == "convex":
        eta = bounds.expansion_convex(step_sizes, 6.0)
    else:
        eta = bounds.expansion_strongly_convex(step_sizes, 6.0, 0.7)
    per_index = bounds.all_index_pathwise(step_sizes, batch_sizes, batches, 11, 1.3, eta)
    expected = bounds.expected_divergence(step_sizes, batch_sizes, 11, 1.3, eta)
    assert per_index.mean() == pytest.approx(expected[-1], rel=1e-12)


def test_nonconvex_schedule_bound_is_within_the_closed_form():
    # HRS 2016 non-convex case (from memory): the closed form loosens the t0 argument (products
    # bounded by exponentials, sums by integrals, n by n - 1), so the computed t0 bound with the
    # same assumptions (alpha_t = c/t, b = 1, M = 1) is below it, and not far below.
    for beta, c, n, steps in [
        (1.0, 1.0, 50, 100),
        (2.0, 0.5, 1000, 20000),
        (0.5, 3.0, 50000, 5000),
    ]:
        step_sizes = c / np.arange(1, steps + 1)
        schedule = bounds.nonconvex_schedule_bound(step_sizes, 1, n, 1.0, beta, 1.0)
        closed = bounds.nonconvex_bound(c, steps, n, 1.0, beta, step_sizes=step_sizes)
        assert closed.applicable
        assert closed.value < 1  # not vacuous (f in [0, 1])
        assert 0.5 * closed.value <= schedule.value <= closed.value
        assert 0 < schedule.t0 < steps
        assert f"best t0 = {schedule.t0}" in " ".join(schedule.assumptions)


def test_nonconvex_schedule_bound_t0_extremes_by_hand():
    # t0 = T: M * min(1, sum b / n); t0 = 0: L E delta_T. One step of size 0.1, b = 2, n = 10,
    # L = M = 1: t0 = 1 gives 0.2, t0 = 0 gives 2 * 0.1 / 10 = 0.02 -> the minimum, t0 = 0.
    bound = bounds.nonconvex_schedule_bound([0.1], [2], 10, 1.0, 3.0, 1.0)
    assert bound.value == pytest.approx(0.02) and bound.t0 == 0
    big = bounds.nonconvex_schedule_bound([100.0], [2], 10, 1.0, 3.0, 1.0)
    assert big.value == pytest.approx(0.2) and big.t0 == 1


# --- all indices at once ------------------------------------------------------------------------


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("regime", ["convex", "strongly_convex", "nonconvex"])
def test_all_index_pathwise_equals_per_index_pathwise(seed, regime):
    n = 9
    step_sizes, batch_sizes, batches = _random_run(seed, n=n, with_replacement=seed % 2 == 0)
    eta = {
        "convex": bounds.expansion_convex(step_sizes, 5.0),
        "strongly_convex": bounds.expansion_strongly_convex(step_sizes, 5.0, 1.1),
        "nonconvex": bounds.expansion_smooth(step_sizes, 5.0),
    }[regime]
    per_index = bounds.all_index_pathwise(step_sizes, batch_sizes, batches, n, 0.8, eta)
    assert per_index.shape == (n,)
    for j in range(n):
        path = bounds.pathwise_divergence(step_sizes, batch_sizes, _hits(batches, j), 0.8, eta)
        assert per_index[j] == pytest.approx(path[-1], rel=1e-11, abs=1e-300)


def test_all_index_pathwise_mixed_expansion_and_two_dimensional_batches():
    rng = np.random.default_rng(7)
    steps, n, batch = 50, 6, 3
    step_sizes = rng.uniform(0, 0.5, steps)
    eta = rng.uniform(0.6, 1.6, steps)  # some steps contract, some expand
    batches = rng.integers(0, n, (steps, batch))
    per_index = bounds.all_index_pathwise(step_sizes, np.full(steps, batch), batches, n, 1.0, eta)
    for j in range(n):
        path = bounds.pathwise_divergence(
            step_sizes, np.full(steps, batch), _hits(batches, j), 1.0, eta
        )
        assert per_index[j] == pytest.approx(path[-1], rel=1e-11)


def test_all_index_pathwise_accepts_the_flat_concatenation():
    step_sizes, batch_sizes, batches = _random_run(8, n=10)
    eta = bounds.expansion_strongly_convex(step_sizes, 5.0, 0.5)
    listed = bounds.all_index_pathwise(step_sizes, batch_sizes, batches, 10, 1.0, eta)
    flat = bounds.all_index_pathwise(step_sizes, batch_sizes, np.concatenate(batches), 10, 1.0, eta)
    np.testing.assert_array_equal(listed, flat)
    with pytest.raises(ValueError, match="flat batch_indices"):
        bounds.all_index_pathwise(step_sizes, batch_sizes, np.zeros(3, int), 10, 1.0, eta)


def test_index_never_drawn_has_zero_bound_and_a_full_batch_of_one_index():
    per_index = bounds.all_index_pathwise([0.1, 0.1], [2, 2], [[0, 0], [0, 0]], 3, 1.0, [1.2, 1.2])
    # By hand: m = b = 2 at both steps, factor ((2-2) 1.2 + 2) / 2 = 1, increments 2 * 0.1 each.
    np.testing.assert_allclose(per_index, [0.4, 0.0, 0.0])


def test_divergence_overflow_gives_inf_not_nan():
    steps = 20000
    a = np.full(steps, 0.5)
    eta = bounds.expansion_smooth(a, 10.0)  # 6^20000 overflows
    # b = 2, m = 1: factor (6 + 1) / 2 = 3.5 per step (with m = b it would be min(eta, 1) = 1).
    path = bounds.pathwise_divergence(a, np.full(steps, 2), np.ones(steps, int), 1.0, eta)
    assert not np.any(np.isnan(path)) and np.isinf(path[-1])
    expected = bounds.expected_divergence(a, np.ones(steps, int), 100, 1.0, eta)
    assert not np.any(np.isnan(expected))
    # Strongly convex with eta = 0 at a step (beta = gamma, alpha = 1/beta): the past is forgotten.
    contract = bounds.pathwise_divergence([0.5, 0.5], [1, 1], [1, 1], 1.0, [0.0, 0.0])
    np.testing.assert_allclose(contract, [0, 1.0, 1.0], rtol=1e-12)


# --- not applicable ------------------------------------------------------------------------------


def test_check_regime_messages_carry_the_numbers():
    # HRS 2016 expansivity conditions (from memory), SCIENCE.md §2.
    a = [0.1] * 11 + [0.9]
    assert bounds.check_regime("convex", a, 4.0) == "step size 0.9 at step 12 exceeds 2/beta = 0.5"
    assert bounds.check_regime("convex", [0.5], 4.0) == ""  # alpha = 2/beta exactly is allowed
    reason = bounds.check_regime("strongly_convex", [0.1, 0.55], 3.0, 1.0)
    assert reason == "step size 0.55 at step 2 exceeds 2/(beta+gamma) = 0.5"
    assert bounds.check_regime("strongly_convex", [0.5], 3.0, 1.0) == ""
    assert "exceeds smoothness" in bounds.check_regime("strongly_convex", [0.1], 1.0, 2.0)
    assert bounds.check_regime("nonconvex", [100.0], 1.0) == ""
    assert "not declared" in bounds.check_regime("convex", [0.1], None)


def test_convex_bound_not_applicable_above_two_over_beta():
    bound = bounds.convex_bound([0.1, 0.6], 100, 1.0, smoothness=4.0)
    assert not bound.applicable and bound.value is None
    assert bound.reason == "step size 0.6 at step 2 exceeds 2/beta = 0.5"
    unchecked = bounds.convex_bound([0.1, 0.6], 100, 1.0)
    assert unchecked.applicable and any("not checked" in a for a in unchecked.assumptions)


def test_strongly_convex_not_applicable_cases():
    # HRS 2016 strongly convex theorem (from memory) needs alpha <= 1/beta.
    bound = bounds.strongly_convex_bound(0.3, 100, 1.0, 0.5, smoothness=4.0)
    assert not bound.applicable and "exceeds 1/beta = 0.25" in bound.reason
    assert not bounds.strongly_convex_bound(3.0, 100, 1.0, 0.5).applicable  # alpha > 1/gamma
    # The recursion's condition alpha_t <= 2/(beta + gamma) (SCIENCE.md §2) in assess_run:
    run = bounds.assess_run(
        regime="strongly_convex", step_sizes=[0.1, 0.6], batch_sizes=[1, 1], n=10,
        lipschitz=1.0, smoothness=3.0, strong_convexity=1.0, shadow_hits=[[0, 1]],
    )  # fmt: skip
    assert not run.expected.applicable and not run.path_applicable
    assert run.path_reason == "step size 0.6 at step 2 exceeds 2/(beta+gamma) = 0.5"
    assert run.path_bound == (None,)


def test_nonconvex_closed_form_not_applicable_above_c_over_t():
    steps = 5
    ok = 0.5 / np.arange(1, steps + 1)
    assert bounds.nonconvex_bound(0.5, steps, 100, 1.0, 1.0, step_sizes=ok).applicable
    too_big = ok.copy()
    too_big[2] = 0.2  # step 3: 0.2 > 0.5 / 3
    bound = bounds.nonconvex_bound(0.5, steps, 100, 1.0, 1.0, step_sizes=too_big)
    assert not bound.applicable and bound.reason.startswith("step size 0.2 at step 3 exceeds c/t")
    rising = np.array([0.1, 0.1, 0.1, 0.12, 0.1])
    assert "increase" in bounds.nonconvex_bound(0.5, steps, 100, 1.0, 1.0, step_sizes=rising).reason


def test_missing_loss_bound_is_not_applicable():
    assert "loss bound" in bounds.nonconvex_schedule_bound([0.1], [1], 10, 1.0, 1.0, None).reason
    assert not bounds.high_probability_gap(0.1, 10, None, 0.05).applicable
    assert not bounds.bousquet_elisseeff_gap(0.1, 10, None, 0.05).applicable
    run = bounds.assess_run(
        regime="nonconvex", step_sizes=[0.1] * 3, batch_sizes=[1] * 3, n=10, lipschitz=1.0,
        smoothness=1.0, shadow_hits=[[1, 0, 0]],
    )  # fmt: skip
    assert not run.expected.applicable and "loss bound" in run.expected.reason
    assert run.path_applicable  # eta = 1 + alpha beta holds for any smooth loss
    convex = bounds.assess_run(
        regime="convex", step_sizes=[0.1] * 3, batch_sizes=[1] * 3, n=10, lipschitz=1.0,
        smoothness=1.0, batch_indices=[[0], [1], [0]],
    )  # fmt: skip
    assert convex.uniform_stability.applicable
    assert not convex.high_probability.applicable and "loss bound" in convex.high_probability.reason


def test_non_sgd_reason_makes_every_bound_not_applicable():
    reason = "optimizer uses momentum 0.9: the bounds are proved for plain SGD"
    run = bounds.assess_run(
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
    run = bounds.assess_run(regime="convex", loss_bound=1.0, **common)
    assert run.uniform_stability.reason == "batch indices not recorded"
    assert not run.high_probability.applicable
    nonconvex = bounds.assess_run(regime="nonconvex", batch_indices=[[0], [1], [2]], **common)
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
        bounds.assess_run(**inputs)


# --- monotonicity --------------------------------------------------------------------------------


def test_bounds_grow_with_steps_and_shrink_with_n():
    rng = np.random.default_rng(0)
    a = rng.uniform(0.01, 0.2, 400)
    for n in [100, 1000]:
        convex = [bounds.convex_bound(a[:t], n, 1.0).value for t in range(0, 400, 20)]
        strongly = [
            bounds.strongly_convex_bound(0.1, n, 1.0, 0.5, steps=t).value for t in range(0, 400, 20)
        ]
        closed = [bounds.nonconvex_bound(1.0, t, n, 1.0, 1.0).value for t in range(0, 400, 20)]
        schedule = [
            bounds.nonconvex_schedule_bound(a[:t], 1, n, 1.0, 1.0, 1.0).value
            for t in range(0, 400, 20)
        ]
        for values in (convex, strongly, closed, schedule):
            assert np.all(np.diff(values) >= 0) and values[-1] > values[0]
    for make in (
        lambda n: bounds.convex_bound(a, n, 1.0).value,
        lambda n: bounds.strongly_convex_bound(0.1, n, 1.0, 0.5, steps=50).value,
        lambda n: bounds.nonconvex_bound(1.0, 400, n, 1.0, 1.0).value,
        lambda n: bounds.nonconvex_schedule_bound(a, 1, n, 1.0, 1.0, 1.0).value,
        lambda n: bounds.high_probability_gap(1.0 / n, n, 1.0, 0.05).value,
    ):
        values = [make(n) for n in [1000, 10**4, 10**5, 10**6]]
        assert np.all(np.diff(values) < 0)


def test_high_probability_gap_shrinks_like_one_over_sqrt_n_when_beta_is_one_over_n():
    # Common practice (SCIENCE.md §5): beta_n ~ 1/n -> gap ~ 1/sqrt(n); fit the log-log slope.
    sizes = np.logspace(3, 8, 12)
    gaps = [bounds.high_probability_gap(2.0 / n, n, 1.0, 0.05).value for n in sizes]
    slope = np.polyfit(np.log(sizes), np.log(gaps), 1)[0]
    assert slope == pytest.approx(-0.5, abs=0.02)
    be = [bounds.bousquet_elisseeff_gap(2.0 / n, n, 1.0, 0.05).value for n in sizes]
    assert np.polyfit(np.log(sizes), np.log(be), 1)[0] == pytest.approx(-0.5, abs=0.02)


def test_high_probability_gap_does_not_vanish_when_beta_is_one_over_sqrt_n():
    # Common practice (SCIENCE.md §5): beta_n ~ 1/sqrt(n) -> the term
    # 2 n beta_n sqrt(ln(1/delta)/(2n)) tends to 2 sqrt(ln(1/delta) / 2) > 0.
    sizes = np.logspace(3, 10, 8)
    gaps = np.array(
        [bounds.high_probability_gap(1 / math.sqrt(n), n, 1.0, 0.05).value for n in sizes]
    )
    floor = 2 * math.sqrt(math.log(1 / 0.05) / 2)
    assert np.all(gaps >= floor)
    assert abs(np.polyfit(np.log(sizes), np.log(gaps), 1)[0]) < 0.05


# --- Monte Carlo: the high-probability statements hold -------------------------------------------


def _risk_of_absolute_loss(w, a, b):
    # R(w) = E|w - z| for z ~ Beta(a, b): w (2 F(w) - 1) + mu - 2 P(w), where the partial mean
    # P(w) = E[z; z < w] = mu F_{a+1, b}(w), because z f_{a,b}(z) = mu f_{a+1,b}(z).
    mu = a / (a + b)
    return w * (2 * stats.beta.cdf(w, a, b) - 1) + mu - 2 * mu * stats.beta.cdf(w, a + 1, b)


def test_risk_formula_of_the_monte_carlo_model():
    from scipy import integrate

    for w in [0.1, 0.3, 0.8]:

        def integrand(z, w=w):
            return abs(w - z) * stats.beta.pdf(z, 2, 5)

        direct = integrate.quad(integrand, 0, 1, points=[w])[0]
        assert _risk_of_absolute_loss(w, 2, 5) == pytest.approx(direct, rel=1e-8)


@pytest.mark.parametrize("n", [10, 40])
def test_monte_carlo_mean_estimator_meets_mcdiarmid_and_bousquet_elisseeff(n):
    # The algorithm A(S) = mean(S) for z in [0, 1] with loss f(w; z) = |w - z| in [0, 1] (M = 1).
    # Uniform stability, by hand: replacing z_i by z' moves the mean by |z_i - z'| / n <= 1/n, and f
    # is 1-Lipschitz in w, so beta_n = 1/n under replacement. Removing z_i: mean(S) - mean(S \ i) =
    # (z_i - mean(S \ i)) / n, again <= 1/n, so beta = 1/n under removal (Bousquet & Elisseeff).
    # Claim (McDiarmid, SCIENCE.md §3; B&E 2002 Thm 12): P(gap > bound) <= delta.
    rng = np.random.default_rng(2024 + n)
    a, b, delta, trials = 2.0, 5.0, 0.1, 4000
    samples = stats.beta.rvs(a, b, size=(trials, n), random_state=rng)
    w = samples.mean(axis=1)
    empirical = np.abs(w[:, None] - samples).mean(axis=1)
    gap = _risk_of_absolute_loss(w, a, b) - empirical
    mcdiarmid = bounds.high_probability_gap(1 / n, n, 1.0, delta).value
    be = bounds.bousquet_elisseeff_gap(1 / n, n, 1.0, delta).value
    assert np.mean(gap > mcdiarmid) <= delta
    assert np.mean(gap > be) <= delta
    assert np.mean(gap) <= 1 / n + 3 * gap.std() / math.sqrt(trials)  # E gap <= beta_n


def test_monte_carlo_constant_algorithm_where_mcdiarmid_is_nearly_tight():
    # A constant algorithm is 0-stable; with f(w; z) = z for z ~ Bernoulli(1/2), the gap is
    # 1/2 - mean(z) and the bound is Hoeffding's sqrt(ln(1/delta) / (2n)) (McDiarmid with beta = 0).
    # The exact chance of exceeding it, from scipy.stats.binom, is below delta but not far.
    rng = np.random.default_rng(5)
    n, delta, trials = 20, 0.05, 20000
    gap = 0.5 - rng.binomial(n, 0.5, size=trials) / n
    bound = bounds.high_probability_gap(0.0, n, 1.0, delta).value
    exact = stats.binom.cdf(math.ceil(n * (0.5 - bound)) - 1, n, 0.5)
    frequency = np.mean(gap > bound)
    assert frequency <= delta and exact <= delta
    assert frequency == pytest.approx(exact, abs=4 * math.sqrt(exact / trials))
    assert exact > delta / 20  # the bound is not vacuous here


# --- planner -------------------------------------------------------------------------------------

PROBLEMS = {
    "convex constant": dict(regime="convex", n=1000, lipschitz=1.0, smoothness=4.0,
                            schedule=bounds.Schedule("constant", 0.1)),
    "convex c/t": dict(regime="convex", n=500, lipschitz=2.0, smoothness=1.0,
                       schedule=bounds.Schedule("c-over-t", 0.5)),
    "strongly convex constant": dict(regime="strongly_convex", n=1000, lipschitz=1.0,
                                     smoothness=4.0, strong_convexity=0.5, schedule=0.1),
    "strongly convex step decay": dict(regime="strongly_convex", n=300, lipschitz=1.0,
                                       smoothness=2.0, strong_convexity=0.1,
                                       schedule=bounds.Schedule("step-decay", 0.5, 0.5, 40)),
    "nonconvex": dict(regime="nonconvex", n=2000, lipschitz=1.0, smoothness=1.0, loss_bound=1.0,
                      schedule=bounds.Schedule("constant", 0.05), batch_size=4),
    "convex high probability": dict(regime="convex", n=10**5, lipschitz=1.0, smoothness=4.0,
                                    loss_bound=1.0, schedule=0.1, bound="high_probability"),
}  # fmt: skip


def _at(steps, problem, **change):
    return bounds.planned_bound(steps, **{**problem, **change})


@pytest.mark.parametrize("name", sorted(PROBLEMS))
def test_max_steps_inverts_the_bound(name):
    problem = PROBLEMS[name]
    target = 0.5 * _at(300, problem).value
    answer = bounds.max_steps(target, **problem)
    assert answer.applicable and answer.quantity == "steps" and isinstance(answer.value, int)
    assert _at(answer.value, problem).value <= target < _at(answer.value + 1, problem).value
    assert answer.bound_at_value == _at(answer.value, problem).value


def test_max_steps_exact_inversions_by_hand():
    # Convex, constant alpha: T = floor(target n / (2 L^2 alpha)) = floor(0.05 * 1000 / 0.2) = 250.
    assert bounds.max_steps(0.05, **PROBLEMS["convex constant"]).value == 250
    # Strongly convex, constant alpha: 2 L^2 / (gamma n) = 0.004, and 0.004 (1 - 0.95^T) <= 0.002
    # -> T <= ln(0.5) / ln(0.95) = 13.5.
    assert bounds.max_steps(0.002, **PROBLEMS["strongly convex constant"]).value == 13


def test_max_steps_unbounded_and_horizon_answers():
    # The strongly convex bound never exceeds 2 L^2 / (gamma n) = 0.004: any number of steps.
    answer = bounds.max_steps(0.005, **PROBLEMS["strongly convex constant"])
    assert answer.unbounded and answer.value is None and "any number of steps" in answer.note
    # Convex step decay: sum alpha_t <= 0.1 * 10 / (1 - 0.5) = 2 -> bound <= 2 * 2 / 1000 = 0.004.
    decay = dict(PROBLEMS["convex constant"], schedule=bounds.Schedule("step-decay", 0.1, 0.5, 10))
    assert bounds.max_steps(0.0041, **decay).unbounded
    assert not bounds.max_steps(0.0039, **decay).unbounded
    cosine = dict(
        PROBLEMS["convex constant"], schedule=bounds.Schedule("cosine", 0.1, total_steps=100)
    )
    whole = bounds.max_steps(1.0, **cosine)
    assert whole.value == 100 and "whole schedule" in whole.note


def test_max_steps_not_applicable_and_infeasible():
    too_big = dict(PROBLEMS["convex constant"], schedule=0.9)
    answer = bounds.max_steps(0.05, **too_big)
    assert not answer.applicable and "exceeds 2/beta" in answer.reason
    # The high-probability gap is at least M sqrt(ln(1/delta) / (2n)) even with no steps.
    infeasible = bounds.max_steps(1e-4, **PROBLEMS["convex high probability"])
    assert infeasible.applicable and infeasible.value is None and "0 steps" in infeasible.reason
    nonconvex = dict(PROBLEMS["nonconvex"], loss_bound=None)
    assert "loss bound" in bounds.max_steps(0.1, **nonconvex).reason


def test_max_steps_stops_before_a_recorded_step_breaking_the_condition():
    schedule = np.r_[np.full(30, 0.1), 0.9, np.full(30, 0.1)]
    problem = dict(PROBLEMS["convex constant"], schedule=schedule)
    answer = bounds.max_steps(1.0, **problem)
    assert answer.value == 30 and "step 31" in answer.note


@pytest.mark.parametrize("name", sorted(PROBLEMS))
def test_max_step_size_inverts_the_bound(name):
    problem = dict(PROBLEMS[name])
    steps = 200
    shape = bounds._as_schedule(problem.pop("schedule"))
    target = 0.3 * bounds.planned_bound(steps, schedule=shape, **problem).value
    if name == "convex high probability":
        target = 0.9 * bounds.planned_bound(steps, schedule=shape, **problem).value
    answer = bounds.max_step_size(target, steps=steps, schedule=shape, **problem)
    assert answer.applicable and answer.quantity == "step_size" and not answer.note
    at = bounds.planned_bound(steps, schedule=shape.with_peak(answer.value), **problem).value
    past = bounds.planned_bound(
        steps, schedule=shape.with_peak(answer.value * (1 + 1e-6)), **problem
    )
    assert at <= target < past.value
    assert at == pytest.approx(target, rel=1e-6)


def test_max_step_size_closed_form_and_cap():
    # Convex, constant alpha: alpha = target n / (2 L^2 T) = 0.01 * 1000 / (2 * 100) = 0.05.
    problem = {k: v for k, v in PROBLEMS["convex constant"].items() if k != "schedule"}
    assert bounds.max_step_size(0.01, steps=100, **problem).value == pytest.approx(0.05, rel=1e-12)
    capped = bounds.max_step_size(10.0, steps=100, **problem)
    assert capped.value == pytest.approx(0.5) and "2/beta" in capped.note
    # Non-convex: as alpha grows the t0 = T branch M min(1, T b / n) = 0.2 caps the bound.
    nonconvex = {k: v for k, v in PROBLEMS["nonconvex"].items() if k != "schedule"}
    assert bounds.max_step_size(0.25, steps=100, **nonconvex).unbounded


@pytest.mark.parametrize("name", sorted(PROBLEMS))
def test_min_train_size_inverts_the_bound(name):
    problem = dict(PROBLEMS[name])
    problem.pop("n")
    steps = 300
    target = 0.05 if "high probability" not in name else 0.03
    answer = bounds.min_train_size(target, steps=steps, **problem)
    assert answer.applicable and answer.quantity == "train_size" and isinstance(answer.value, int)
    assert bounds.planned_bound(steps, n=answer.value, **problem).value <= target
    assert bounds.planned_bound(steps, n=answer.value - 1, **problem).value > target


def test_min_train_size_closed_form_by_hand():
    # Convex: 2 L^2 alpha T / n <= target -> n >= 2 * 0.1 * 300 / 0.05 = 1200.
    problem = {k: v for k, v in PROBLEMS["convex constant"].items() if k != "n"}
    assert bounds.min_train_size(0.05, steps=300, **problem).value == 1200


def test_planner_does_not_mutate_its_inputs():
    schedule = np.linspace(0.2, 0.01, 400)
    before = schedule.copy()
    problem = dict(regime="convex", lipschitz=1.0, smoothness=4.0, schedule=schedule)
    bounds.max_steps(0.05, n=1000, **problem)
    bounds.max_step_size(0.05, n=1000, steps=300, **problem)
    bounds.min_train_size(0.05, steps=300, **problem)
    bounds.planned_bounds([0, 10, 400], n=1000, **problem)
    np.testing.assert_array_equal(schedule, before)
    assert schedule.flags.writeable


def test_plan_answer_and_bounds_are_json_friendly():
    answer = bounds.max_steps(0.05, **PROBLEMS["convex constant"])
    json.dumps(answer.to_dict())
    run = bounds.assess_run(
        regime="convex", step_sizes=[0.1] * 3, batch_sizes=[1] * 3, n=10, lipschitz=1.0,
        smoothness=1.0, loss_bound=1.0, shadow_hits=[np.array([1, 0, 0])],
        batch_indices=[[0], [1], [0]],
    )  # fmt: skip
    text = json.dumps(run.to_dict())
    # Index 0 is hit at steps 1 and 3: L * 2 * (2 * 0.1 * 1 / 1) = 0.4.
    assert json.loads(text)["uniform_stability"]["value"] == pytest.approx(0.4)


# --- assess_run ----------------------------------------------------------------------------------


def test_assess_run_convex_numbers_by_hand():
    # n = 4, L = 2, alpha = 0.1, b = 2, batches {0,1}, {0,2}, {3,3}: index 0 is hit twice, so by
    # hand its pathwise bound is 2 * (2 * 0.1 * 2 / 2) = 0.4; index 3 is twice in one batch: 0.4.
    # Expected (HRS 2016 convex, from memory): 2 L^2 / n * 0.3 = 0.6.
    run = bounds.assess_run(
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
    run = bounds.assess_run(
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
    run = bounds.assess_run(
        regime=regime, step_sizes=step_sizes, batch_sizes=batch_sizes, n=12, lipschitz=0.7,
        smoothness=beta, strong_convexity=gamma, loss_bound=2.0, shadow_hits=hits,
        batch_indices=batches,
    )  # fmt: skip
    eta = bounds._expansion_for(regime, step_sizes, beta, gamma)
    for value, hit in zip(run.path_bound, hits):
        path = bounds.pathwise_divergence(step_sizes, batch_sizes, hit, 0.7, eta)
        assert value == pytest.approx(path[-1], rel=1e-11)
    if regime == "nonconvex":
        assert run.expected == bounds.nonconvex_schedule_bound(
            step_sizes, batch_sizes, 12, 0.7, beta, 2.0
        )
    else:
        expected = bounds.expected_divergence(step_sizes, batch_sizes, 12, 0.7, eta)[-1]
        assert run.expected.value == pytest.approx(0.7 * expected, rel=1e-12)
        per_index = bounds.all_index_pathwise(step_sizes, batch_sizes, batches, 12, 0.7, eta)
        assert run.uniform_stability.value == pytest.approx(0.7 * per_index.max(), rel=1e-12)


def test_no_function_mutates_its_inputs():
    step_sizes, batch_sizes, batches = _random_run(4, steps=30, n=7)
    hits = _hits(batches, 2)
    eta = bounds.expansion_smooth(step_sizes, 2.0)
    arrays = [step_sizes, batch_sizes, hits, eta, *batches]
    copies = [x.copy() for x in arrays]
    bounds.expansion_convex(step_sizes, 2.0)
    bounds.expansion_strongly_convex(step_sizes, 2.0, 0.3)
    bounds.check_regime("convex", step_sizes, 2.0)
    bounds.expected_divergence(step_sizes, batch_sizes, 7, 1.0, eta)
    bounds.pathwise_divergence(step_sizes, batch_sizes, hits, 1.0, eta)
    bounds.all_index_pathwise(step_sizes, batch_sizes, batches, 7, 1.0, eta)
    bounds.all_index_pathwise(step_sizes, batch_sizes, batches, 7, 1.0, np.ones(30))
    bounds.convex_bound(step_sizes, 7, 1.0, smoothness=2.0)
    bounds.nonconvex_bound(0.3, 30, 7, 1.0, 2.0, step_sizes=step_sizes)
    bounds.nonconvex_schedule_bound(step_sizes, batch_sizes, 7, 1.0, 2.0, 1.0)
    for regime in bounds.REGIMES:
        bounds.assess_run(
            regime=regime, step_sizes=step_sizes, batch_sizes=batch_sizes, n=7, lipschitz=1.0,
            smoothness=2.0, strong_convexity=0.3, loss_bound=1.0, shadow_hits=[hits],
            batch_indices=batches,
        )  # fmt: skip
    for original, copy in zip(arrays, copies):
        np.testing.assert_array_equal(original, copy)


def test_bound_objects_are_frozen():
    bound = bounds.convex_bound([0.1], 10, 1.0)
    with pytest.raises(AttributeError):
        bound.value = 0.0
