"""Plots and a self-contained report.html from a run directory.

Reads history.jsonl (and run.json, advice.json when present; the advice is computed when absent
or stale), draws four PNG charts (``sgdstab.outputs.charts``, matplotlib's Agg canvas; no global
backend is changed) and writes report.html with the charts embedded as base64 data URIs: no
external asset is linked. matplotlib is an optional extra (``pip install 'sgdstab[report]'``).
"""

from __future__ import annotations

import base64
import html
import json
import math
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from .advice import CAUTIONS, StopAdvice, advise, as_readings
from .charts import Chart, _charts, _matplotlib
from .labels import bound_label, criterion_label
from .reading import EpochReading, read_history

__all__ = ["Chart", "write_report", "REPORT_DIR"]

#: Where the report goes inside a run directory unless told otherwise.
REPORT_DIR = "report"

_STYLE = """
body { font-family: system-ui, sans-serif; max-width: 60rem; margin: 2rem auto; padding: 0 1rem;
       color: #222; line-height: 1.45; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.15rem; margin-top: 2rem;
     border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; font-size: 0.85rem; margin: 0.5rem 0; }
th, td { border: 1px solid #ddd; padding: 0.2rem 0.5rem; text-align: left; vertical-align: top; }
th { background: #f3f3f3; }
.stop { background: #eef6ee; border-left: 4px solid #3a7d3a; padding: 0.6rem 1rem; }
.stop.none { background: #f8f1e4; border-left-color: #b07b22; }
.warn { background: #fbecec; border-left: 4px solid #b33; padding: 0.4rem 1rem; }
.no { color: #a33; } .yes { color: #2a6d2a; }
figure { margin: 1rem 0; } figcaption { font-size: 0.85rem; color: #555; }
img { max-width: 100%; }
.scroll { overflow-x: auto; max-width: 100%; }
table.numbers td { white-space: nowrap; }
.verdict { list-style: none; padding: 0; margin: 1rem 0; }
.verdict li { border-left: 5px solid #888; background: #f4f4f4; padding: 0.4rem 0.8rem;
              margin: 0.3rem 0; }
.verdict .status { display: inline-block; min-width: 4.5rem; font-weight: bold;
                   font-size: 0.8rem; }
.verdict .ok { border-left-color: #2e7d32; background: #edf6ee; }
.verdict .ok .status { color: #2e7d32; }
.verdict .warn { border-left-color: #b26a00; background: #fbf3e3; }
.verdict .warn .status { color: #8a5200; }
.verdict .fail { border-left-color: #b3261e; background: #fbeceb; }
.verdict .fail .status { color: #b3261e; }
.verdict .info { border-left-color: #3b6ea8; background: #eef3f9; }
.verdict .info .status { color: #3b6ea8; }
"""

#: How each verdict status is written (in words, so colour is never the only cue).
STATUS_WORDS = {"ok": "OK", "warn": "WARNING", "fail": "FAILED", "info": "NOTE"}


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _fmt(value: Any) -> str:
    if value is None:
        return "&ndash;"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return _e(f"{value:.4g}") if math.isfinite(value) else "&ndash;"
    return _e(value)


def _table(header: Sequence[str], rows: Sequence[Sequence[Any]], css: str = "") -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{_fmt(c)}</td>" for c in row) + "</tr>" for row in rows)
    kind = f' class="{css}"' if css else ""
    return f'<div class="scroll"><table{kind}><tr>{head}</tr>{body}</table></div>'


def _verdict_section(record: Mapping[str, Any]) -> str:
    """advice.json's ``verdict``: one line per topic with its status, at the top of the page."""
    verdict = record.get("verdict")
    if not isinstance(verdict, list) or not verdict:
        return ""
    items = []
    for entry in verdict:
        if not isinstance(entry, Mapping):
            continue
        status = str(entry.get("status", "info"))
        status = status if status in STATUS_WORDS else "info"
        items.append(f'<li class="{status}"><span class="status">{STATUS_WORDS[status]}</span> '
                     f"<strong>{_e(entry.get('topic', ''))}</strong>: "
                     f"{_e(entry.get('text', ''))}</li>")
    return '<ul class="verdict">' + "".join(items) + "</ul>" if items else ""


def _criterion_entries(record: Mapping[str, Any]) -> dict[str, Mapping[str, Any]]:
    return {str(c.get("name")): c for c in record.get("criteria", ()) or ()
            if isinstance(c, Mapping)}


