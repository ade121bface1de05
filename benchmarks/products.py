"""Where the stacked engine's floor is: one batched matrix product over K runs against K separate
ones, for the matrix products of one training step of the benchmark's MLP (64-256-256-10:
each layer's forward product, weight gradient and, past the first layer, input gradient).

If ``torch.bmm`` over the stacked runs cost less per FLOP than the runs' own ``torch.mm`` calls,
stacking could beat the hand-written loop by more than the Python and small kernels it removes;
measured here it costs the same (ratio ~1.0), so the products are a floor.

    python benchmarks/products.py --batch-sizes 32,128 --threads 1
"""

from __future__ import annotations

import argparse
import statistics
import time

import torch

LAYERS = [(64, 256), (256, 256), (256, 10)]


def step_shapes(batch: int) -> list[tuple[tuple[int, int], tuple[int, int]]]:
    shapes = []
    for i, (fan_in, fan_out) in enumerate(LAYERS):
        shapes.append(((batch, fan_in), (fan_in, fan_out)))      # forward
        shapes.append(((fan_out, batch), (batch, fan_in)))       # weight gradient
        if i > 0:
            shapes.append(((batch, fan_out), (fan_out, fan_in)))  # input gradient
    return shapes


def ratio(batch: int, runs: int, repeats: int = 7, steps: int = 50) -> tuple[float, float]:
    """Median over ``repeats`` of (time of one bmm per product) / (time of ``runs`` mm calls per
    product), each timed over ``steps`` steps back to back; and the mm loop's ms per step."""
    shapes = step_shapes(batch)
    lefts = [[torch.randn(*a) for _ in range(runs)] for a, _ in shapes]
    rights = [[torch.randn(*b) for _ in range(runs)] for _, b in shapes]
    stacked = [(torch.stack(a), torch.stack(b)) for a, b in zip(lefts, rights)]
    ratios, per_step = [], 0.0
    for _ in range(repeats):
        start = time.perf_counter()
        for _ in range(steps):
            for a_runs, b_runs in zip(lefts, rights):
                for a, b in zip(a_runs, b_runs):
                    torch.mm(a, b)
        separate = time.perf_counter() - start
        start = time.perf_counter()
        for _ in range(steps):
            for a, b in stacked:
                torch.bmm(a, b)
        ratios.append((time.perf_counter() - start) / separate)
        per_step = 1000 * separate / steps
    return statistics.median(ratios), per_step


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--batch-sizes", default="32,128")
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--runs", type=int, default=9, help="stacked runs (8 shadows + reference)")
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    for batch in (int(b) for b in args.batch_sizes.split(",")):
        median, per_step = ratio(batch, args.runs)
        print(f"batch {batch}, {args.threads} thread(s): one bmm over {args.runs} runs / "
              f"{args.runs} mm calls = {median:.2f} (median of 7); the mm calls take "
              f"{per_step:.2f} ms per step")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
