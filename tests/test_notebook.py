"""What a notebook user sees: short reprs, HTML reprs, a DataFrame of the readings, len() of the
tracked batches (so a progress bar knows its total)."""

from __future__ import annotations

import math
import sys

import pytest
import torch
import torch.nn.functional as F

from sgdstab import EpochReading, StabilityTracker, read_history
from sgdstab.outputs.reading import FRAME_COLUMNS, readings_to_frame

from ._toy import loader, mlp, pebbles, train


@pytest.fixture(scope="module")
def tracked(tmp_path_factory):
    out = tmp_path_factory.mktemp("notebook")
    data = pebbles()
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.2)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=3,
                               replacements=pebbles(count=30, seed=3), log_dir=out)
    readings = train(model, opt, loader(data), epochs=2, tracker=tracker)
    tracker.close()
    return tracker, readings, out


def test_a_readings_repr_is_short_and_names_its_figures(tracked):
    _, readings, _ = tracked
    text = repr(readings[-1])
    assert len(text) < 400 < len(str(readings[-1].to_dict()))
    assert text.startswith("<EpochReading epoch 2, ")
    assert f"largest divergence (3 shadows) {max(readings[-1].divergence):.4g}" in text
    # the held-out loss is measured on every unswapped held-out example (30 less the 3 swapped in)
    assert readings[-1].holdout_count == 27
    assert f"holdout loss (27 examples) {readings[-1].holdout_loss:.4g}" in text


def test_a_readings_html_repr_is_a_table_with_its_notes_escaped():
    reading = EpochReading(epoch=1, steps=5, divergence=(0.5,), audit_divergence=0.0,
                           layer_divergence={}, loss_difference_max=None,
                           loss_difference_mean=None, gap_estimate=0.1, gap_stderr=0.02,
                           train_loss=0.3, holdout_loss=None, notes=("a < b & c",))
    page = reading._repr_html_()
    assert "<table>" in page and "a &lt; b &amp; c" in page and "a < b" not in page
    assert "0.1 \u00b1 0.02" in page and "holdout" not in page


def test_the_trackers_repr_says_what_it_tracks(tracked):
    tracker, _, out = tracked
    text = repr(tracker)
    assert len(text) < 200
    assert "3 shadows" in text and "epoch 2" in text and str(out) in text


def test_readings_to_frame_from_readings_and_from_history(tracked):
    _, readings, out = tracked
    frame = readings_to_frame(readings)
    assert list(frame.index) == [1, 2]
    assert list(frame.columns[:len(FRAME_COLUMNS)]) == list(FRAME_COLUMNS)
    assert frame.loc[2, "divergence_1"] == readings[1].divergence[1]
    assert frame.loc[2, "divergence_max"] == max(readings[1].divergence)
    assert frame.loc[1, "steps"] == readings[0].steps
    assert math.isnan(frame.loc[2, "expected_bound"])   # no constants: no bound
    again = readings_to_frame(read_history(out))
    assert again.loc[2, "gap_estimate"] == pytest.approx(readings[1].gap_estimate, rel=1e-12)


def test_readings_to_frame_without_pandas_says_how_to_get_it(tracked, monkeypatch):
    monkeypatch.setitem(sys.modules, "pandas", None)   # import pandas now raises ImportError
    with pytest.raises(ImportError, match="pip install pandas"):
        readings_to_frame(tracked[1])


def test_tracked_batches_have_the_loaders_length():
    data = pebbles()
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.2)
    batches = loader(data)
    with StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data,
                          shadows=1) as tracker:
        stream = tracker.batches(batches)
        assert len(stream) == len(batches) > 1
        seen = 0
        for x, y in stream:
            opt.zero_grad()
            F.cross_entropy(model(x), y).backward()
            opt.step()
            seen += 1
        assert seen == len(stream)
        assert tracker.finish_epoch().steps == len(batches)
