"""Tests of sgdstab.theory.planner: planned bounds and their inversions (max_steps, max_step_size,
min_train_size), checked against the bound they invert and against inversions by hand.

"HRS 2016" is Hardt, Recht & Singer 2016, "Train faster, generalize better" (statements from
memory). Schedule sums against outside values live in tests/test_reference_bounds.py.
"""

import json

import numpy as np
import pytest

from sgdstab.theory import divergence, planner

PROBLEMS = {
    "convex constant": dict(regime="convex", n=1000, lipschitz=1.0, smoothness=4.0,
                            schedule=planner.Schedule("constant", 0.1)),
    "convex c/t": dict(regime="convex", n=500, lipschitz=2.0, smoothness=1.0,
                       schedule=planner.Schedule("c-over-t", 0.5)),
    "strongly convex constant": dict(regime="strongly_convex", n=1000, lipschitz=1.0,
                                     smoothness=4.0, strong_convexity=0.5, schedule=0.1),
    "strongly convex step decay": dict(regime="strongly_convex", n=300, lipschitz=1.0,
                                       smoothness=2.0, strong_convexity=0.1,
                                       schedule=planner.Schedule("step-decay", 0.5, 0.5, 40)),
    "nonconvex": dict(regime="nonconvex", n=2000, lipschitz=1.0, smoothness=1.0, loss_bound=1.0,
                      schedule=planner.Schedule("constant", 0.05), batch_size=4),
    "convex high probability": dict(regime="convex", n=10**5, lipschitz=1.0, smoothness=4.0,
                                    loss_bound=1.0, schedule=0.1, bound="high_probability"),
}  # fmt: skip


def _at(steps, problem, **change):
    return planner.planned_bound(steps, **{**problem, **change})


@pytest.mark.parametrize("name", sorted(PROBLEMS))
def test_max_steps_inverts_the_bound(name):
    problem = PROBLEMS[name]
    target = 0.5 * _at(300, problem).value
    answer = planner.max_steps(target, **problem)
    assert answer.applicable and answer.quantity == "steps" and isinstance(answer.value, int)
    assert _at(answer.value, problem).value <= target < _at(answer.value + 1, problem).value
    assert answer.bound_at_value == _at(answer.value, problem).value


def test_max_steps_exact_inversions_by_hand():
    # Convex, constant alpha: T = floor(target n / (2 L^2 alpha)) = floor(0.05 * 1000 / 0.2) = 250.
    assert planner.max_steps(0.05, **PROBLEMS["convex constant"]).value == 250
    # Strongly convex, constant alpha: 2 L^2 / (gamma n) = 0.004, and 0.004 (1 - 0.95^T) <= 0.002
    # -> T <= ln(0.5) / ln(0.95) = 13.5.
    assert planner.max_steps(0.002, **PROBLEMS["strongly convex constant"]).value == 13


def test_max_steps_unbounded_and_horizon_answers():
    # The strongly convex bound never exceeds 2 L^2 / (gamma n) = 0.004: any number of steps.
    answer = planner.max_steps(0.005, **PROBLEMS["strongly convex constant"])
    assert answer.unbounded and answer.value is None and "any number of steps" in answer.note
    # Convex step decay: sum alpha_t <= 0.1 * 10 / (1 - 0.5) = 2 -> bound <= 2 * 2 / 1000 = 0.004.
    decay = dict(PROBLEMS["convex constant"], schedule=planner.Schedule("step-decay", 0.1, 0.5, 10))
    assert planner.max_steps(0.0041, **decay).unbounded
    assert not planner.max_steps(0.0039, **decay).unbounded
    cosine = dict(
        PROBLEMS["convex constant"], schedule=planner.Schedule("cosine", 0.1, total_steps=100)
    )
    whole = planner.max_steps(1.0, **cosine)
    assert whole.value == 100 and "whole schedule" in whole.note


def test_max_steps_not_applicable_and_infeasible():
    too_big = dict(PROBLEMS["convex constant"], schedule=0.9)
    answer = planner.max_steps(0.05, **too_big)
    assert not answer.applicable and "exceeds 2/beta" in answer.reason
    # The high-probability gap is at least M sqrt(ln(1/delta) / (2n)) even with no steps.
    infeasible = planner.max_steps(1e-4, **PROBLEMS["convex high probability"])
    assert infeasible.applicable and infeasible.value is None and "0 steps" in infeasible.reason
    nonconvex = dict(PROBLEMS["nonconvex"], loss_bound=None)
    assert "loss bound" in planner.max_steps(0.1, **nonconvex).reason


def test_max_steps_stops_before_a_recorded_step_breaking_the_condition():
    schedule = np.r_[np.full(30, 0.1), 0.9, np.full(30, 0.1)]
    problem = dict(PROBLEMS["convex constant"], schedule=schedule)
    answer = planner.max_steps(1.0, **problem)
    assert answer.value == 30 and "step 31" in answer.note


