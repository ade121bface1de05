"""What stepping the stacked engine's slots a chunk at a time costs in speed, side by side.

Same invented depot scenario and interleaved measurement as ``overhead.py`` (its loops and
``interleaved_epochs``): every loop is built once and the loops take turns, 8 steps each, so each
epoch ratio compares epochs spanning the same seconds. Loops, all K=8 tracked with
``engine="stacked"`` except the last: the default step-memory budget, the whole stack in one
chunk (the path before chunking), one slot per chunk, and the hand-written 9-model loop.

    python benchmarks/chunks.py                 # MLP 64-256-256-10 at batch 32 and 128, 1 thread
    python benchmarks/chunks.py --wide          # also MLP 64-1024-1024-10 at batch 256
"""

from __future__ import annotations

import argparse
import os
import statistics
from collections.abc import Iterator

import overhead
import torch

from sgdstab.shadows import stacked as stacked_module

WHOLE = 2**62   # no chunking


class BudgetLoop(overhead.TrackedLoop):
    """K=8 tracked with the stacked engine, stepping under its own step-memory budget."""

    def __init__(self, setup: overhead.Setup, budget: int) -> None:
        super().__init__(setup, 8, "stacked")
        self.budget = budget

    def epochs(self) -> Iterator[bool]:
        inner = super().epochs()
        while True:
            stacked_module.STEP_MEMORY_BUDGET = self.budget
            yield next(inner)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=6, help="measured epochs per loop")
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--wide", action="store_true", help="add the 1024-wide MLP at b=256")
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    default = stacked_module.STEP_MEMORY_BUDGET
    setups = [overhead.Setup(f"MLP 256 b={b}", overhead.sorter_mlp,
                             overhead.parcel_readings(4096, 1), b) for b in (32, 128)]
    if args.wide:
        setups.append(overhead.Setup("MLP 1024 b=256",
                                     lambda: overhead.sorter_mlp(width=1024, features=64),
                                     overhead.parcel_readings(2048, 1), 256))
    print(f"torch {torch.__version__}, {args.threads} thread(s), load average "
          f"{os.getloadavg()[0]:.2f}; medians (± half the interquartile range) over "
          f"{args.rounds} interleaved epochs, the first left out")
    print("| setup | default/whole | one-slot/whole | default/naive | whole/naive | "
          "default budget: slots per chunk |")
    print("|---|---|---|---|---|---|")
    for setup in setups:
        loops = {"default": BudgetLoop(setup, default), "whole": BudgetLoop(setup, WHOLE),
                 "one": BudgetLoop(setup, 1), "naive": overhead.NaiveLoop(setup, 8)}
        measured = overhead.interleaved_epochs(loops, 1 + args.rounds, 8, 0)
        times = {name: [t for t, _, _ in runs[1:]] for name, runs in measured.items()}

        def ratio(a: str, b: str, times: dict[str, list[float]] = times) -> str:
            return overhead.Figure([x / y for x, y in zip(times[a], times[b])]).show()

        stack = loops["default"].tracker.engine._stack   # type: ignore[attr-defined]
        sizes = sorted({stop - start for start, stop in stack.chunks}) if stack is not None \
            and stack.chunks else [len(stack.members) if stack is not None else 0]
        print(f"| {setup.name} | {ratio('default', 'whole')} | {ratio('one', 'whole')} | "
              f"{ratio('default', 'naive')} | {ratio('whole', 'naive')} | "
              f"{','.join(map(str, sizes))} |", flush=True)
        stacked_module.STEP_MEMORY_BUDGET = default
    print(f"load average at the end {os.getloadavg()[0]:.2f}; whole-epoch medians, ms: "
          + ", ".join(f"{k} {1000 * statistics.median(v):.0f}" for k, v in times.items()))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