def _stop_section(advice: StopAdvice, record: Mapping[str, Any]) -> str:
    entries = _criterion_entries(record)
    if advice.suggested_epoch is None:
        head = f"No stop suggestion after {advice.epochs_seen} epoch(s)."
        box = "stop none"
    else:
        label = criterion_label(advice.criterion, entries.get(str(advice.criterion)))
        head = (f"Suggested stop: epoch {advice.suggested_epoch} of {advice.epochs_seen} "
                f"(criterion: {label})")
        box = "stop"
    kind = ("from declared constants: they hold under the stated assumptions"
            if advice.certified else "indicative (estimated constants)" if advice.bound_applies else
            f"not applicable: {advice.bound_reason}")
    parts = [f'<div class="{box}"><p><strong>{_e(head)}</strong></p><p>{_e(advice.reason)}</p>'
             f"<p>Bounds: {_e(kind)}</p></div>",
             "<h2>Stop criteria</h2>",
             _table(["criterion", "epoch", "value", "reason"],
                    [(criterion_label(c.name, entries.get(c.name)), c.epoch, c.value, c.reason)
                     for c in advice.criteria])]
    if advice.budget is not None:
        b = advice.budget
        parts.append(_table(
            ["budget on", "target", "last epoch within", "more epochs allowed", "method",
             "projection"],
            [(bound_label(b.bound_name), b.target, b.last_epoch_within,
              "unlimited at this rate" if b.unlimited else b.extra_epochs, b.method, b.reason)]))
    return "\n".join(parts)


def _constants_section(readings: Sequence[EpochReading], run: Mapping[str, Any]) -> str:
    constants = next((r.constants for r in reversed(readings) if r.constants), None)
    if not constants:
        declared = run.get("constants")
        if declared == "estimate":
            return ("<p>Constants were to be estimated, but no epoch recorded an estimate.</p>")
        return ("<p>No constants were given (neither declared nor estimated), so no bound was "
                "computed; only the measured quantities are reported.</p>")
    source = constants.get("source", "unknown")
    if source == "declared":
        where = ("<p class='yes'>Source: <strong>declared</strong> by the user. The bounds are "
                 "certified only if these values truly hold for the loss.</p>")
    else:
        where = ("<p class='no'>Source: <strong>estimated</strong> from the model (largest "
                 "per-example gradient norm; top Hessian eigenvalue by power iteration), as a "
                 "running maximum over the epochs. These are LOWER, local estimates: the bounds "
                 "built on them are indicative, not certified.</p>")
    rows: list[tuple[Any, ...]] = [
        (name, constants.get(name))
        for name in ("lipschitz", "smoothness", "strong_convexity", "loss_bound", "convex")]
    if source != "declared":
        first = next((r.constants for r in readings if r.constants), {})
        rows = [(name, first.get(name), value) for name, value in rows]
        table = _table(["constant", "first estimate", "last (running maximum)"], rows)
    else:
        table = _table(["constant", "value"], rows)
    return where + table


def _bounds_section(readings: Sequence[EpochReading]) -> str:
    last = next((r for r in reversed(readings) if r.bounds), None)
    if last is None:
        return "<p>No bound was computed for this run.</p>"
    bounds = last.bounds
    rows = []
    if "path_applicable" in bounds:
        rows.append(("pathwise divergence (per shadow)", bool(bounds["path_applicable"]),
                     bounds.get("path_reason", ""), "", ""))
    for name, entry in bounds.items():
        if isinstance(entry, Mapping) and "applicable" in entry:
            assumptions = "; ".join(str(a) for a in entry.get("assumptions", ()) or ())
            rows.append((bound_label(name), bool(entry["applicable"]),
                         entry.get("reason") or "", entry.get("source", ""), assumptions))
    text = [f"<p>As of epoch {last.epoch}; regime: {_e(bounds.get('regime', 'unknown'))}.</p>"]
    text.append(_table(["bound", "applies", "reason if not", "source", "assumptions"], rows))
    violated = [r.epoch for r in readings if r.assumption_violated]
    if violated:
        text.append(f"<p class='warn'>At epoch(s) {_e(violated)} a measured divergence exceeded "
                    "its pathwise bound: the declared constants or the convexity assumption are "
                    "wrong for this run, and its bounds do not hold.</p>")
    return "\n".join(text)


def _run_section(run: Mapping[str, Any]) -> str:
    if not run:
        return "<p>run.json not found.</p>"
    rows = [(key, run.get(key)) for key in ("n", "optimizer", "optimizer_reason", "seed", "delta",
                                            "engine", "audit") if key in run]
    shadows = run.get("shadows") or []
    shadow_rows = [(k, s.get("index"), s.get("origin"), s.get("source_index"))
                   for k, s in enumerate(shadows) if isinstance(s, Mapping)]
    return (_table(["setting", "value"], rows)
            + _table(["shadow", "swapped-out training index", "replacement from",
                      "replacement index"], shadow_rows))


def _with_stderr(value: float | None, stderr: float | None) -> str | None:
    if value is None:
        return None
    return f"{value:.4g}" + ("" if stderr is None else f" \u00b1 {stderr:.2g}")


def _epoch_table(advice: StopAdvice) -> str:
    with_target = any(r.within_target is not None for r in advice.rows)
    header = ["epoch", "steps", "train loss", "holdout loss", "expected stability bound",
              "train + bound", "high-probability gap bound", "gap estimate \u00b1 s.e.",
              "train + gap estimate", "mean divergence", "divergence growth per step"]
    rows = []
    for r in advice.rows:
        risk: Any = r.bound_risk
        if r.bound_risk is not None and r.bound_vacuous:
            risk = f"{r.bound_risk:.4g} (vacuous)"
        row = [r.epoch, r.steps, r.train_loss, r.holdout_loss, r.expected_bound, risk,
               r.high_probability_gap, _with_stderr(r.gap_estimate, r.gap_stderr),
               r.measured_risk, r.mean_divergence, r.divergence_rate]
        if with_target:
            row.append(r.within_target)
        rows.append(row)
    if with_target:
        header.append("bound within target")
    return _table(header, rows, css="numbers")


