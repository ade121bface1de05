"""The report's charts: divergence, bounds and losses drawn with matplotlib's Agg canvas.

No global backend is changed; matplotlib is an optional extra (``pip install 'sgdstab[report]'``),
imported only when a chart is drawn. ``sgdstab.outputs.report`` embeds the PNGs in report.html.
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from .reading import EpochReading

__all__ = ["Chart", "BAND_FROM", "OFF_CHART"]


@dataclass(frozen=True)
class Chart:
    """One drawn chart: its file, caption and PNG bytes."""

    name: str
    caption: str
    png: bytes


def _matplotlib() -> tuple[Any, Any]:
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError as error:
        raise ImportError("the report needs matplotlib, an optional extra: "
                          "pip install 'sgdstab[report]'") from error
    return Figure, FigureCanvasAgg


# ---------------------------------------------------------------------------------------------
# Charts
# ---------------------------------------------------------------------------------------------


def _number(value: Any) -> float:
    """A plottable float: missing or non-finite values become NaN (a gap in the line)."""
    if value is None or isinstance(value, bool):
        return math.nan
    try:
        number = float(value)
    except (TypeError, ValueError):
        return math.nan
    return number if math.isfinite(number) else math.nan


def _has(values: Sequence[float]) -> bool:
    return any(math.isfinite(v) for v in values)


#: A bound more than this many times the largest measured value is left off its chart (its
#: curve would flatten everything else), and the caption says so.
OFF_CHART = 1e6


def _clip(values: Sequence[float], reference: float) -> tuple[list[float], float | None]:
    """``values`` with points above ``OFF_CHART * reference`` as NaN, and the largest dropped."""
    if not math.isfinite(reference) or reference <= 0:
        return list(values), None
    limit = OFF_CHART * reference
    dropped = [v for v in values if math.isfinite(v) and v > limit]
    return [math.nan if v > limit else v for v in values], (max(dropped) if dropped else None)


def _off_chart_note(largest: float | None, what: str) -> str:
    if largest is None:
        return ""
    return (f" Points of the {what} more than {OFF_CHART:.0e} times the largest measured value "
            f"are left off the chart (largest: {largest:.3g}).")


class _Canvas:
    """A figure with one axes, a log scale when the values span many decades, and a stop mark."""

    def __init__(self, title: str, ylabel: str) -> None:
        figure_class, canvas_class = _matplotlib()
        self.figure = figure_class(figsize=(7.0, 3.6), dpi=100)
        canvas_class(self.figure)
        self.axes = self.figure.add_subplot(1, 1, 1)
        self.axes.set_title(title, fontsize=11)
        self.axes.set_xlabel("epoch")
        self.axes.set_ylabel(ylabel)
        self.axes.grid(True, alpha=0.3)
        self.values: list[float] = []

    def line(self, epochs: Sequence[int], values: Sequence[float], **style: Any) -> None:
        if _has(values):
            self.axes.plot(epochs, values, **style)
            self.values += [v for v in values if math.isfinite(v)]

    def band(self, epochs: Sequence[int], low: Sequence[float], high: Sequence[float],
             **style: Any) -> None:
        if _has(low) and _has(high):
            self.axes.fill_between(epochs, low, high, **style)

    def png(self, stop: int | None, empty: str) -> bytes:
        from matplotlib.ticker import MaxNLocator

        axes = self.axes
        axes.xaxis.set_major_locator(MaxNLocator(integer=True))   # epochs are whole numbers
        if stop is not None:
            axes.axvline(stop, color="0.3", linestyle=":", linewidth=1.5,
                         label=f"suggested stop (epoch {stop})")
        if not self.values:
            axes.text(0.5, 0.5, empty, transform=axes.transAxes, ha="center", va="center",
                      color="0.4")
        else:
            positive = [v for v in self.values if v > 0]
            if len(positive) == len(self.values) and max(positive) / min(positive) > 1e3:
                axes.set_yscale("log")
        if axes.get_legend_handles_labels()[0]:
            axes.legend(fontsize=8, loc="best")
        self.figure.tight_layout()
        buffer = io.BytesIO()
        self.figure.savefig(buffer, format="png")
        return buffer.getvalue()


#: From this many shadows on, the divergence chart shows a band (min to max) and the median
#: instead of one line per shadow (more lines than that repeat colours and hide the chart).
BAND_FROM = 7


def _percentiles(series: Sequence[Sequence[float]]) -> tuple[list[float], list[float],
                                                              list[float]]:
    """Per epoch: the smallest, median and largest finite value over the shadows."""
    low: list[float] = []
    middle: list[float] = []
    high: list[float] = []
    for column in zip(*series):
        finite = sorted(v for v in column if math.isfinite(v))
        if not finite:
            finite = [math.nan]
        half = len(finite) // 2
        median = finite[half] if len(finite) % 2 else (finite[half - 1] + finite[half]) / 2
        low.append(finite[0])
        middle.append(median)
        high.append(finite[-1])
    return low, middle, high


def _same_for_all(series: Sequence[Sequence[float]]) -> bool:
    """Every shadow has the same value at every epoch (NaN where missing)."""
    first = series[0]
    return all(all((math.isnan(a) and math.isnan(b)) or a == b for a, b in zip(first, other))
               for other in series[1:])


def _divergence_chart(readings: Sequence[EpochReading], epochs: list[int], shadows: int,
                      stop: int | None) -> Chart:
    canvas = _Canvas("Parameter divergence and the pathwise bound", "||w - w'||")
    measured = [[_number(r.divergence[k]) if k < len(r.divergence) else math.nan
                 for r in readings] for k in range(shadows)]
    reference = max((v for series in measured for v in series if math.isfinite(v)),
                    default=math.nan)
    dropped: list[float] = []
    bounds = []
    for k in range(shadows):
        bound, largest = _clip([_number(r.path_bound[k]) if k < len(r.path_bound) else math.nan
                                for r in readings], reference)
        bounds.append(bound)
        if largest is not None:
            dropped.append(largest)
    shared = shadows > 0 and _same_for_all(bounds)
    banded = shadows >= BAND_FROM
    if banded:
        low, middle, high = _percentiles(measured)
        canvas.band(epochs, low, high, color="C0", alpha=0.25,
                    label=f"divergence, min to max over {shadows} shadows")
        canvas.values += [v for v in low + high if math.isfinite(v)]   # for the log scale
        canvas.line(epochs, middle, color="C0", marker="o", markersize=3,
                    label="divergence, median over the shadows")
        what = (f"The measured parameter divergence of {shadows} shadows: the band spans the "
                "smallest to the largest, the line is the median")
    else:
        for k in range(shadows):
            canvas.line(epochs, measured[k], color=f"C{k % 10}", marker="o", markersize=3,
                        label=f"shadow {k}")
        what = "The measured parameter divergence of each shadow (solid)"
    if shared:
        canvas.line(epochs, bounds[0], color="black", linestyle="--",
                    label="pathwise bound (the same for every shadow)")
        how = ", with the pathwise bound (dashed black), the same for every shadow here."
    elif banded:
        low, middle, high = _percentiles(bounds)
        canvas.band(epochs, low, high, color="C3", alpha=0.12,
                    label="pathwise bounds, min to max")
        canvas.values += [v for v in low + high if math.isfinite(v)]
        canvas.line(epochs, middle, color="C3", linestyle="--",
                    label="pathwise bound, median over the shadows")
        how = (", with the shadows' pathwise bounds (red: median dashed, band from the smallest "
               "to the largest).")
    else:
        for k in range(shadows):
            canvas.line(epochs, bounds[k], color=f"C{k % 10}", linestyle="--")
        if any(_has(b) for b in bounds):
            canvas.axes.plot([], [], color="0.4", linestyle="--",
                             label="pathwise bound (dashed, in its shadow's colour)")
        how = ", with its pathwise bound (dashed, same colour) where one applies."
    return Chart("divergence.png", what + how
                 + _off_chart_note(max(dropped, default=None), "pathwise bounds"),
                 canvas.png(stop, "no divergence recorded"))


def _charts(readings: Sequence[EpochReading], stop: int | None) -> list[Chart]:
    epochs = [r.epoch for r in readings]
    shadows = max((len(r.divergence) for r in readings), default=0)

    divergence = _divergence_chart(readings, epochs, shadows, stop)

    canvas = _Canvas("Loss difference and the expected stability bound", "loss difference")
    canvas.line(epochs, [_number(r.loss_difference_max) for r in readings], color="C0",
                marker="o", markersize=3, label="max |f(w;z) - f(w';z)|")
    canvas.line(epochs, [_number(r.loss_difference_mean) for r in readings], color="C1",
                marker="o", markersize=3, label="mean |f(w;z) - f(w';z)|")
    reference = max((v for r in readings for v in (_number(r.loss_difference_max),
                                                   _number(r.loss_difference_mean))
                     if math.isfinite(v)), default=math.nan)
    expected, largest_expected = _clip([_number(r.expected_bound) for r in readings], reference)
    uniform, largest_uniform = _clip([_number(r.uniform_stability) for r in readings], reference)
    canvas.line(epochs, expected, color="C3", linestyle="--", label="expected stability bound")
    canvas.line(epochs, uniform, color="C4", linestyle="-.",
                label="seeded uniform stability bound")
    largest = max((v for v in (largest_expected, largest_uniform) if v is not None), default=None)
    stability = Chart("stability.png", "Measured loss differences between the main model and "
                      "the shadows, with the expected stability bound."
                      + _off_chart_note(largest, "bounds"),
                      canvas.png(stop, "no loss difference recorded"))

    canvas = _Canvas("Generalization gap: replace-one estimate and measured", "gap")
    estimate = [_number(r.gap_estimate) for r in readings]
    stderr = [_number(r.gap_stderr) for r in readings]
    canvas.band(epochs, [g - s for g, s in zip(estimate, stderr)],
                [g + s for g, s in zip(estimate, stderr)], color="C0", alpha=0.2,
                label="estimate +/- 1 standard error")
    canvas.line(epochs, estimate, color="C0", marker="o", markersize=3,
                label="replace-one gap estimate")
    canvas.line(epochs, [_number(r.holdout_loss) - _number(r.train_loss) for r in readings],
                color="C2", marker="s", markersize=3, label="holdout loss - train loss")
    gap = Chart("gap.png", "The on-average replace-one estimate of the expected gap (band: one "
                "standard error across shadows) against the measured holdout-minus-train gap.",
                canvas.png(stop, "no gap estimate or holdout loss recorded"))

    canvas = _Canvas("Training and holdout loss", "loss")
    train = [_number(r.train_loss) for r in readings]
    canvas.line(epochs, train, color="C0", marker="o", markersize=3, label="train (probe)")
    canvas.line(epochs, [_number(r.holdout_loss) for r in readings], color="C2", marker="s",
                markersize=3, label="holdout (every unswapped held-out example)")
    canvas.line(epochs, [t + _number(r.expected_bound) for t, r in zip(train, readings)],
                color="C3", linestyle="--", label="train + expected bound")
    canvas.line(epochs, [t + g for t, g in zip(train, estimate)], color="C1", linestyle=":",
                label="train + gap estimate")
    losses = Chart("losses.png", "The main model's training loss (on the probe's training "
                   "examples) and holdout loss (on every held-out example no shadow swapped in), "
                   "with the two sums the stop criteria minimise.",
                   canvas.png(stop, "no loss recorded"))
    return [divergence, stability, gap, losses]


# ---------------------------------------------------------------------------------------------
# HTML
# ---------------------------------------------------------------------------------------------
