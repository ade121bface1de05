"""Stop suggestions on synthetic readings whose right answer is known by construction."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from sgdstab.outputs.advice import (
    CAUTIONS,
    LABELS,
    StopAdvice,
    TrainingPlan,
    acceleration_epoch,
    advise,
)
from sgdstab.outputs.reading import EpochReading

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
            violated: bool = False, notes: tuple[str, ...] = (), **more) -> EpochReading:
    """An EpochReading with only the fields a test cares about."""
    return EpochReading(
        epoch=epoch, steps=steps if steps is not None else epoch * steps_per_epoch,
        divergence=divergence, audit_divergence=more.pop("audit_divergence", None),
        layer_divergence={},
        loss_difference_max=None, loss_difference_mean=None, gap_estimate=gap, gap_stderr=stderr,
        train_loss=train, holdout_loss=holdout, expected_bound=bound, high_probability_gap=high,
        bounds=bounds if bounds is not None else (_bounds_dict() if bound is not None else {}),
        constants=constants if constants is not None else (DECLARED if bound is not None
                                                           else None),
        assumption_violated=violated, notes=notes, **more)


def u_shaped(epochs: int = 20, scale: float = 0.01) -> list[EpochReading]:
    """train = 1/e, bound = scale * e: the sum 1/e + scale*e is smallest at e = 1/sqrt(scale);
    the held-out loss 1/e + 0.002 e^2 is smallest elsewhere (at e = 6)."""
    return [reading(e, train=1.0 / e, bound=scale * e, holdout=1.0 / e + 0.002 * e * e)
            for e in range(1, epochs + 1)]


# -- the suggested stop follows the measured evidence -------------------------------------------

def test_the_held_out_loss_chooses_and_a_loose_bound_does_not():
    advice = advise(u_shaped())
    epochs = np.arange(1, 21)
    expected = int(epochs[np.argmin(1.0 / epochs + 0.002 * epochs**2)])  # numpy, independent
    assert expected == 6
    assert advice.suggested_epoch == expected and advice.criterion == "holdout_loss"
    # train + bound is smallest at e = 10 (calculus: 1/sqrt(0.01)); it no longer chooses
    assert advice.rows[9].bound_risk == pytest.approx(0.2)
    assert advice.criterion_named("bound_risk") is None
    assert advice.criterion_label == LABELS["holdout_loss"]


def test_minimum_at_the_last_epoch_says_it_may_still_fall():
    advice = advise(u_shaped(epochs=4))  # held-out minimum at 6 is beyond the record
    assert advice.suggested_epoch == 4
    assert "last recorded epoch" in advice.criterion_named("holdout_loss").reason


def test_readings_arrive_in_any_order_and_a_repeated_epoch_keeps_the_last():
    readings = u_shaped()
    shuffled = readings[::-1] + [reading(3, train=0.0, bound=0.0, holdout=0.0)]  # resumed 3
    advice = advise(shuffled)
    assert [r.epoch for r in advice.rows] == list(range(1, 21))
    assert advice.suggested_epoch == 3


def test_without_held_out_loss_training_loss_plus_the_gap_estimate_decides():
    gaps = [0.002 * e * e for e in range(1, 13)]
    readings = [reading(e, train=1.0 / e, gap=gaps[e - 1], stderr=0.001, bound=0.01 * e)
                for e in range(1, 13)]
    advice = advise(readings)
    epochs = np.arange(1, 13)
    assert advice.suggested_epoch == int(epochs[np.argmin(1.0 / epochs + 0.002 * epochs**2)])
    assert advice.criterion == "estimated_risk"
    assert "an estimate, not a bound" in advice.criterion_named("estimated_risk").reason


def test_a_noisy_gap_estimate_picks_the_earliest_epoch_within_one_standard_error():
    # train 1/e, gap estimate 0 except a dip of -0.5 at epoch 9 with a standard error of 0.6:
    # the dip is noise; the one-standard-error rule (common practice in model selection) takes
    # the earliest epoch whose value is within 0.6 of the minimum
    train = [1.0 / e for e in range(1, 13)]
    gaps = [0.0] * 12
    gaps[8] = -0.5
    readings = [reading(e, train=train[e - 1], gap=gaps[e - 1], stderr=0.6) for e in range(1, 13)]
    advice = advise(readings)
    values = np.array(train) + np.array(gaps)
    low = int(np.argmin(values))
    expected = int(np.flatnonzero(values <= values[low] + 0.6)[0]) + 1   # numpy, independent
    assert low + 1 == 9 and expected == 5   # 1/5 <= 1/9 - 0.5 + 0.6 < 1/4
    criterion = advice.criterion_named("estimated_risk")
    assert advice.criterion == "estimated_risk" and advice.suggested_epoch == expected
    assert criterion.value == pytest.approx(values[expected - 1])
    assert "smallest at epoch 9" in criterion.reason and "one-standard-error" in criterion.reason
    # a precise estimate keeps the minimum itself
    sharp = advise([reading(e, train=train[e - 1], gap=gaps[e - 1], stderr=0.01)
                    for e in range(1, 13)])
    assert sharp.suggested_epoch == 9


def test_a_gap_estimate_within_noise_everywhere_chooses_nothing():
    # every epoch within one standard error of the minimum: the estimate cannot single one out,
    # so the advice falls to the next criterion (here none: no divergences recorded)
    readings = [reading(e, train=0.5 + 0.01 * (e % 3), gap=0.0, stderr=1.0) for e in range(1, 7)]
    advice = advise(readings)
    criterion = advice.criterion_named("estimated_risk")
    assert criterion.epoch is None and "does not single out an epoch" in criterion.reason
    assert advice.criterion != "estimated_risk"
    measured = next(line for line in advice.verdict if line.topic == "Measured stop")
    assert measured.status == "warn" and "does not single out an epoch" in measured.text
    assert "does not single out an epoch" in advice.reason
    # one epoch more, far below the rest beyond the error, is chosen
    lower = advise([*readings, reading(7, train=0.1, gap=0.0, stderr=0.05)])
    assert lower.suggested_epoch == 7 and lower.criterion == "estimated_risk"


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


def test_a_broken_lockstep_leaves_only_the_held_out_loss_to_choose():
    # the same accelerating divergence and a gap estimate, but the null-swap audit drifted (or
    # a later reading says a step was skipped): the criteria read from the shadows choose
    # nothing, and a held-out loss, the main run's own, still does
    values = [0.1 * e for e in range(1, 7)] + [0.6 + 0.1 * k + 0.05 * k * k for k in range(1, 6)]

    def run(first: dict, later_notes: tuple[str, ...] = (), holdout=None):
        return [reading(e, train=1.0 / e, divergence=(v,), gap=0.01, stderr=0.001,
                        holdout=None if holdout is None else holdout(e),
                        notes=later_notes if e > 1 else (), **(first if e == 1 else {}))
                for e, v in enumerate(values, start=1)]

    assert advise(run({"audit_divergence": 0.0})).suggested_epoch is not None
    for broken in (run({"audit_divergence": 3e-9}),
                   run({"audit_divergence": 0.0}, ("lockstep lost: ...",))):
        advice = advise(broken)
        assert advice.suggested_epoch is None and advice.verdict[0].status == "fail"
        for name in ("estimated_risk", "divergence_acceleration"):
            criterion = advice.criterion_named(name)
            assert criterion.epoch is None and "lockstep is broken" in criterion.reason
        assert "criteria read from the shadows are not used" in advice.reason
    held = advise(run({"audit_divergence": 3e-9}, holdout=lambda e: (e - 4) ** 2 + 1.0))
    assert (held.suggested_epoch, held.criterion) == (4, "holdout_loss")


def test_nothing_to_decide_gives_no_suggestion():
    readings = [reading(e, train=1.0 / e) for e in range(1, 4)]
    advice = advise(readings)
    assert advice.suggested_epoch is None and advice.criterion is None
    assert "No criterion" in advice.reason
    assert advice.epochs_seen == 3


def test_no_readings():
    advice = advise([])
    assert advice.suggested_epoch is None
    assert advice.epochs_seen == 0
    assert advice.to_dict()["epochs_seen"] == 0
    assert "No stop suggestion" in advice.summary()


# -- the guarantee: beside the stop, never choosing by default ---------------------------------

def test_the_guarantee_is_the_last_epoch_within_the_target():
    advice = advise(u_shaped(), target=0.075)  # bound 0.01 e <= 0.075 up to e = 7
    assert advice.guarantee_epoch == 7
    assert advice.suggested_epoch == 6          # still the held-out loss's choice
    assert advice.criterion_named("guarantee").epoch == 7
    assert advice.budget.last_epoch_within == 7
    assert [r.within_target for r in advice.rows[:8]] == [True] * 7 + [False]
    assert "Both agree" in advice.reason


def test_follow_guarantee_suggests_the_guarantee_epoch():
    advice = advise(u_shaped(), target=0.045, follow="guarantee")
    assert advice.suggested_epoch == 4 and advice.criterion == "guarantee"


def test_when_they_disagree_one_sentence_says_which_to_follow():
    advice = advise(u_shaped(), target=0.035)   # guarantee through 3, held-out minimum at 6
    assert advice.guarantee_epoch == 3 and advice.suggested_epoch == 6
    assert advice.reason.startswith("Follow the measured stop, epoch 6")
    assert "only if you need that guarantee" in advice.reason
    follow = next(v for v in advice.verdict if v.topic == "Which stop to follow")
    assert follow.text == advice.reason


def test_default_target_is_a_tenth_of_the_trivial_loss():
    readings = [reading(e, train=1.0 / e, bound=0.02 * e, holdout=1.0 / e,
                        trivial_loss=1.0986) for e in range(1, 11)]
    advice = advise(readings)
    assert advice.target == pytest.approx(0.10986)
    assert advice.guarantee_epoch == 5          # 0.02 e <= 0.10986 up to e = 5 (by hand)
    assert "trivial loss 1.099" in advice.target_source
    assert advice.trivial_loss == pytest.approx(1.0986)


def test_target_exceeded_from_the_start_is_said_plainly():
    advice = advise(u_shaped(), target=0.005)
    assert advice.criterion_named("guarantee").epoch is None
    assert advice.guarantee_epoch is None
    assert advice.budget.last_epoch_within is None
    assert advice.budget.extra_epochs == 0
    assert "exceeds the target" in advice.criterion_named("guarantee").reason
    assert "no stability bound gives a usable guarantee" in advice.reason


def test_a_vacuous_bound_never_chooses_and_is_shown_as_vacuous():
    # trivial loss 1.0: the bound alone is 1 or more at every epoch
    readings = [reading(e, train=1.0 / (e + 1), bound=1.0 + 0.001 * e, holdout=0.5,
                        trivial_loss=1.0) for e in range(1, 11)]
    advice = advise(readings, target=2.0, follow="guarantee")
    assert all(r.expected_vacuous and r.bound_vacuous for r in advice.rows)
    guarantee = next(v for v in advice.verdict if v.topic == "Guarantee")
    assert "vacuous" in guarantee.text
    # even asked to follow the guarantee, a vacuous bound chooses nothing: the held-out loss does
    assert advice.guarantee_epoch is None and advice.criterion == "holdout_loss"
    assert advice.rows[0].within_target is False


def test_the_certified_gap_is_the_union_bound_over_the_epochs():
    n, delta, M, beta_n = 100_000, 0.05, 1.0, 2e-6
    constants = dict(DECLARED, loss_bound=M)
    bounds = dict(_bounds_dict(), n=n, delta=delta)
    readings = [reading(e, train=0.3, bound=0.001 * e, holdout=0.35, constants=constants,
                        bounds=bounds, uniform_stability=beta_n * e) for e in range(1, 5)]
    advice = advise(readings, target=10.0)
    for r, e in zip(advice.rows, range(1, 5)):
        beta = beta_n * e
        # McDiarmid (one-sided) at delta / E, E = 4 epochs, written out by hand
        by_hand = beta + (2 * n * beta + M) * math.sqrt(math.log(4 / delta) / (2 * n))
        assert r.certified_gap == pytest.approx(by_hand, rel=1e-12)
        assert r.certified_risk == pytest.approx(0.3 + by_hand, rel=1e-12)
    assert advice.guarantee_bound.startswith("certified gap bound")
    assert advice.guarantee_epoch == 4


def test_estimated_constants_are_indicative_not_certified():
    estimated = dict(DECLARED, source="estimated")
    readings = [reading(e, train=1.0 / e, bound=0.01 * e, constants=estimated, holdout=0.5)
                for e in range(1, 15)]
    advice = advise(readings, target=0.5)
    assert advice.bound_applies and not advice.certified
    guarantee = next(v for v in advice.verdict if v.topic == "Guarantee")
    assert "indicative, not certified" in guarantee.text and guarantee.status == "warn"
    assert "certified" not in guarantee.text.replace("not certified", "")


def test_no_bound_applies_says_why():
    reason = "optimizer is Adam: the bounds are proved for plain SGD"
    readings = [reading(e, train=1.0 / e, holdout=1.0 / e, bounds=_bounds_dict(False, reason),
                        constants=DECLARED) for e in range(1, 6)]
    advice = advise(readings, target=0.1)
    assert not advice.bound_applies and not advice.certified
    assert "Adam" in advice.bound_reason
    assert advice.guarantee_epoch is None
    assert "Adam" in next(v for v in advice.verdict if v.topic == "Guarantee").text


def test_a_violated_assumption_withdraws_the_bound_and_fails_the_verdict():
    readings = u_shaped()
    readings[14] = reading(15, train=1 / 15, bound=0.15, violated=True, holdout=0.5,
                           notes=("assumption audit failed: shadow_0: measured 2 > bound 1",))
    advice = advise(readings, target=1.0)
    assert not advice.bound_applies and advice.guarantee_epoch is None
    assert "pathwise bound" in advice.bound_reason
    line = next(v for v in advice.verdict if v.topic == "Divergence vs pathwise bound")
    assert line.status == "fail" and "epoch 15" in line.text and "measured 2 > bound 1" in line.text


def test_bad_options_are_refused():
    with pytest.raises(ValueError):
        advise(u_shaped(), target=0.0)
    with pytest.raises(ValueError):
        advise(u_shaped(), target=float("nan"))
    with pytest.raises(ValueError):
        advise(u_shaped(), budget_on="somewhere")
    with pytest.raises(ValueError):
        advise(u_shaped(), follow="the bound")
    with pytest.raises(ValueError):
        advise(u_shaped(), trivial_loss=-1.0)


# -- the verdict's statements match the readings -------------------------------------------------

def test_lockstep_line_reads_the_audit():
    exact = [reading(1, audit_divergence=0.0, holdout=1.0)]
    assert advise(exact).verdict[0].status == "ok"
    broken = [reading(1, audit_divergence=3e-9, holdout=1.0)]
    line = advise(broken).verdict[0]
    assert line.status == "fail" and "3.000e-09" in line.text
    unknown = [reading(1, holdout=1.0, notes=("null-swap audit inconclusive: never drawn",))]
    assert advise(unknown).verdict[0].status == "warn"
    assert advise([reading(1, holdout=1.0)]).verdict[0].status == "info"


def test_pathwise_line_reports_the_largest_ratio():
    bounds = _bounds_dict()
    readings = [reading(e, bound=0.01 * e, holdout=1.0, bounds=bounds,
                        divergence=(0.1 * e, 0.05 * e), path_bound=(0.5 * e, 0.1 * e))
                for e in range(1, 4)]
    line = advise(readings).verdict[1]
    ratios = [max(0.1 / 0.5, 0.05 / 0.1)]   # 0.5 at every epoch, by hand
    assert line.status == "ok" and f"{max(ratios):.3g}" in line.text and "6 checks" in line.text


def test_the_two_gaps_are_labelled_and_the_shadow_count_is_estimated():
    last = reading(3, holdout=0.6, gap=0.004, stderr=0.0027, divergence=(0.1, 0.2),
                   run_gap=0.067, run_gap_low=-0.05, run_gap_high=0.19, holdout_count=398)
    advice = advise([last])
    # per-shadow spread 0.0027 * sqrt(2); 2 SE < 0.004 needs K >= (2 * spread / 0.004)^2
    by_hand = math.ceil((2 * 0.0027 * math.sqrt(2) / 0.004) ** 2)
    assert advice.shadows_needed == by_hand == 4
    line = next(v for v in advice.verdict if v.topic == "Two different gaps")
    assert "expected gap over training sets" in line.text and "this run's gap" in line.text
    assert "[-0.05, 0.19]" in line.text and "398 held-out" in line.text
    assert "need not agree" in line.text



# -- the budget projection ---------------------------------------------------------------------

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
    # Hardt, Recht & Singer 2016 Thm 3.8 (from memory), convex: eps = 2 L^2 alpha T / n
    readings = [reading(e, steps_per_epoch=50, train=1.0 / e,
                        bound=2 * lipschitz**2 * alpha * 50 * e / n) for e in range(1, 4)]
    target = 0.5
    allowed_steps = math.floor(target * n / (2 * lipschitz**2 * alpha))  # 1250
    advice = advise(readings, target=target, plan=TrainingPlan(n, alpha, batch))
    assert advice.budget.method == "planner"
    assert advice.budget.extra_epochs == (allowed_steps - 150) // 50
    # the extrapolation from the same (linear) readings agrees
    assert advise(readings, target=target).budget.extra_epochs == advice.budget.extra_epochs


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
    assert advice.criterion == "estimated_risk"
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


def test_summary_puts_the_verdict_first_and_the_reprs_are_short():
    advice = advise(u_shaped(), target=0.075)
    text = advice.summary()
    assert text.splitlines()[0] == "Verdict:"
    assert "Suggested stop: epoch 6 of 20" in text
    assert len(text.splitlines()) <= 16
    assert str(advice) == text
    assert len(repr(advice)) < 200 and "suggested_epoch=6" in repr(advice)
    assert "Suggested stop: epoch 6" in advice._repr_html_()
    markdown = advice.to_markdown()
    assert markdown.startswith("**Suggested stop: epoch 6") and "| criterion |" in markdown
    assert advice.to_dict()["verdict_markdown"] == markdown
