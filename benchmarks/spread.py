"""What spreading the shadows buys: K=8 on 2 processes (1 thread each) vs 1 process holding all 8.

Invented scenario: a tide-gauge network classifies the next hour's surge into 10 levels from 64
readings (an MLP). The data are generated here.

Three worker processes are started once: one holding all K shadows, and the two ranks of a gloo
group holding K/2 each (shadow_group). Each has 1 torch thread. The coordinator then runs epochs
*interleaved*: one epoch of the single process, then one of the spread pair, and so on, each
configuration running alone while the other waits, so machine load affects both alike. The
figure is the median over the measured epochs of (spread epoch time / single-process epoch time);
the first epoch of each (with the null-swap audit and the forks) is left out. The 1-minute load
average is printed before and after: on a machine shared with other work the ratio moves with it.

Expected: per step the single process takes 1 + K model-steps, each rank 1 + K/2, so about
(1 + K/2) / (1 + K) = 5/9 = 0.56 when the two ranks have a core each.

    python benchmarks/spread.py            # 1 warm-up + 8 measured epochs each
    python benchmarks/spread.py --quick    # 1 warm-up + 3
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import statistics
import subprocess
import sys
import time

import torch
import torch.distributed as dist
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import StabilityTracker

SHADOWS = 8


def gauge_readings(count: int, seed: int) -> TensorDataset:
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, 64, generator=g)
    mix = torch.randn(64, 10, generator=g)
    return TensorDataset(x, (torch.tanh(x @ mix) + 0.4 * torch.randn(count, 10, generator=g))
                         .argmax(dim=1))


def worker(role: str, n: int) -> None:
    """Build one configuration, then run one epoch per "go" line on stdin, printing its seconds."""
    torch.set_num_threads(1)
    group = None
    if role == "spread":
        dist.init_process_group("gloo")
        group = dist.group.WORLD
    train_set, fresh = gauge_readings(n, 1), gauge_readings(512, 2)
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(64, 256), nn.Tanh(), nn.Linear(256, 256), nn.Tanh(),
                          nn.Linear(256, 10))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05)
    loader = DataLoader(train_set, batch_size=64, shuffle=True,
                        generator=torch.Generator().manual_seed(3))
    options = {} if group is None else {"shadow_group": group, "shadow_timeout": 600}
    tracker = StabilityTracker(model, optimizer, train_set=train_set, loss_fn=F.cross_entropy,
                               replacements=fresh, shadows=SHADOWS, engine="per_shadow",
                               **options)
    print(json.dumps({"ready": tracker.engine.name}), flush=True)
    for line in sys.stdin:
        if line.strip() != "go":
            break
        start, ends_before = time.perf_counter(), tracker.time_spent.epoch_end
        cpu_start = time.process_time()
        for x, y in tracker.batches(loader):
            optimizer.zero_grad()
            F.cross_entropy(model(x), y).backward()
            optimizer.step()
        reading = tracker.finish_epoch()
        print(json.dumps({"seconds": time.perf_counter() - start, "gap": reading.gap_estimate,
                          "epoch_end": tracker.time_spent.epoch_end - ends_before,
                          "cpu": time.process_time() - cpu_start}), flush=True)
    tracker.close()
    if group is not None:
        dist.destroy_process_group()


def _start(role: str, n: int, env: dict[str, str]) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, __file__, "--role", role, "--n", str(n)],
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
                            env={**os.environ, "OMP_NUM_THREADS": "1", **env})


def _epoch(procs: list[subprocess.Popen]) -> tuple[float, list]:
    for proc in procs:
        proc.stdin.write("go\n")
        proc.stdin.flush()
    answers = [json.loads(proc.stdout.readline()) for proc in procs]
    return max(a["seconds"] for a in answers), answers


def coordinate(epochs: int, n: int) -> None:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    load_before = os.getloadavg()
    single = [_start("single", n, {})]
    spread = [_start("spread", n, {"RANK": str(r), "WORLD_SIZE": "2", "MASTER_ADDR": "127.0.0.1",
                                   "MASTER_PORT": str(port), "GLOO_SOCKET_IFNAME": "lo"})
              for r in range(2)]
    try:
        for proc in single + spread:
            json.loads(proc.stdout.readline())
        ratios, rows = [], []
        for epoch in range(epochs + 1):
            one, answer_one = _epoch(single)
            two, answer_two = _epoch(spread)
            gap_one, gap_two = answer_one[0]["gap"], answer_two[0]["gap"]
            assert abs(gap_one - gap_two) <= 1e-6 * abs(gap_one) + 1e-12, \
                "the spread run's reading differs from the single process's"
            rows.append((epoch + 1, one, two, answer_one[0]["cpu"],
                         max(a["cpu"] for a in answer_two)))
            if epoch:                      # the first epoch (audit, forks) is left out
                ratios.append(two / one)
    finally:
        for proc in single + spread:
            if proc.poll() is None:
                proc.stdin.close()
        for proc in single + spread:
            proc.wait(timeout=120)
    load_after = os.getloadavg()
    print(f"K={SHADOWS} shadows, n={n}, batch 64, MLP 64-256-256-10, 1 torch thread per process")
    print("epoch  single process (s)  2 ranks spread (s)  ratio  CPU s: single, busier rank, ratio")
    for epoch, one, two, cpu_one, cpu_two in rows:
        print(f"{epoch:5d}  {one:18.2f}  {two:18.2f}  {two / one:5.2f}  "
              f"{cpu_one:.2f}, {cpu_two:.2f}, {cpu_two / cpu_one:.2f}")
    print(f"median epoch-time ratio, spread over 2 ranks / one process, epochs 2-{epochs + 1}: "
          f"{statistics.median(ratios):.2f} (range {min(ratios):.2f}-{max(ratios):.2f}; "
          f"(1 + K/2) / (1 + K) = {(1 + SHADOWS / 2) / (1 + SHADOWS):.2f})")
    print(f"1-minute load average: {load_before[0]:.2f} before, {load_after[0]:.2f} after "
          f"({os.cpu_count()} cores)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--role", choices=["single", "spread"], default=None)
    parser.add_argument("--n", type=int, default=4096)
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    if args.role is not None:
        worker(args.role, args.n)
    else:
        coordinate(3 if args.quick else 8, args.n)


if __name__ == "__main__":
    main()
