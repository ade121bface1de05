"""Command line: ``sgdstab demo | bound | report``."""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence

__all__ = ["main", "build_parser"]


def build_parser() -> argparse.ArgumentParser:
    from .. import __version__
    from .argtypes import whole_number

    parser = argparse.ArgumentParser(
        prog="sgdstab",
        description="Track the algorithmic stability of SGD in your PyTorch training loop.",
        epilog="Run 'sgdstab COMMAND --help' for a command's options.")
    parser.add_argument("--version", action="version", version=f"sgdstab {__version__}")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    demo = commands.add_parser(
        "demo", help="train the built-in glaze-grading demo with a tracker",
        description="Train a softmax classifier on generated glaze-tile data with a stability "
                    "tracker and write a run directory (TensorBoard events, history.jsonl, "
                    "advice.json, report).")
    demo.add_argument("--out", default="sgdstab-demo",
                      help="run directory to write (default: %(default)s)")
    demo.add_argument("--epochs", type=whole_number(1), default=12,
                      help="epochs to train (default: %(default)s)")
    demo.add_argument("--shadows", type=whole_number(1), default=2,
                      help="number of shadows K, neighbouring datasets (default: %(default)s)")
    demo.add_argument("--seed", type=int, default=0,
                      help="seed of the data, the model and the swaps (default: %(default)s)")
    demo.add_argument("--no-report", action="store_true",
                      help="skip the HTML/PNG report (default: write it when matplotlib is "
                           "installed)")

    bound = commands.add_parser(
        "bound", help="print a published SGD stability bound for a planned run",
        description="The stability bounds of a planned SGD run, epoch by epoch, and with "
                    "--target the planner's answer.")
    from . import bound as cli_bound

    cli_bound.configure(bound)

    report = commands.add_parser(
        "report", help="write charts and report.html for a run directory",
        description="Write PNG charts and a self-contained report.html for a run directory "
                    "(needs matplotlib: pip install 'sgdstab[report]').")
    from . import report as cli_report

    cli_report.configure(report)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    try:
        return _run(argv)
    except BrokenPipeError:   # output piped into a reader that stopped early (e.g. `| head`)
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0


def _run(argv: Sequence[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command == "demo":
        from .demo import run_demo

        run_demo(args.out, epochs=args.epochs, shadows=args.shadows, seed=args.seed,
                 report=not args.no_report)
        return 0
    if args.command == "bound":
        from . import bound as cli_bound

        return int(cli_bound.run(args))
    from . import report as cli_report

    return int(cli_report.run(args))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
