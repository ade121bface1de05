"""``sgdstab report RUN_DIR``: charts and report.html for a run directory."""

from __future__ import annotations

import argparse
import sys

__all__ = ["configure", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the report command's arguments to ``parser``."""
    from .argtypes import number

    parser.add_argument("run_dir", help="a run directory (holding history.jsonl)")
    parser.add_argument("--out", default=None,
                        help="where to write the charts and report.html (default: RUN_DIR/report)")
    parser.add_argument("--target", type=number(above=0.0), default=None,
                        help="recompute the stop advice with this budget on the expected "
                             "stability bound (default: use the run's advice.json)")


def run(args: argparse.Namespace) -> int:
    """Write the report; 0 on success, 2 for a missing or empty run, 3 without matplotlib."""
    from ..outputs.report import write_report

    try:
        page = write_report(args.run_dir, out_dir=args.out, target=args.target)
    except FileNotFoundError as error:
        print(f"sgdstab report: {error}", file=sys.stderr)
        return 2
    except ValueError as error:
        print(f"sgdstab report: {error}", file=sys.stderr)
        return 2
    except ImportError as error:
        print(f"sgdstab report: {error}", file=sys.stderr)
        return 3
    print(page)
    return 0
