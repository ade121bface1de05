"""The command line as a user meets it: --version, python -m sgdstab, help with defaults, the
demo's printout (legend, advice once, progress bar only on a terminal)."""

from __future__ import annotations

import argparse
import io
import subprocess
import sys

import pytest

import sgdstab
from sgdstab.cli.demo import COLUMNS, _progress
from sgdstab.cli.main import build_parser, main


def test_version_flag_prints_the_package_version(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["--version"])
    assert stop.value.code == 0
    assert capsys.readouterr().out.strip() == f"sgdstab {sgdstab.__version__}"


def test_python_dash_m_runs_the_same_command_line():
    done = subprocess.run([sys.executable, "-m", "sgdstab", "--version"], capture_output=True,
                          text=True, timeout=60)
    assert done.returncode == 0 and done.stdout.strip() == f"sgdstab {sgdstab.__version__}"
    done = subprocess.run([sys.executable, "-m", "sgdstab", "bound", "--regime", "convex",
                           "-n", "-5", "--lipschitz", "1", "--step-size", "0.1"],
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 2
    assert "argument --train-size/-n: must be at least 2 training examples, got -5" in done.stderr


def _subparsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


@pytest.mark.parametrize("command", ["demo", "bound", "report"])
def test_every_option_has_help_and_says_its_default(command):
    sub = _subparsers(build_parser())[command]
    for action in sub._actions:
        if isinstance(action, argparse._HelpAction) or not action.option_strings:
            continue
        assert action.help, action.option_strings
        assert "default" in action.help or "required" in action.help, action.option_strings
    # the defaults are filled in, not left as %(default)s
    assert "%(default)" not in sub.format_help()


def test_demo_prints_a_legend_and_its_advice_once(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "run"), "--epochs", "3", "--no-report"]) == 0
    printed = capsys.readouterr().out
    for heading, _, meaning in COLUMNS[2:]:
        assert f"  {heading:<15} {meaning}" in printed
    assert "exp. bound" not in printed
    assert printed.count("Suggested stop") == 1 and printed.count("Verdict:") == 1
    assert printed.index("Verdict:") < printed.index("max div.")   # the verdict first
    # each verdict line once; the advice's reason (which stop to follow) once
    verdict = printed[printed.index("Verdict:"):printed.index("max div.")]
    lines = [line for line in verdict.splitlines() if line.startswith("  [")]
    assert len(lines) == len(set(lines)) == 6
    for name in ("holdout_loss", "bound_risk", "measured_risk"):
        assert name not in printed   # labels, not internal names
    # captured output is no terminal: no carriage-return progress bar
    assert "\r" not in printed and "trained 3 epochs in" in printed


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_the_progress_bar_is_drawn_in_place_on_a_terminal():
    stream = _Terminal()
    for epoch in (1, 2):
        _progress(epoch, 2, 0.0, stream)
    text = stream.getvalue()
    assert text.count("\r") == 2 and text.endswith("\n") and "epoch 2/2" in text
    plain = io.StringIO()
    for epoch in (1, 2):
        _progress(epoch, 2, 0.0, plain)
    assert "\r" not in plain.getvalue() and plain.getvalue().count("\n") == 1