def _notes_section(readings: Sequence[EpochReading]) -> str:
    first_seen: dict[str, int] = {}
    for r in readings:
        for note in r.notes:
            first_seen.setdefault(note, r.epoch)
    if not first_seen:
        return "<p>None.</p>"
    return _table(["first epoch", "note"], [(e, n) for n, e in first_seen.items()])


def _page(title: str, advice: StopAdvice, record: Mapping[str, Any], charts: Sequence[Chart],
          readings: Sequence[EpochReading], run: Mapping[str, Any], problems: Sequence[str]) -> str:
    figures = "\n".join(
        f'<figure><img alt="{_e(c.caption)}" src="data:image/png;base64,'
        f'{base64.b64encode(c.png).decode("ascii")}"><figcaption>{_e(c.caption)}</figcaption>'
        "</figure>" for c in charts)
    warnings_html = "".join(f'<p class="warn">{_e(p)}</p>' for p in problems)
    cautions = "".join(f"<li>{_e(c)}</li>" for c in (advice.cautions or CAUTIONS))
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{_e(title)}</title><style>{_STYLE}</style></head>
<body>
<h1>{_e(title)}</h1>
{warnings_html}
{_verdict_section(record)}
{_stop_section(advice, record)}
<h2>Charts</h2>
{figures}
<h2>Constants and where they came from</h2>
{_constants_section(readings, run)}
<h2>Bounds and their applicability</h2>
{_bounds_section(readings)}
<h2>Cautions</h2>
<ul>{cautions}</ul>
<h2>Per-epoch table</h2>
{_epoch_table(advice)}
<h2>Run</h2>
{_run_section(run)}
<h2>Notes recorded during the run</h2>
{_notes_section(readings)}
</body></html>
"""


# ---------------------------------------------------------------------------------------------
# Entry point
# ---------------------------------------------------------------------------------------------


def _load_json(path: Path, problems: list[str]) -> dict[str, Any]:
    if not path.exists():
        return {}
    try:
        with open(path, encoding="utf-8") as handle:
            data = json.load(handle)
    except (OSError, json.JSONDecodeError) as error:
        problems.append(f"{path.name} could not be read ({error}); ignored")
        return {}
    return data if isinstance(data, dict) else {}


def _advice(run_dir: Path, readings: Sequence[EpochReading], target: float | None,
            problems: list[str]) -> tuple[StopAdvice, dict[str, Any]]:
    """The advice and its record (advice.json as written, with fields the dataclass may not
    keep, such as the verdict and the criteria's labels)."""
    saved = None if target is not None else _load_json(run_dir / "advice.json", problems)
    if saved:
        try:
            advice = StopAdvice.from_dict(saved)
        except (TypeError, ValueError) as error:
            problems.append(f"advice.json is malformed ({error}); the advice was recomputed")
        else:
            if advice.epochs_seen == len(readings):
                return advice, saved
            problems.append(f"advice.json covers {advice.epochs_seen} epoch(s) but the history "
                            f"has {len(readings)}; the advice was recomputed")
            if advice.budget is not None:
                target = advice.budget.target
    advice = advise(readings, target=target)
    return advice, advice.to_dict()


def write_report(run_dir: str | Path, *, out_dir: str | Path | None = None,
                 target: float | None = None) -> Path:
    """Write the PNG charts and report.html for ``run_dir``; return the path of report.html.

    Output goes to ``out_dir`` (default ``run_dir/report``). With ``target`` the advice is
    recomputed with that budget; otherwise advice.json is used when it covers every epoch.
    A damaged history line is skipped with a warning, also shown at the top of the page.
    """
    run_dir = Path(run_dir)
    history = run_dir / "history.jsonl"
    if not history.is_file():
        raise FileNotFoundError(f"{history} not found: is {run_dir} a run directory?")
    _matplotlib()  # fail early, before anything is written
    problems: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        records = read_history(history)
    for warning in caught:
        problems.append(str(warning.message))
        warnings.warn(str(warning.message), warning.category, stacklevel=2)
    readings = as_readings(records)
    if not readings:
        raise ValueError(f"{history} holds no finished epoch")
    run = _load_json(run_dir / "run.json", problems)
    advice, record = _advice(run_dir, readings, target, problems)
    charts = _charts(readings, advice.suggested_epoch)
    out = Path(out_dir) if out_dir is not None else run_dir / REPORT_DIR
    out.mkdir(parents=True, exist_ok=True)
    for chart in charts:
        (out / chart.name).write_bytes(chart.png)
    page = out / "report.html"
    title = f"sgdstab stability report: {run_dir.resolve().name}"
    page.write_text(_page(title, advice, record, charts, readings, run, problems), encoding="utf-8")
    return page
