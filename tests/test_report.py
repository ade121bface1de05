"""report.html and its charts from a run directory; the ``report`` command."""

from __future__ import annotations

import argparse
import base64
import html
import json
import sys
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image
import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import Constants, EpochReading, StabilityTracker, read_history
from sgdstab.cli import report as cli_report
from sgdstab.outputs.advice import CAUTIONS, advise
from sgdstab.outputs.charts import BAND_FROM, _Canvas
from sgdstab.outputs.labels import CRITERION_LABELS, criterion_label
from sgdstab.outputs.report import write_report

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature
CHARTS = ("divergence.png", "stability.png", "gap.png", "losses.png")


def _orchard(count: int, seed: int) -> TensorDataset:
    """Generated apple-crate weighings (row norm <= 1, bias folded in) and a 'bruised' label."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, 4, generator=g)
    label = (x[:, 0] - 0.5 * x[:, 1] + 0.4 * torch.randn(count, generator=g) > 0).float()
    rows = torch.cat([x, torch.ones(count, 1)], dim=1)
    rows = rows / rows.norm(dim=1, keepdim=True).clamp(min=1.0)
    return TensorDataset(rows, label.unsqueeze(1))


def tracked_run(log_dir: Path, epochs: int = 5, target: float | None = 0.05) -> None:
    """A small convex run with declared logistic-loss constants, ending with tracker.advise()."""
    torch.manual_seed(0)
    train, held_out = _orchard(160, 1), _orchard(80, 2)
    rows = train.tensors[0]
    lipschitz = float(rows.norm(dim=1).max())
    model = nn.Linear(5, 1, bias=False)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.5)
    loss = F.binary_cross_entropy_with_logits
    loader = DataLoader(train, batch_size=16, shuffle=True,
                        generator=torch.Generator().manual_seed(3))
    constants = Constants(lipschitz=lipschitz, smoothness=lipschitz**2 / 4, convex=True)
    with StabilityTracker(model, optimizer, train_set=train, loss_fn=loss, shadows=3,
                          replacements=held_out, log_dir=log_dir, constants=constants,
                          seed=0) as tracker:
        for _ in range(epochs):
            for x, y in tracker.batches(loader):
                optimizer.zero_grad()
                loss(model(x), y).backward()
                optimizer.step()
            tracker.finish_epoch()
        tracker.advise(target=target)


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("run")
    tracked_run(path)
    return path


class _Assets(HTMLParser):
    """Every tag name and every src / href attribute of a page (stdlib html.parser)."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.sources: list[str] = []
        self.links: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        for name, value in attrs:
            if name == "src":
                self.sources.append(value or "")
            if name == "href":
                self.links.append(value or "")


def _parse(page: Path) -> tuple[str, _Assets]:
    text = page.read_text(encoding="utf-8")
    parser = _Assets()
    parser.feed(text)
    return text, parser


def _write_history(run_dir: Path, readings: list[EpochReading]) -> None:
    run_dir.mkdir(parents=True, exist_ok=True)
    with open(run_dir / "history.jsonl", "w", encoding="utf-8") as handle:
        for reading in readings:
            handle.write(reading.to_json() + "\n")


def _synthetic(epoch: int, **fields) -> EpochReading:
    base = dict(epoch=epoch, steps=10 * epoch, divergence=(0.01 * epoch, 0.02 * epoch),
                audit_divergence=None, layer_divergence={}, loss_difference_max=0.01,
                loss_difference_mean=0.005, gap_estimate=0.002 * epoch * epoch, gap_stderr=0.001,
                train_loss=1.0 / epoch, holdout_loss=1.0 / epoch + 0.01)
    base.update(fields)
    return EpochReading(**base)


# -- files and images ---------------------------------------------------------------------------

def test_report_writes_every_chart_and_the_pngs_decode(run_dir: Path):
    page = write_report(run_dir)
    assert page == run_dir / "report" / "report.html"
    assert page.is_file()
    for name in CHARTS:
        data = (page.parent / name).read_bytes()
        assert data[:8] == PNG_SIGNATURE
        image = matplotlib.image.imread(page.parent / name)  # matplotlib's own PNG reader
        assert image.shape[0] == 360 and image.shape[1] == 700  # 7 x 3.6 inches at 100 dpi
        assert image[..., :3].std() > 0.01  # something was drawn, not a blank canvas


def test_html_is_self_contained_and_embeds_the_same_pngs(run_dir: Path):
    page = write_report(run_dir)
    text, assets = _parse(page)
    assert "link" not in assets.tags and "script" not in assets.tags
    assert assets.links == []
    assert len(assets.sources) == len(CHARTS)
    embedded = set()
    for source in assets.sources:
        prefix = "data:image/png;base64,"
        assert source.startswith(prefix)
        embedded.add(base64.b64decode(source[len(prefix):], validate=True))
    assert embedded == {(page.parent / name).read_bytes() for name in CHARTS}
    assert "http://" not in text and "https://" not in text
    assert "url(" not in text  # no external CSS asset either


