"""Package surface: lazy public names, torch-free bounds, the command line."""

from __future__ import annotations

import subprocess
import sys

import sgdstab
from sgdstab.cli.main import build_parser, main


def test_importing_the_bounds_through_the_package_loads_no_torch():
    code = "import sys, sgdstab.bounds; sys.exit(1 if 'torch' in sys.modules else 0)"
    assert subprocess.run([sys.executable, "-c", code], timeout=60).returncode == 0


def test_every_public_name_resolves():
    for name in sgdstab.__all__:
        assert getattr(sgdstab, name) is not None


def test_cli_has_the_three_commands():
    parser = build_parser()
    assert parser.parse_args(["demo"]).command == "demo"
    assert parser.parse_args(["report", "somewhere"]).command == "report"
    bound = ["bound", "--regime", "convex", "-n", "100", "--lipschitz", "1", "--step-size", "0.1"]
    assert parser.parse_args(bound).command == "bound"


def test_demo_command_writes_a_run_directory(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "run"), "--epochs", "2", "--no-report"]) == 0
    printed = capsys.readouterr().out
    assert "TensorBoard" in printed and "null-swap audit (epoch 1): divergence 0.0" in printed
    assert (tmp_path / "run" / "history.jsonl").read_text().count("\n") == 2