@pytest.mark.parametrize("name", sorted(PROBLEMS))
def test_max_step_size_inverts_the_bound(name):
    problem = dict(PROBLEMS[name])
    steps = 200
    shape = planner._as_schedule(problem.pop("schedule"))
    target = 0.3 * planner.planned_bound(steps, schedule=shape, **problem).value
    if name == "convex high probability":
        target = 0.9 * planner.planned_bound(steps, schedule=shape, **problem).value
    answer = planner.max_step_size(target, steps=steps, schedule=shape, **problem)
    assert answer.applicable and answer.quantity == "step_size" and not answer.note
    at = planner.planned_bound(steps, schedule=shape.with_peak(answer.value), **problem).value
    past = planner.planned_bound(
        steps, schedule=shape.with_peak(answer.value * (1 + 1e-6)), **problem
    )
    assert at <= target < past.value
    assert at == pytest.approx(target, rel=1e-6)


def test_max_step_size_closed_form_and_cap():
    # Convex, constant alpha: alpha = target n / (2 L^2 T) = 0.01 * 1000 / (2 * 100) = 0.05.
    problem = {k: v for k, v in PROBLEMS["convex constant"].items() if k != "schedule"}
    assert planner.max_step_size(0.01, steps=100, **problem).value == pytest.approx(0.05, rel=1e-12)
    capped = planner.max_step_size(10.0, steps=100, **problem)
    assert capped.value == pytest.approx(0.5) and "2/beta" in capped.note
    # Non-convex: as alpha grows the t0 = T branch M min(1, T b / n) = 0.2 caps the bound.
    nonconvex = {k: v for k, v in PROBLEMS["nonconvex"].items() if k != "schedule"}
    assert planner.max_step_size(0.25, steps=100, **nonconvex).unbounded


def test_max_step_size_convex_without_smoothness_has_no_saturation():
    # Convex with beta undeclared: no step-size cap, and (2 L^2 / n) T alpha grows without limit,
    # so a declared M must not make the answer "any step size" (it did, and without M it raised).
    # alpha = target n / (2 L^2 T) = 0.1 * 100 / (2 * 10) = 0.5, as in the closed form above.
    problem = dict(regime="convex", n=100, lipschitz=1.0, steps=10)
    for extra in ({}, {"loss_bound": 1.0}):
        answer = planner.max_step_size(0.1, **problem, **extra)
        assert not answer.unbounded and answer.value == pytest.approx(0.5, rel=1e-9)
        assert answer.bound_at_value <= 0.1


@pytest.mark.parametrize("name", sorted(PROBLEMS))
def test_min_train_size_inverts_the_bound(name):
    problem = dict(PROBLEMS[name])
    problem.pop("n")
    steps = 300
    target = 0.05 if "high probability" not in name else 0.03
    answer = planner.min_train_size(target, steps=steps, **problem)
    assert answer.applicable and answer.quantity == "train_size" and isinstance(answer.value, int)
    assert planner.planned_bound(steps, n=answer.value, **problem).value <= target
    assert planner.planned_bound(steps, n=answer.value - 1, **problem).value > target


def test_min_train_size_closed_form_by_hand():
    # Convex: 2 L^2 alpha T / n <= target -> n >= 2 * 0.1 * 300 / 0.05 = 1200.
    problem = {k: v for k, v in PROBLEMS["convex constant"].items() if k != "n"}
    assert planner.min_train_size(0.05, steps=300, **problem).value == 1200


def test_planner_does_not_mutate_its_inputs():
    schedule = np.linspace(0.2, 0.01, 400)
    before = schedule.copy()
    problem = dict(regime="convex", lipschitz=1.0, smoothness=4.0, schedule=schedule)
    planner.max_steps(0.05, n=1000, **problem)
    planner.max_step_size(0.05, n=1000, steps=300, **problem)
    planner.min_train_size(0.05, steps=300, **problem)
    planner.planned_bounds([0, 10, 400], n=1000, **problem)
    np.testing.assert_array_equal(schedule, before)
    assert schedule.flags.writeable


def test_plan_answer_and_bounds_are_json_friendly():
    answer = planner.max_steps(0.05, **PROBLEMS["convex constant"])
    json.dumps(answer.to_dict())
    run = divergence.assess_run(
        regime="convex", step_sizes=[0.1] * 3, batch_sizes=[1] * 3, n=10, lipschitz=1.0,
        smoothness=1.0, loss_bound=1.0, shadow_hits=[np.array([1, 0, 0])],
        batch_indices=[[0], [1], [0]],
    )  # fmt: skip
    text = json.dumps(run.to_dict())
    # Index 0 is hit at steps 1 and 3: L * 2 * (2 * 0.1 * 1 / 1) = 0.4.
    assert json.loads(text)["uniform_stability"]["value"] == pytest.approx(0.4)