def test_html_names_the_suggested_epoch_of_the_saved_advice(run_dir: Path):
    saved = json.loads((run_dir / "advice.json").read_text())
    assert saved["epochs_seen"] == 5
    text, _ = _parse(write_report(run_dir))
    epoch = saved["suggested_epoch"]
    assert epoch is not None
    assert f"Suggested stop: epoch {epoch} of 5" in text
    assert f"(criterion: {saved['criterion_label']})" in text
    assert saved['criterion_label'] == criterion_label(saved['criterion'])
    assert "bound_risk" not in text   # labels, not internal names


def test_html_shows_constants_bounds_and_cautions(run_dir: Path):
    text, _ = _parse(write_report(run_dir))
    assert "<strong>declared</strong>" in text
    assert "expected stability bound" in text and "high-probability gap bound" in text
    # the run declares no loss bound, so the high-probability bound is reported with its reason
    assert "loss bound (M) not declared" in text
    for caution in CAUTIONS:
        assert html.escape(caution, quote=True) in text


def test_a_target_recomputes_the_advice(run_dir: Path, tmp_path: Path):
    text, _ = _parse(write_report(run_dir, out_dir=tmp_path, target=1e-6))
    assert "exceeds the target" in text
    assert (tmp_path / "report.html").is_file()


# -- damaged, missing and stale inputs ----------------------------------------------------------

def test_truncated_last_line_still_reports_with_a_warning(run_dir: Path, tmp_path: Path):
    damaged = tmp_path / "damaged"
    damaged.mkdir()
    lines = (run_dir / "history.jsonl").read_text().splitlines()
    (damaged / "history.jsonl").write_text("\n".join(lines[:-1]) + "\n" + lines[-1][:40])
    for name in ("run.json", "advice.json"):
        (damaged / name).write_bytes((run_dir / name).read_bytes())
    with pytest.warns(UserWarning, match="truncated"):
        page = write_report(damaged)
    text, _ = _parse(page)
    assert "truncated" in text
    # advice.json covered 5 epochs, the readable history 4: the advice is recomputed
    assert "recomputed" in text
    expected = advise(read_history_quietly(damaged))
    assert expected.epochs_seen == 4 and expected.suggested_epoch is not None
    assert f"Suggested stop: epoch {expected.suggested_epoch} of 4" in text


def read_history_quietly(path: Path) -> list[dict]:
    with pytest.warns(UserWarning):
        return read_history(path)


def test_without_advice_json_the_advice_is_computed(tmp_path: Path):
    readings = [_synthetic(e) for e in range(1, 9)]
    _write_history(tmp_path, readings)
    advice = advise(readings)
    assert advice.criterion == "holdout_loss"
    text, _ = _parse(write_report(tmp_path))
    assert f"Suggested stop: epoch {advice.suggested_epoch} of 8" in text
    assert "No constants were given" in text
    assert "run.json not found" in text


def test_estimated_constants_and_inapplicable_bounds_are_labelled(tmp_path: Path):
    estimated = {"lipschitz": 2.5, "smoothness": 7.0, "strong_convexity": 0.0,
                 "loss_bound": None, "convex": False, "source": "estimated"}
    reason = "optimizer is Adam: the bounds are proved for plain SGD (the tracker still measures)"
    entry = {"value": None, "applicable": False, "reason": reason, "source": "s",
             "assumptions": ["plain SGD"], "t0": None}
    bounds = {"regime": "nonconvex", "path_applicable": False, "path_reason": reason,
              "expected": entry, "uniform_stability": entry, "high_probability": entry}
    _write_history(tmp_path, [_synthetic(e, constants=estimated, bounds=bounds)
                              for e in range(1, 5)])
    text, _ = _parse(write_report(tmp_path))
    assert "<strong>estimated</strong>" in text
    assert "indicative, not certified" in text
    assert "optimizer is Adam" in text
    assert "not applicable" in text


def test_notes_are_escaped(tmp_path: Path):
    _write_history(tmp_path, [_synthetic(1, notes=("<script>alert(1)</script>",))])
    text, assets = _parse(write_report(tmp_path))
    assert "script" not in assets.tags
    assert "&lt;script&gt;" in text


def test_empty_or_missing_history_is_refused(tmp_path: Path):
    with pytest.raises(FileNotFoundError):
        write_report(tmp_path)
    (tmp_path / "history.jsonl").write_text("")
    with pytest.raises(ValueError, match="no finished epoch"):
        write_report(tmp_path)


