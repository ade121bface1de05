"""Tests of `sgdstab bound` (sgdstab/cli_bound.py) on small cases with numbers worked out by hand.

"HRS 2016": Hardt, Recht & Singer 2016, "Train faster, generalize better" (statements from memory).
"""

import argparse
import json

import numpy as np
import pytest

from sgdstab.cli.bound import configure, run
from sgdstab.theory import bounds


def _run(argv, capsys):
    parser = argparse.ArgumentParser(prog="sgdstab bound")
    configure(parser)
    code = run(parser.parse_args(argv))
    out, err = capsys.readouterr()
    return code, out, err


def _table(out):
    """Rows of the epoch table as lists of cells (the lines starting with an epoch number)."""
    lines = out.splitlines()
    start = next(k for k, line in enumerate(lines) if line.split()[:2] == ["epoch", "steps"])
    rows = []
    for line in lines[start + 1 :]:
        if not line.strip():
            break
        rows.append(line.split())
    return rows


CONVEX = ["--regime", "convex", "-n", "1000", "--lipschitz", "1", "--smoothness", "4",
          "--step-size", "0.1", "--epochs", "3", "--batch-size", "10"]  # fmt: skip


def test_convex_table_numbers(capsys):
    # HRS 2016 convex case (from memory): 2 L^2 / n * alpha * T with 100 steps per epoch
    # (1000 / 10): 0.0002 * T -> 0.02, 0.04, 0.06.
    code, out, _ = _run(CONVEX, capsys)
    assert code == 0
    rows = _table(out)
    assert [row[:4] for row in rows] == [
        ["1", "100", "0.1", "0.02"],
        ["2", "200", "0.1", "0.04"],
        ["3", "300", "0.1", "0.06"],
    ]
    # No loss bound: the high-probability column is n/a, with the reason below the table.
    assert all(row[4] == "n/a" for row in rows)
    assert "n/a (gap w.p. 0.95): loss bound (M) not declared" in out
    assert "Thm 3.8" in out   # user-visible text cites the result, not provenance notes
    assert "from memory" not in out


def test_convex_planner_answer(capsys):
    # T = floor(target n / (2 L^2 alpha)) = floor(0.05 * 1000 / 0.2) = 250 steps = 2.5 epochs.
    _, out, _ = _run(CONVEX + ["--target", "0.05"], capsys)
    assert "at most 250 steps (2.5 epochs); bound there 0.05" in out


def test_high_probability_column_numbers(capsys):
    # McDiarmid (SCIENCE.md §3) with eps = 0.02 after epoch 1, n = 1000, M = 5, delta = 0.05:
    # 0.02 + (2 * 1000 * 0.02 + 5) sqrt(ln(20) / 2000) = 1.76 < M.
    _, out, _ = _run(CONVEX + ["--loss-bound", "5"], capsys)
    expected = bounds.high_probability_gap(0.02, 1000, 5.0, 0.05).value
    assert float(_table(out)[0][4]) == pytest.approx(expected, rel=1e-5)


def test_a_vacuous_high_probability_column_is_hidden_with_the_reason(capsys):
    # M = 1: the same bound is 0.02 + 41 sqrt(ln(20) / 2000) = 1.61 >= M at epoch 1 and above
    # later: it says nothing, so the column is left out and the smallest value is named.
    _, out, _ = _run(CONVEX + ["--loss-bound", "1"], capsys)
    assert all(len(row) == 4 for row in _table(out))
    smallest = bounds.high_probability_gap(0.02, 1000, 1.0, 0.05).value
    assert smallest >= 1
    assert f"gap w.p. 0.95 (high-probability gap bound) not shown: at least {smallest:.6g}" in out


def test_json_output_holds_every_epoch_and_the_planner(capsys):
    code, out, _ = _run(CONVEX + ["--loss-bound", "1", "--target", "0.05", "--json"], capsys)
    assert code == 0
    data = json.loads(out)
    assert [e["steps"] for e in data["epochs"]] == [100, 200, 300]
    assert [e["stability"]["value"] for e in data["epochs"]] == pytest.approx([0.02, 0.04, 0.06])
    assert data["epochs"][0]["high_probability_gap"]["vacuous"] is True
    assert data["planner"]["value"] == 250 and data["planner"]["quantity"] == "steps"
    assert data["inputs"]["train_size"] == 1000


def test_step_size_above_two_over_beta_is_na_with_reason(capsys):
    code, out, _ = _run(CONVEX[:-4] + ["--step-size", "0.9", "--epochs", "1"], capsys)
    assert code == 0
    assert _table(out)[0][3] == "n/a"
    assert "n/a (stability bound): step size 0.9 at step 1 exceeds 2/beta = 0.5" in out


