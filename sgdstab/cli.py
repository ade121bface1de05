"""Command line: ``sgdstab demo | bound | report``."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

__all__ = ["main", "build_parser"]


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="sgdstab",
        description="Track the algorithmic stability of SGD in your PyTorch training loop.")
    commands = parser.add_subparsers(dest="command", required=True)

    demo = commands.add_parser("demo", help="train the built-in glaze-grading demo with a tracker")
    demo.add_argument("--out", default="sgdstab-demo", help="run directory (default: %(default)s)")
    demo.add_argument("--epochs", type=int, default=12, help="epochs (default: %(default)s)")
    demo.add_argument("--shadows", type=int, default=2, help="shadows K (default: %(default)s)")
    demo.add_argument("--seed", type=int, default=0, help="seed (default: %(default)s)")
    demo.add_argument("--no-report", action="store_true", help="skip the HTML/PNG report")

    bound = commands.add_parser("bound", help="print a published SGD stability bound for a plan")
    from . import cli_bound

    cli_bound.configure(bound)

    report = commands.add_parser("report", help="write plots and report.html for a run directory")
    try:
        from . import cli_report
    except ImportError:  # pragma: no cover - only while the report module is missing
        cli_report = None
    if cli_report is not None:
        cli_report.configure(report)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command == "demo":
        from .demo import run_demo

        if args.epochs < 1 or args.shadows < 1:
            parser.error("--epochs and --shadows must be at least 1")
        run_demo(args.out, epochs=args.epochs, shadows=args.shadows, seed=args.seed,
                 report=not args.no_report)
        return 0
    if args.command == "bound":
        from . import cli_bound

        return int(cli_bound.run(args))
    from . import cli_report

    return int(cli_report.run(args))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