def test_missing_matplotlib_gives_a_clear_error(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    _write_history(tmp_path, [_synthetic(1)])
    for name in ("matplotlib", "matplotlib.figure", "matplotlib.backends.backend_agg"):
        monkeypatch.setitem(sys.modules, name, None)  # makes the import fail
    with pytest.raises(ImportError, match=r"pip install 'sgdstab\[report\]'"):
        write_report(tmp_path)
    assert not (tmp_path / "report").exists()
    args = argparse.Namespace(run_dir=str(tmp_path), out=None, target=None)
    assert cli_report.run(args) == 3


# -- the command --------------------------------------------------------------------------------

def test_command_writes_the_report_and_prints_its_path(run_dir: Path, tmp_path: Path,
                                                      capsys: pytest.CaptureFixture[str]):
    parser = argparse.ArgumentParser()
    cli_report.configure(parser)
    args = parser.parse_args([str(run_dir), "--out", str(tmp_path / "out"), "--target", "0.1"])
    assert cli_report.run(args) == 0
    printed = capsys.readouterr().out.strip()
    assert Path(printed) == tmp_path / "out" / "report.html"
    assert Path(printed).is_file()
    missing = parser.parse_args([str(tmp_path / "nowhere")])
    assert cli_report.run(missing) == 2
    assert "not found" in capsys.readouterr().err


def test_the_package_command_line_runs_the_report(run_dir: Path, tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]):
    cli = pytest.importorskip("sgdstab.cli.main")
    assert cli.main(["report", str(run_dir), "--out", str(tmp_path)]) == 0
    assert Path(capsys.readouterr().out.strip()) == tmp_path / "report.html"


# -- what a reader sees -------------------------------------------------------------------------

def test_the_verdict_block_comes_first_with_a_word_for_each_status(run_dir: Path, tmp_path: Path):
    # a hand-written advice.json with the verdict list the advice writes
    saved = json.loads((run_dir / "advice.json").read_text())
    saved["verdict"] = [
        {"topic": "Stop", "status": "ok", "text": "Stop at epoch 3 <of 5>."},
        {"topic": "Lockstep", "status": "fail", "text": "The null swap drifted."},
        {"topic": "Bounds", "status": "warn", "text": "Estimated constants."},
        {"topic": "Gap", "status": "info", "text": "Two shadows: noisy."},
        {"topic": "Odd", "status": "strange", "text": "Unknown status reads as a note."},
    ]
    saved["criteria"][0]["label"] = "my own label"
    other = tmp_path / "run"
    other.mkdir()
    for name in ("history.jsonl", "run.json"):
        (other / name).write_bytes((run_dir / name).read_bytes())
    (other / "advice.json").write_text(json.dumps(saved))
    text, _ = _parse(write_report(other))
    block = text[text.index('<ul class="verdict">'):]
    assert text.index('<ul class="verdict">') < text.index("Suggested stop") < \
        text.index("<h2>Charts</h2>")
    for word, topic in (("OK", "Stop"), ("FAILED", "Lockstep"), ("WARNING", "Bounds"),
                        ("NOTE", "Gap"), ("NOTE", "Odd")):
        assert f'<span class="status">{word}</span> <strong>{topic}</strong>' in block
    assert "Stop at epoch 3 &lt;of 5&gt;." in block
    assert '<li class="fail">' in block and '<li class="strange">' not in block
    assert "my own label" in text    # a criterion's own label wins over the known one
    # no verdict in advice.json (an older file): no block
    del saved["verdict"]
    (other / "advice.json").write_text(json.dumps(saved))
    plain, _ = _parse(write_report(other))
    assert '<ul class="verdict">' not in plain


def test_every_known_criterion_has_a_label_and_unknown_names_read_as_words():
    from sgdstab.outputs.advice import LABELS

    assert set(LABELS) <= set(CRITERION_LABELS)      # every criterion the advice names
    assert {"bound_risk", "bound_budget", "measured_risk"} <= set(CRITERION_LABELS)  # older files
    assert criterion_label("bound_risk") == "training loss + stability bound"
    assert criterion_label("holdout_loss") == "lowest held-out loss"
    assert criterion_label("new_rule") == "new rule"
    assert criterion_label("bound_risk", {"label": "given"}) == "given"


def test_epoch_ticks_are_whole_numbers():
    canvas = _Canvas("t", "y")
    canvas.line([1, 2, 3], [0.1, 0.2, 0.3])
    canvas.png(None, "empty")
    ticks = [t for t in canvas.axes.get_xticks() if 1 <= t <= 3]
    assert ticks and all(float(t).is_integer() for t in ticks)


def test_the_wide_table_scrolls_inside_the_page(run_dir: Path):
    text, _ = _parse(write_report(run_dir))
    assert ".scroll { overflow-x: auto" in text
    table = text[text.index("<h2>Per-epoch table</h2>"):text.index("<h2>Run</h2>")]
    assert table.count('<div class="scroll"><table class="numbers">') == 1
    assert table.split("</tr>")[0].count("<th>") <= 12


def test_many_shadows_are_drawn_as_a_band_and_a_shared_bound_as_one_line(tmp_path: Path):
    many = 16
    assert many >= BAND_FROM
    readings = [_synthetic(e, divergence=tuple(0.001 * (k + 1) * e for k in range(many)),
                           path_bound=(0.05 * e,) * many) for e in (1, 2, 3)]
    _write_history(tmp_path, readings)
    text, _ = _parse(write_report(tmp_path))
    assert "the band spans the smallest to the largest, the line is the median" in text
    assert "the same for every shadow" in text
    # two shadows with different bounds: one line each, legend entry in a neutral colour
    few = tmp_path / "few"
    _write_history(few, [_synthetic(e, path_bound=(0.05 * e, 0.07 * e)) for e in (1, 2, 3)])
    text, _ = _parse(write_report(few))
    assert "with its pathwise bound (dashed, same colour)" in text