def test_step_decay_schedule_by_epoch(capsys):
    # 10 steps per epoch, step size 0.1 halved every 2 epochs: epochs 1-2 at 0.1, 3-4 at 0.05.
    # Convex sums (2 * 1 / 100) * sum alpha: 0.02, 0.04, 0.05, 0.06.
    argv = ["--regime", "convex", "-n", "100", "--lipschitz", "1", "--step-size", "0.1",
            "--epochs", "4", "--batch-size", "10", "--schedule", "step-decay",
            "--decay-factor", "0.5", "--decay-interval", "2"]  # fmt: skip
    _, out, _ = _run(argv, capsys)
    rows = _table(out)
    assert [row[2] for row in rows] == ["0.1", "0.1", "0.05", "0.05"]
    assert [float(row[3]) for row in rows] == pytest.approx([0.02, 0.04, 0.05, 0.06])


def test_values_at_or_above_the_loss_bound_are_called_vacuous(capsys):
    # With n = 1000 and M = 1 the McDiarmid gap is at least sqrt(ln(20) / 2000) ~ 0.039; with
    # M = 0.01 every gap value exceeds M, which the output must say.
    _, out, _ = _run(CONVEX + ["--loss-bound", "0.01"], capsys)
    assert "note: values >= M = 0.01 say nothing" in out
    _, out, _ = _run(CONVEX[:-4] + ["--epochs", "1", "--batch-size", "1000"], capsys)
    assert "say nothing" not in out


def test_nonconvex_c_over_t_shows_the_closed_form(capsys):
    # HRS 2016 non-convex closed form (from memory) with beta = c = L = 1, n = 11, T = 11 per epoch.
    argv = ["--regime", "nonconvex", "-n", "11", "--lipschitz", "1", "--smoothness", "1",
            "--loss-bound", "1", "--schedule", "c-over-t", "--step-size", "1",
            "--epochs", "2"]  # fmt: skip
    _, out, _ = _run(argv, capsys)
    rows = _table(out)
    assert "c/t closed form" in out
    for row, steps in zip(rows, [11, 22]):
        closed = bounds.nonconvex_bound(1.0, steps, 11, 1.0, 1.0).value
        assert float(row[-1]) == pytest.approx(closed, rel=1e-5)
        step_sizes = 1.0 / np.arange(1, steps + 1)
        computed = bounds.nonconvex_schedule_bound(step_sizes, 1, 11, 1.0, 1.0, 1.0).value
        assert float(row[3]) == pytest.approx(computed, rel=1e-5)
        assert float(row[3]) <= float(row[-1])


def test_strongly_convex_planner_step_size_is_capped(capsys):
    argv = ["--regime", "strongly_convex", "-n", "1000", "--lipschitz", "1", "--smoothness", "4",
            "--strong-convexity", "0.5", "--step-size", "0.1", "--epochs", "1",
            "--batch-size", "100", "--target", "0.5", "--solve-for", "step-size"]  # fmt: skip
    _, out, _ = _run(argv, capsys)
    # 2 / (beta + gamma) = 2 / 4.5 = 0.444444.
    assert "step size at most 0.444444" in out and "2/(beta+gamma)" in out


def test_train_size_planner(capsys):
    # Convex, 300 steps of 0.1 with L = 1: n >= 2 * 0.1 * 300 / 0.05 = 1200.
    _, out, _ = _run(CONVEX + ["--target", "0.05", "--solve-for", "train-size"], capsys)
    assert "at least 1200 training examples (for 300 steps)" in out


def _error(argv, capsys) -> str:
    parser = argparse.ArgumentParser(prog="sgdstab bound")
    configure(parser)
    with pytest.raises(SystemExit) as stop:
        run(parser.parse_args(argv))
    assert stop.value.code == 2
    return capsys.readouterr().err


@pytest.mark.parametrize(("option", "value", "message"), [
    ("-n", "-5", "argument --train-size/-n: must be at least 2 training examples, got -5"),
    ("-n", "0", "argument --train-size/-n: must be at least 2 training examples, got 0"),
    ("--delta", "2", "argument --delta: must be less than 1, got 2"),
    ("--epochs", "0", "argument --epochs: must be at least 1 epoch, got 0"),
    ("--lipschitz", "nan", "argument --lipschitz: must be a finite number, got nan"),
    ("--batch-size", "x", "argument --batch-size: expected a whole number, got 'x'"),
])
def test_invalid_input_names_the_option_in_the_users_terms(capsys, option, value, message):
    argv = [a for a in CONVEX]
    if option in argv:
        argv[argv.index(option) + 1] = value
    else:
        argv += [option, value]
    err = _error(argv, capsys)
    assert message in err
    assert "decay_every" not in err and "-150" not in err


def test_a_batch_larger_than_the_training_set_is_refused(capsys):
    code, _, err = _run(CONVEX[:-2] + ["--batch-size", "2000"], capsys)
    assert code == 2 and "--batch-size 2000 is larger than --train-size 1000" in err
