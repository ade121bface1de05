"""TensorBoard sees what a tracked run writes: checked with its event reader and its own server.

Outside sources: ``tensorboard.backend.event_processing.event_accumulator`` (TensorBoard's event
reader), the custom-scalars ``layout_pb2`` proto, and a real ``tensorboard`` server queried over
its HTTP data API (routes read from the installed tensorboard 2.21: ``/data/runs``,
``/data/plugin/scalars/tags``, ``/data/plugin/scalars/scalars``,
``/data/plugin/custom_scalars/layout``).
"""

from __future__ import annotations

import json
import re
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from tensorboard.backend.event_processing import event_accumulator
from tensorboard.plugins.custom_scalar import layout_pb2
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import Constants, StabilityTracker
from sgdstab.outputs.reading import EpochReading
from sgdstab.outputs.sinks import (
    BOUNDS_RUN,
    advice_markdown,
    bound_tags,
    dashboard_layout,
    scalar_tags,
    summary_markdown,
)

SHADOWS = 3
EPOCHS = 3
SERVER_WAIT = 60.0  # seconds, upper bound on the server's start and first load


def _lighthouse(count: int, seed: int) -> TensorDataset:
    """Generated fog-sensor readings at an invented lighthouse (row norm <= 1, bias folded in)."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, 3, generator=g)
    fog = (x[:, 0] + 0.5 * x[:, 2] + 0.3 * torch.randn(count, generator=g) > 0).float()
    rows = torch.cat([x, torch.ones(count, 1)], dim=1)
    return TensorDataset(rows / rows.norm(dim=1, keepdim=True).clamp(min=1.0), fog.unsqueeze(1))


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list, object]:
    log_dir = tmp_path_factory.mktemp("dashboard")
    torch.manual_seed(0)
    train, held_out = _lighthouse(120, 1), _lighthouse(60, 2)
    lipschitz = float(train.tensors[0].norm(dim=1).max())
    model = nn.Linear(4, 1, bias=False)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.5)
    loss = F.binary_cross_entropy_with_logits
    loader = DataLoader(train, batch_size=12, shuffle=True,
                        generator=torch.Generator().manual_seed(1))
    constants = Constants(lipschitz=lipschitz, smoothness=lipschitz**2 / 4, convex=True,
                          loss_bound=None)
    with StabilityTracker(model, optimizer, train_set=train, loss_fn=loss, shadows=SHADOWS,
                          replacements=held_out, log_dir=log_dir, constants=constants,
                          seed=0) as tracker:
        readings = []
        for _ in range(EPOCHS):
            for x, y in tracker.batches(loader):
                optimizer.zero_grad()
                loss(model(x), y).backward()
                optimizer.step()
            readings.append(tracker.finish_epoch())
        advice = tracker.advise(target=0.5)
    return log_dir, readings, advice


def _expected_scalars(readings: list, tags=scalar_tags, step: str = "steps"
                      ) -> dict[str, list[tuple[int, float]]]:
    series: dict[str, list[tuple[int, float]]] = {}
    for reading in readings:
        for tag, value in tags(reading):
            series.setdefault(tag, []).append((getattr(reading, step), value))
    return series


# -- the event files, read by TensorBoard's own reader ------------------------------------------

def _accumulator(log_dir: Path) -> event_accumulator.EventAccumulator:
    accumulator = event_accumulator.EventAccumulator(
        str(log_dir), size_guidance={event_accumulator.SCALARS: 0, event_accumulator.TENSORS: 0})
    accumulator.Reload()
    return accumulator


def test_event_files_hold_every_reading_value(run):
    log_dir, readings, _ = run
    accumulator = _accumulator(log_dir)
    expected = _expected_scalars(readings)
    assert "sgdstab/divergence/shadow_2" in expected
    assert set(accumulator.Tags()["scalars"]) == set(expected)
    # x axis: the optimizer step count (10 steps an epoch here), not the epoch
    assert [e.step for e in accumulator.Scalars("sgdstab/divergence/shadow_2")] == [10, 20, 30]
    for tag, points in expected.items():
        events = accumulator.Scalars(tag)
        # x axis: the optimizer step count (10 steps an epoch here), not the epoch
        assert [e.step for e in events] == [step for step, _ in points]
        # event files store float32 (numpy does the same rounding)
        np.testing.assert_array_equal(
            np.asarray([e.value for e in events], dtype=np.float32),
            np.asarray([value for _, value in points], dtype=np.float32))


def test_bounds_go_to_a_sibling_run_under_the_measured_quantitys_tag(run):
    log_dir, readings, _ = run
    main = set(_accumulator(log_dir).Tags()["scalars"])
    bounds = _accumulator(log_dir / BOUNDS_RUN)
    expected = _expected_scalars(readings, bound_tags)
    assert "sgdstab/stability/loss_difference_mean" in expected   # the expected bound
    assert set(bounds.Tags()["scalars"]) == set(expected)
    assert set(expected) <= main   # every bound shares its chart with a measured curve
    for tag, points in expected.items():
        np.testing.assert_array_equal(
            np.float32([e.value for e in bounds.Scalars(tag)]), np.float32([v for _, v in points]))
    last = readings[-1]
    assert dict(bound_tags(last))["sgdstab/stability/loss_difference_mean"] == last.expected_bound


@dataclass(frozen=True)
class _WithTrivialLoss(EpochReading):
    trivial_loss: float | None = None   # the field the readings are gaining


def _reading(**fields) -> EpochReading:
    base = dict(epoch=2, steps=40, divergence=(0.1, 0.2), audit_divergence=None,
                layer_divergence={}, loss_difference_max=0.05, loss_difference_mean=0.01,
                gap_estimate=0.02, gap_stderr=0.01, train_loss=0.5, holdout_loss=0.6)
    base.update(fields)
    cls = _WithTrivialLoss if "trivial_loss" in fields else EpochReading
    return cls(**base)


def test_non_finite_and_vacuous_bounds_are_not_written():
    constants = {"lipschitz": 2.0, "loss_bound": 1.0}
    reading = _reading(path_bound=(float("inf"), 0.3), expected_bound=8e101,
                       uniform_stability=float("nan"), high_probability_gap=0.4,
                       constants=constants)
    # path bound 0.3 -> L * 0.3 = 0.6 < M = 1 kept; 8e101 >= M dropped; inf, nan dropped
    assert dict(bound_tags(reading)) == {"sgdstab/divergence/shadow_1": 0.3,
                                         "sgdstab/gap/holdout_minus_train": 0.4}
    # the reading's trivial loss (when it has one) wins over M
    reading = _reading(path_bound=(0.1, 0.3), expected_bound=0.5, high_probability_gap=0.7,
                       constants=constants, trivial_loss=0.55)
    assert dict(bound_tags(reading)) == {"sgdstab/divergence/shadow_0": 0.1,
                                         "sgdstab/stability/loss_difference_mean": 0.5}
    # nothing known to compare with: only the non-finite ones are dropped
    reading = _reading(path_bound=(1e30, float("inf")), expected_bound=1e30)
    assert dict(bound_tags(reading)) == {"sgdstab/divergence/shadow_0": 1e30,
                                         "sgdstab/stability/loss_difference_mean": 1e30}
    # a frozen shadow's NaN divergence is not written either
    assert "sgdstab/divergence/shadow_0" not in dict(scalar_tags(_reading(
        divergence=(float("nan"), 0.2))))


def test_prefix_and_epoch_axis_are_configurable(tmp_path):
    from sgdstab.outputs.sinks import TensorBoardSink

    sink = TensorBoardSink(tmp_path, prefix="stab", step_axis="epoch")
    sink.write_layout(2)
    sink.write(_reading(expected_bound=0.05))
    with pytest.raises(RuntimeError, match="before the first"):
        sink.configure(prefix="other/")
    sink.close()
    tags = set(_accumulator(tmp_path).Tags()["scalars"])
    assert "stab/divergence/shadow_1" in tags and all(t.startswith("stab/") for t in tags)
    assert [e.step for e in _accumulator(tmp_path).Scalars("stab/loss/train_probe")] == [2]
    with pytest.raises(ValueError, match="step_axis"):
        TensorBoardSink(tmp_path / "x", step_axis="wall")


def test_event_files_hold_the_layout_and_the_advice_text(run):
    log_dir, _, advice = run
    accumulator = _accumulator(log_dir)
    tensors = accumulator.Tags()["tensors"]
    config = "custom_scalars__config__"  # the custom-scalars plugin's config tag
    assert config in tensors
    layout = layout_pb2.Layout()
    layout.ParseFromString(accumulator.Tensors(config)[0].tensor_proto.string_val[0])
    wanted = dashboard_layout(SHADOWS)
    assert [c.title for c in layout.category] == list(wanted)
    for category in layout.category:
        assert [chart.title for chart in category.chart] == list(wanted[category.title])
    text_tag = next(tag for tag in tensors if tag.startswith("sgdstab/advice"))
    event = accumulator.Tensors(text_tag)[0]
    written = event.tensor_proto.string_val[0].decode("utf-8")
    assert event.step == 30   # the last reading's optimizer step
    assert written == advice_markdown(advice.to_dict(), advice.summary())
    assert f"epoch {advice.suggested_epoch}" in written
    saved = json.loads((log_dir / "advice.json").read_text())
    from sgdstab import __version__
    assert saved["sgdstab_version"] == __version__ and saved["schema_version"] >= 1


def test_advice_markdown_writes_the_verdict_and_a_bulleted_summary():
    summary = "Suggested stop: epoch 3 (bound_risk).\n  bound_risk: epoch 3.\n  other: -.\nEnd."
    # the advice's own Markdown (verdict, suggestion, criteria, cautions) when it carries one
    assert advice_markdown({"verdict_markdown": "**Stop at epoch 3**"}, summary) == \
        "**Stop at epoch 3**"
    text = advice_markdown({}, summary)
    assert "- bound\\_risk: epoch 3.\n- other: -." in text   # one list, underscores escaped
    assert summary_markdown(summary).splitlines()[0] == "Suggested stop: epoch 3 (bound\\_risk)."
    assert "verdict" not in advice_markdown({}, "plain")


# -- a real TensorBoard server -----------------------------------------------------------------

def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _get(base: str, route: str, **query: str) -> object:
    url = base + route + ("?" + urllib.parse.urlencode(query) if query else "")
    with urllib.request.urlopen(url, timeout=10) as response:
        return json.loads(response.read().decode("utf-8"))


@pytest.fixture(scope="module")
def server(run) -> Iterator[str]:
    log_dir = run[0]
    port = _free_port()
    process = subprocess.Popen(
        [sys.executable, "-m", "tensorboard.main", "--logdir", str(log_dir), "--host",
         "127.0.0.1", "--port", str(port), "--load_fast", "false", "--reload_interval", "1"],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + SERVER_WAIT
        while True:
            if process.poll() is not None:
                raise RuntimeError("tensorboard exited: "
                                   + process.stderr.read().decode("utf-8", "replace")[-2000:])
            try:
                tags = _get(base, "/data/plugin/scalars/tags")
                if any("sgdstab/divergence/shadow_0" in run_tags for run_tags in tags.values()) \
                        and BOUNDS_RUN in tags:
                    break
            except (urllib.error.URLError, ConnectionError, OSError):
                pass
            if time.monotonic() > deadline:
                raise RuntimeError(f"tensorboard did not serve the run within {SERVER_WAIT} s")
            time.sleep(0.5)
        yield base
    finally:
        process.terminate()
        try:
            process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)
        process.stderr.close()


def test_server_lists_our_tags(run, server):
    _, readings, _ = run
    runs = _get(server, "/data/runs")
    assert sorted(runs) == [".", BOUNDS_RUN]  # the log dir itself and the bounds beside it
    served = _get(server, "/data/plugin/scalars/tags")
    assert set(served["."]) == set(_expected_scalars(readings))
    assert set(served[BOUNDS_RUN]) == set(_expected_scalars(readings, bound_tags))


def test_server_returns_the_values_we_wrote(run, server):
    _, readings, _ = run
    for run_name, tags, tag in ((".", scalar_tags, "sgdstab/divergence/shadow_1"),
                                (".", scalar_tags, "sgdstab/gap/replace_one_estimate"),
                                (BOUNDS_RUN, bound_tags, "sgdstab/stability/loss_difference_mean")):
        points = _get(server, "/data/plugin/scalars/scalars", run=run_name, tag=tag)
        steps = [p[1] for p in points]  # [wall_time, step, value]
        values = np.asarray([p[2] for p in points], dtype=np.float32)
        expected = _expected_scalars(readings, tags)[tag]
        assert steps == [step for step, _ in expected]
        np.testing.assert_array_equal(values, np.float32([v for _, v in expected]))


def test_server_serves_our_layout_and_every_chart_finds_its_tags(run, server):
    _, readings, _ = run
    served = _get(server, "/data/plugin/scalars/tags")
    served_tags = set(served["."])
    layout = _get(server, "/data/plugin/custom_scalars/layout")
    wanted = dashboard_layout(SHADOWS)
    categories = {c["title"]: c for c in layout["category"]}
    assert list(categories) == list(wanted)
    for title, charts in wanted.items():
        served_charts = {chart["title"]: chart for chart in categories[title]["chart"]}
        assert list(served_charts) == list(charts)
        for chart_title, (kind, tags) in charts.items():
            chart = served_charts[chart_title]
            if kind == "Margin":
                # layout.proto: a margin series names EXACT tags (value, lower, upper)
                series = chart["margin"]["series"]
                assert len(series) == 1
                for field in ("value", "lower", "upper"):
                    assert series[0][field] in served_tags, (chart_title, field)
            else:
                # layout.proto: multiline tags are regular expressions matched from the start
                assert chart["multiline"]["tag"] == tags
                for pattern in tags:
                    assert any(re.match(pattern, tag) for tag in served_tags), pattern
    # the divergence charts' tags also match a bound in the bounds run (same tag, other colour)
    assert any(re.match(dashboard_layout(SHADOWS)["sgdstab: divergence"][
        "shadow 0: divergence and its pathwise bound (run 'bounds')"][1][0], tag)
        for tag in served[BOUNDS_RUN])
