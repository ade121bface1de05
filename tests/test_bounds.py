"""Tests of sgdstab.bounds: closed forms, regime conditions, applicability, monotonicity, the
high-probability conversion (Monte Carlo), and the names sgdstab.bounds keeps for the modules built
on it.

"HRS 2016" is Hardt, Recht & Singer 2016, "Train faster, generalize better" (statements from
memory); "SCIENCE.md" is /work/shared/SCIENCE.md. Closed forms against outside values live in
tests/test_reference_bounds.py; the recursions and assess_run in tests/test_divergence.py; the
planner in tests/test_planner.py.
"""

import ast
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from sgdstab.theory import bounds, divergence, planner

BOUNDS_FILE = Path(bounds.__file__)
# The modules that must load without torch: sgdstab.bounds and the six built on it.
PURE_MODULES = ("bounds", "confidence", "expansion", "divergence", "schedules", "planned",
                "planner")

# --- import hygiene ----------------------------------------------------------------------------

# A first use through the standalone package, with its value worked out by hand:
FIRST_USE = {
    # HRS 2016 convex case (from memory): 2 L^2 / n * alpha = 2 * 1 / 10 * 0.1 = 0.02.
    "bounds": "module.convex_bound([0.1], 10, 1.0).value",
    # McDiarmid form (derived in confidence.py), one-sided, by hand: beta_n = 0, M = 1, n = 2,
    # delta = e^-4: (2 n 0 + 1) sqrt(ln(e^4) / (2 n)) = sqrt(4 / 4) = 1.
    "confidence": "module.high_probability_gap(0.0, 2, 1.0, __import__('math').exp(-4)).value",
    # HRS 2016 smooth case (from memory): eta_t = 1 + alpha_t beta = 1 + 0.25 * 2.
    "expansion": "module.expansion_smooth([0.25], 2.0)[0]",
    # SCIENCE.md §2 pathwise step: 0.25 after step 1, then 0.25 * ((4 - 1) 1.5 + 1) / 4 + 0.25.
    "divergence": "module.pathwise_divergence([0.5, 0.5], [4, 4], [1, 1], 1.0, [1.5, 1.5])[-1]",
    # Step decay by hand: alpha_4 = 0.1 * 0.5 ** ((4 - 1) // 2) = 0.05.
    "schedules": "module.Schedule('step-decay', 0.1, decay_factor=0.5, decay_every=2)"
    ".step_sizes(4)[-1]",
    # HRS 2016 convex case (from memory), 250 steps of 0.1: 2 L^2 / n * 25 = 2 / 1000 * 25.
    "planned": "module.planned_bound(250, regime='convex', n=1000, lipschitz=1.0, "
    "smoothness=4.0, schedule=0.1).value",
    # Convex, constant alpha: T = floor(target n / (2 L^2 alpha)) = floor(0.05 * 1000 / 0.2).
    "planner": "module.max_steps(0.05, regime='convex', n=1000, lipschitz=1.0, smoothness=4.0, "
    "schedule=0.1).value",
}
BY_HAND = {"bounds": 0.02, "confidence": 1.0, "expansion": 1.5,
           "divergence": 0.25 * 1.375 + 0.25, "schedules": 0.05, "planned": 0.05, "planner": 250}


@pytest.mark.parametrize("name", PURE_MODULES)
def test_bounds_imports_without_torch(name):
    # The module loaded first, from its file, inside a stand-in package whose __init__ never runs
    # (so the package namespace cannot hide an import), with torch made unimportable.
    code = f"""
import importlib, importlib.abc, sys, types
class NoTorch(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name == "torch" or name.startswith("torch."):
            raise ImportError("torch is blocked in this test")
sys.meta_path.insert(0, NoTorch())
package = sys.modules["standalone"] = types.ModuleType("standalone")
package.__path__ = [{str(BOUNDS_FILE.parent)!r}]
module = importlib.import_module("standalone.{name}")
print({FIRST_USE[name]})
assert importlib.import_module("standalone.bounds").max_steps.__module__ == "standalone.planner"
assert not [m for m in sys.modules if m == "torch" or m.startswith("torch.")]
"""
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    assert float(result.stdout) == pytest.approx(BY_HAND[name], rel=1e-14)


@pytest.mark.parametrize("name", PURE_MODULES)
def test_bounds_imports_only_numpy_scipy_and_the_standard_library(name):
    tree = ast.parse((BOUNDS_FILE.parent / f"{name}.py").read_text())
    imported, relative = set(), set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported |= {alias.name.split(".")[0] for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.level:
            relative.add(node.module)
        elif isinstance(node, ast.ImportFrom):
            imported.add(node.module.split(".")[0])
    standard = {"__future__", "collections", "dataclasses", "functools", "importlib", "math"}
    assert imported <= standard | {"typing", "numpy", "scipy"}
    assert relative <= set(PURE_MODULES) - {name}
    # sgdstab.bounds loads everything else on first use only (at import, it would close a cycle).
    assert name != "bounds" or not relative
    assert "importlib" not in imported or name == "bounds"


# The public names of sgdstab.bounds before the divergence recursions and the planner moved out
# (the names callers were promised; listed here, not read from the code).
NAMES_BEFORE_THE_SPLIT = {
    bounds: (
        "REGIMES", "HRS", "FROM_MEMORY", "BOUSQUET_ELISSEEFF", "MCDIARMID", "Bound",
        "check_regime", "convex_bound", "strongly_convex_bound", "nonconvex_bound",
        "high_probability_gap", "bousquet_elisseeff_gap",
    ),
    divergence: (
        "expansion_convex", "expansion_strongly_convex", "expansion_smooth",
        "expected_divergence", "pathwise_divergence", "all_index_pathwise",
        "nonconvex_schedule_bound", "RunBounds", "assess_run",
    ),
    planner: (
        "TARGET_BOUNDS", "SCHEDULE_KINDS", "Schedule", "planned_bounds", "planned_bound",
        "PlanAnswer", "max_steps", "max_step_size", "min_train_size",
    ),
}  # fmt: skip


@pytest.mark.parametrize("module", NAMES_BEFORE_THE_SPLIT, ids=lambda m: m.__name__)
def test_every_public_name_stays_importable_from_bounds(module):
    for name in NAMES_BEFORE_THE_SPLIT[module]:
        namespace = {}
        exec(f"from sgdstab.bounds import {name}", namespace)
        assert namespace[name] is getattr(module, name), name
        assert name in dir(bounds)
    with pytest.raises(AttributeError, match="no attribute 'no_such_bound'"):
        bounds.no_such_bound  # noqa: B018


@pytest.mark.parametrize("first", ["planner", "planned", "schedules", "divergence", "expansion",
                                   "confidence", "bounds"])
def test_any_of_the_modules_can_be_imported_first(first):
    code = f"import sgdstab.theory.{first}, sgdstab.bounds as b; print(b.Schedule.__module__)"
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "sgdstab.theory.schedules"


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


def test_bound_objects_are_frozen():
    bound = bounds.convex_bound([0.1], 10, 1.0)
    with pytest.raises(AttributeError):
        bound.value = 0.0
