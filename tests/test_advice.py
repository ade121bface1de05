"""Stop suggestions on synthetic readings whose right answer is known by construction."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from sgdstab.advice import (
    CAUTIONS,
    StopAdvice,
    TrainingPlan,
    acceleration_epoch,
    advise,
)
from sgdstab.reading import EpochReading

DECLARED = {"lipschitz": 1.0, "smoothness": 0.25, "strong_convexity": 0.0, "loss_bound": None,
            "convex": True, "source": "declared"}


def _bounds_dict(applicable: bool = True, reason: str = "") -> dict:
    entry = {"value": None, "applicable": applicable, "reason": reason, "source": "test",
             "assumptions": [], "t0": None}
    return {"regime": "convex", "path_applicable": applicable, "path_reason": reason,
            "expected": entry, "uniform_stability": entry, "high_probability": entry}


def reading(epoch: int, *, steps_per_epoch: int = 10, steps: int | None = None,
            train: float | None = None, bound: float | None = None, gap: float | None = None,
            stderr: float | None = None, divergence: tuple[float, ...] = (),
            holdout: float | None = None, high: float | None = None,
            constants: dict | None = None, bounds: dict | None = None,
            violated: bool = False, notes: tuple[str, ...] = ()) -> EpochReading:
    """An EpochReading with only the fields a test cares about."""
    return EpochReading(
        epoch=epoch, steps=steps if steps is not None else epoch * steps_per_epoch,
        divergence=divergence, audit_divergence=None, layer_divergence={},
        loss_difference_max=None, loss_difference_mean=None, gap_estimate=gap, gap_stderr=stderr,
        train_loss=train, holdout_loss=holdout, expected_bound=bound, high_probability_gap=high,
        bounds=bounds if bounds is not None else (_bounds_dict() if bound is not None else {}),
        constants=constants if constants is not None else (DECLARED if bound is not None
                                                           else None),
        assumption_violated=violated, notes=notes)


def u_shaped(epochs: int = 20, scale: float = 0.01) -> list[EpochReading]:
    """train = 1/e, bound = scale * e: the sum 1/e + scale*e is smallest at e = 1/sqrt(scale)."""
    return [reading(e, train=1.0 / e, bound=scale * e) for e in range(1, epochs + 1)]


# -- (a) training loss + expected bound ---------------------------------------------------------

def test_u_shaped_sum_is_minimised_where_calculus_and_numpy_say():
    advice = advise(u_shaped())
    epochs = np.arange(1, 21)
    # numpy: argmin of the same sum computed independently
    expected = int(epochs[np.argmin(1.0 / epochs + 0.01 * epochs)])
    # calculus (common practice): d/de (1/e + c e) = 0 at e = 1/sqrt(c) = 10
    assert expected == 10
    assert advice.suggested_epoch == expected
    assert advice.criterion == "bound_risk"
    assert advice.bound_applies and advice.certified
    pick = advice.criterion_named("bound_risk")
    assert pick.value == pytest.approx(0.1 + 0.1)
    assert "epoch 10" in advice.reason
    assert advice.epochs_seen == 20
    assert len(advice.rows) == 20
    assert advice.rows[9].bound_risk == pytest.approx(0.2)


def test_minimum_at_the_last_epoch_says_the_sum_may_still_fall():
    advice = advise(u_shaped(epochs=6))  # minimum at 10 is beyond the record
    assert advice.suggested_epoch == 6
    assert "last recorded epoch" in advice.reason


def test_estimated_constants_are_indicative_not_certified():
    estimated = dict(DECLARED, source="estimated")
    readings = [reading(e, train=1.0 / e, bound=0.01 * e, constants=estimated)
                for e in range(1, 15)]
    advice = advise(readings)
    assert advice.suggested_epoch == 10
    assert advice.bound_applies and not advice.certified
    assert "estimated" in advice.summary()
    assert "indicative" in advice.reason


def test_readings_arrive_in_any_order_and_a_repeated_epoch_keeps_the_last():
    readings = u_shaped()
    shuffled = readings[::-1] + [reading(3, train=0.0, bound=0.0)]  # a resumed epoch 3
    advice = advise(shuffled)
    assert [r.epoch for r in advice.rows] == list(range(1, 21))
    assert advice.suggested_epoch == 3


# -- (b) target ---------------------------------------------------------------------------------

def test_target_picks_the_last_epoch_within_it_when_that_is_earlier():
    advice = advise(u_shaped(), target=0.075)  # bound 0.01 e <= 0.075 up to e = 7
    assert advice.suggested_epoch == 7
    assert advice.criterion == "bound_budget"
    assert advice.budget.last_epoch_within == 7
    assert advice.budget.extra_epochs == 0
    assert [r.within_target for r in advice.rows[:8]] == [True] * 7 + [False]


def test_a_loose_target_leaves_the_bound_criterion_in_charge():
    advice = advise(u_shaped(), target=1.0)
    assert advice.suggested_epoch == 10
    assert advice.criterion == "bound_risk"
    assert advice.criterion_named("bound_budget").epoch == 20


def test_linear_growth_is_extrapolated_exactly():
    readings = u_shaped(epochs=5)  # bound 0.05 at epoch 5, growing 0.01 per epoch
    advice = advise(readings, target=0.0825)
    budget = advice.budget
    assert budget.method == "extrapolation"
    assert budget.per_epoch_growth == pytest.approx(0.01)
    # 0.05 + 3 * 0.01 = 0.08 <= 0.0825 < 0.09
    assert budget.extra_epochs == 3
    assert not budget.unlimited


def test_geometric_growth_is_extrapolated_with_its_ratio():
    readings = [reading(e, train=1.0, bound=0.001 * 2**e) for e in range(1, 5)]
    advice = advise(readings, target=0.1)
    # the bound doubles: epoch 6 gives 0.064 <= 0.1, epoch 7 gives 0.128
    assert advice.budget.extra_epochs == 2


def test_a_bound_that_stopped_growing_does_not_bind():
    readings = [reading(e, train=1.0, bound=0.02) for e in range(1, 5)]
    advice = advise(readings, target=0.05)
    assert advice.budget.unlimited
    assert advice.budget.extra_epochs is None


def test_target_exceeded_from_the_start_is_said_plainly():
    advice = advise(u_shaped(), target=0.005)
    assert advice.criterion_named("bound_budget").epoch is None
    assert advice.budget.last_epoch_within is None
    assert advice.budget.extra_epochs == 0
    assert "cannot be met" in advice.reason


def test_single_epoch_cannot_be_extrapolated():
    advice = advise([reading(1, train=0.5, bound=0.01)], target=0.1)
    assert advice.budget.extra_epochs is None
    assert advice.budget.method == "none"
    assert "one epoch" in advice.budget.reason


def test_planner_projection_matches_the_convex_closed_form():
    bounds = pytest.importorskip("sgdstab.bounds")
    if not hasattr(bounds, "max_steps"):
        pytest.skip("sgdstab.bounds has no planner yet")
    n, alpha, lipschitz, batch = 500, 0.1, 1.0, 10
    # Hardt, Recht & Singer 2016 (from memory, SCIENCE.md §2), convex: eps = 2 L^2 alpha T / n
    readings = [reading(e, steps_per_epoch=50, train=1.0 / e,
                        bound=2 * lipschitz**2 * alpha * 50 * e / n) for e in range(1, 4)]
    target = 0.5
    allowed_steps = math.floor(target * n / (2 * lipschitz**2 * alpha))  # 1250
    advice = advise(readings, target=target, plan=TrainingPlan(n, alpha, batch))
    assert advice.budget.method == "planner"
    assert advice.budget.extra_epochs == (allowed_steps - 150) // 50
    # the extrapolation from the same (linear) readings agrees
    assert advise(readings, target=target).budget.extra_epochs == advice.budget.extra_epochs


def test_budget_on_the_high_probability_gap():
    readings = [reading(e, train=1.0 / e, bound=0.001 * e, high=0.1 * e) for e in range(1, 8)]
    advice = advise(readings, target=0.35, budget_on="high_probability")
    assert advice.criterion_named("bound_budget").epoch == 3
    assert advice.budget.bound_name == "high_probability"


def test_bad_options_are_refused():
    with pytest.raises(ValueError):
        advise(u_shaped(), target=0.0)
    with pytest.raises(ValueError):
        advise(u_shaped(), target=float("nan"))
    with pytest.raises(ValueError):
        advise(u_shaped(), budget_on="somewhere")


# -- not applicable: fall back to the measured criteria ----------------------------------------

def test_no_bound_applies_falls_back_to_the_measured_gap():
    reason = "optimizer is Adam: the bounds are proved for plain SGD"
    gaps = [0.002 * e * e for e in range(1, 13)]
    readings = [reading(e, train=1.0 / e, gap=gaps[e - 1], stderr=0.001,
                        bounds=_bounds_dict(False, reason), constants=DECLARED)
                for e in range(1, 13)]
    advice = advise(readings, target=0.1)
    epochs = np.arange(1, 13)
    expected = int(epochs[np.argmin(1.0 / epochs + 0.002 * epochs**2)])  # numpy, independent
    assert advice.suggested_epoch == expected
    assert advice.criterion == "measured_risk"
    assert not advice.bound_applies and not advice.certified
    assert "Adam" in advice.reason and "Adam" in advice.bound_reason
    assert advice.criterion_named("bound_risk").epoch is None
    assert advice.criterion_named("bound_budget").epoch is None
    assert all(r.bound_risk is None for r in advice.rows)


def test_a_violated_assumption_withdraws_the_bound_everywhere():
    readings = u_shaped()
    readings[14] = reading(15, train=1 / 15, bound=0.15, violated=True)
    advice = advise(readings)
    assert not advice.bound_applies
    assert "pathwise bound" in advice.bound_reason
    assert advice.criterion != "bound_risk"


def test_falls_back_to_divergence_acceleration_without_a_gap_estimate():
    values = [0.1 * e for e in range(1, 7)] + [0.6 + 0.1 * k + 0.05 * k * k for k in range(1, 6)]
    readings = [reading(e, train=1.0 / e, divergence=(v,),
                        notes=("bounds not computed: no constants given",
                               "gap estimate not applicable: duplicates"))
                for e, v in enumerate(values, start=1)]
    advice = advise(readings)
    assert advice.criterion == "divergence_acceleration"
    assert advice.suggested_epoch == 6
    assert "no constants" in advice.bound_reason
    assert "duplicates" in advice.criterion_named("measured_risk").reason


def test_nothing_to_decide_gives_no_suggestion():
    readings = [reading(e, train=1.0 / e) for e in range(1, 4)]
    advice = advise(readings)
    assert advice.suggested_epoch is None and advice.criterion is None
    assert "no criterion" in advice.reason
    assert advice.epochs_seen == 3


def test_no_readings():
    advice = advise([])
    assert advice.suggested_epoch is None
    assert advice.epochs_seen == 0
    assert advice.to_dict()["epochs_seen"] == 0
    assert "No stop suggestion" in advice.summary()


def test_missing_training_loss_skips_those_epochs():
    readings = u_shaped()
    readings[9] = reading(10, train=None, bound=0.1)  # the true minimum has no training loss
    advice = advise(readings)
    assert advice.rows[9].bound_risk is None
    epochs = np.array([e for e in range(1, 21) if e != 10])
    expected = int(epochs[np.argmin(1.0 / epochs + 0.01 * epochs)])  # numpy, without epoch 10
    assert expected in (9, 11)
    assert advice.suggested_epoch == expected


# -- divergence acceleration --------------------------------------------------------------------

def test_acceleration_found_where_linear_growth_turns_quadratic():
    linear = [0.1 * e for e in range(1, 7)]
    quadratic = [0.6 + 0.1 * k + 0.05 * k * k for k in range(1, 6)]
    readings = [reading(e, divergence=(v, 2 * v)) for e, v in enumerate(linear + quadratic, 1)]
    assert acceleration_epoch(readings) == 6


def test_exponential_growth_is_flagged_at_once():
    readings = [reading(e, divergence=(math.exp(0.5 * e) - 1,)) for e in range(1, 6)]
    assert acceleration_epoch(readings) == 1


def test_noisy_linear_growth_is_not_flagged():
    rng = np.random.default_rng(7)
    per_epoch = 0.1 + 0.03 * rng.standard_normal((15, 4))  # 4 shadows, noisy constant increments
    divergence = np.cumsum(np.abs(per_epoch), axis=0)
    readings = [reading(e + 1, divergence=tuple(divergence[e])) for e in range(15)]
    assert acceleration_epoch(readings) is None
    advice = advise(readings)
    assert "not grown faster than linearly" in advice.criterion_named(
        "divergence_acceleration").reason


def test_acceleration_is_measured_per_step_not_per_epoch():
    # divergence linear in steps, but epochs of 10, 10, 20, 40, 80 steps: per-epoch increments
    # grow, per-step growth does not
    steps = np.cumsum([10, 10, 20, 40, 80])
    readings = [reading(e + 1, steps=int(s), divergence=(0.01 * s,)) for e, s in enumerate(steps)]
    assert acceleration_epoch(readings) is None
    per_epoch = [0.01 * s for s in steps]
    increments = np.diff([0.0] + per_epoch)
    assert np.all(np.diff(increments)[1:] > 0)  # a per-epoch rule would have fired


def test_acceleration_needs_enough_epochs():
    readings = [reading(e, divergence=(math.exp(e),)) for e in (1, 2)]
    assert acceleration_epoch(readings) is None
    advice = advise(readings)
    assert "Too few epochs" in advice.criterion_named("divergence_acceleration").reason


def test_frozen_or_missing_shadows_are_left_out():
    good = [0.1 * e for e in range(1, 9)]
    readings = []
    for e, v in enumerate(good, 1):
        frozen = math.exp(e) if e < 5 else float("nan")  # a shadow that blew up at epoch 5
        readings.append(reading(e, divergence=(v, frozen)))
    assert acceleration_epoch(readings) is None
    advice = advise(readings)
    assert advice.rows[0].mean_divergence == pytest.approx(0.1)


# -- dict input, serialisation ------------------------------------------------------------------

def test_history_dicts_give_the_same_advice_as_readings():
    readings = u_shaped()
    from_dicts = advise([json.loads(r.to_json()) for r in readings], target=0.15)
    assert from_dicts == advise(readings, target=0.15)


def test_partial_dicts_are_accepted():
    records = [{"epoch": e, "steps": 10 * e, "train_loss": 1 / e, "gap_estimate": 0.01 * e * e}
               for e in range(1, 8)]
    advice = advise(records)
    assert advice.criterion == "measured_risk"
    epochs = np.arange(1, 8)
    assert advice.suggested_epoch == int(epochs[np.argmin(1 / epochs + 0.01 * epochs**2)])
    with pytest.raises(ValueError):
        advise([{"steps": 3}])


def test_to_dict_is_strict_json_and_round_trips():
    readings = u_shaped()
    readings[2] = reading(3, train=float("inf"), bound=0.03)
    advice = advise(readings, target=0.15)
    text = json.dumps(advice.to_dict(), allow_nan=False)  # raises on NaN / inf
    data = json.loads(text)
    assert data["epochs_seen"] == 20
    assert data["suggested_epoch"] == advice.suggested_epoch
    assert data["rows"][2]["train_loss"] is None
    assert StopAdvice.from_dict(data) == advice
    assert tuple(data["cautions"]) == CAUTIONS


def test_summary_is_short_and_names_the_epoch():
    advice = advise(u_shaped(), target=0.075)
    text = advice.summary()
    assert "epoch 7" in text.splitlines()[0]
    assert "held-out" in text
    assert len(text.splitlines()) <= 10


def test_a_vacuous_bound_does_not_choose_and_the_measured_gap_decides():
    # loss in [0, 1]; the bound alone is 1 or more: train + bound >= M at every epoch
    constants = dict(DECLARED, loss_bound=1.0, convex=False, source="estimated")
    readings = [reading(e, train=1.0 / (e + 1), bound=1.0 + 0.001 * e, gap=0.003 * e * e,
                        constants=constants) for e in range(1, 11)]
    advice = advise(readings)
    assert all(r.bound_vacuous for r in advice.rows)
    assert advice.criterion_named("bound_risk").epoch is None
    assert "vacuous" in advice.criterion_named("bound_risk").reason
    assert advice.criterion == "measured_risk"
    epochs = np.arange(1, 11)
    assert advice.suggested_epoch == int(epochs[np.argmin(1 / (epochs + 1) + 0.003 * epochs**2)])
    assert "vacuous" in advice.reason


def test_only_the_non_vacuous_epochs_compete():
    constants = dict(DECLARED, loss_bound=1.0)
    bounds = [0.2, 0.3, 0.99, 0.99, 0.99]  # from epoch 3 on, train + bound >= 1
    readings = [reading(e, train=0.5 - 0.05 * e, bound=b, constants=constants)
                for e, b in enumerate(bounds, start=1)]
    advice = advise(readings)
    assert [r.bound_vacuous for r in advice.rows] == [False, False, True, True, True]
    assert advice.suggested_epoch == 1  # 0.45 + 0.2 = 0.65 < 0.4 + 0.3 = 0.7
