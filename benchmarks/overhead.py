"""What lockstep tracking costs: sgdstab against a plain loop and a hand-written K-copy loop.

Invented scenario: a parcel depot sorts parcels into 10 chutes from 64 sensor readings (an MLP)
and from 16x16 scans of their labels (a small CNN). All data are generated here.

Every figure is a ratio of two timings measured side by side in this process (each repeat runs
both loops back to back; the table shows the median over repeats), so machine speed cancels out.
Memory is the peak resident set (VmHWM in /proc/self/status) of a fresh child process per
configuration: tracemalloc only sees Python's own allocator, not torch's tensor memory.

    python benchmarks/overhead.py            # full run (a few minutes on 2 cores)
    python benchmarks/overhead.py --quick    # fewer repeats, one batch size
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import StabilityTracker

# Targets (ratios); see benchmarks/README.md for what each one covers.
TARGET_K1 = 2.1          # K=1 per-shadow tracked epoch / plain epoch (floor: 2.0)
TARGET_K8 = 0.75         # K=8 tracked epoch (auto engine) / hand-written 8-copy loop
TARGET_BOOKKEEPING = 0.05  # tracker time outside shadow stepping, as a fraction of the epoch
TARGET_MEMORY = 1.0      # measured extra peak memory / budget


# -- the invented depot -------------------------------------------------------------------------
def parcel_readings(count: int, seed: int) -> TensorDataset:
    """64 sensor readings per parcel; the chute depends on a few nonlinear mixtures of them."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, 64, generator=g)
    mix = torch.randn(64, 10, generator=g)
    scores = torch.tanh(x @ mix) + 0.3 * (x[:, :10] ** 2) + 0.5 * torch.randn(count, 10,
                                                                              generator=g)
    return TensorDataset(x, scores.argmax(dim=1))


def label_scans(count: int, seed: int) -> TensorDataset:
    """16x16 scans: each chute's label is a blurred stripe pattern at its own angle, plus noise."""
    g = torch.Generator().manual_seed(seed)
    chutes = torch.randint(0, 10, (count,), generator=g)
    grid = torch.linspace(-1, 1, 16)
    yy, xx = torch.meshgrid(grid, grid, indexing="ij")
    angles = chutes.float() * (torch.pi / 10)
    phase = xx[None] * torch.cos(angles)[:, None, None] + yy[None] * torch.sin(angles)[:, None,
                                                                                       None]
    scans = torch.sin(6 * phase) + 0.8 * torch.randn(count, 16, 16, generator=g)
    return TensorDataset(scans.unsqueeze(1), chutes)


def sorter_mlp(width: int = 256, features: int = 64) -> nn.Module:
    return nn.Sequential(nn.Linear(features, width), nn.ReLU(), nn.Dropout(0.1),
                         nn.Linear(width, width), nn.ReLU(), nn.Linear(width, 10))


class ScanReader(nn.Module):
    """A small CNN: two conv/pool stages and a linear head."""

    def __init__(self) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(1, 8, 3, padding=1)
        self.conv2 = nn.Conv2d(8, 16, 3, padding=1)
        self.head = nn.Linear(16 * 4 * 4, 10)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = F.max_pool2d(F.relu(self.conv1(x)), 2)
        x = F.max_pool2d(F.relu(self.conv2(x)), 2)
        return self.head(x.flatten(1))


@dataclass
class Setup:
    name: str
    make_model: Callable[[], nn.Module]
    data: TensorDataset
    batch_size: int
    lr: float = 0.05

    def build(self, seed: int = 0) -> tuple[nn.Module, torch.optim.Optimizer, DataLoader]:
        torch.manual_seed(seed)
        model = self.make_model()
        opt = torch.optim.SGD(model.parameters(), lr=self.lr, momentum=0.9)
        loader = DataLoader(self.data, batch_size=self.batch_size, shuffle=True,
                            generator=torch.Generator().manual_seed(seed))
        return model, opt, loader


# -- the loops ----------------------------------------------------------------------------------
def _step(model: nn.Module, opt: torch.optim.Optimizer, x: torch.Tensor, y: torch.Tensor
          ) -> None:
    opt.zero_grad()
    F.cross_entropy(model(x), y).backward()
    opt.step()


def plain_epochs(setup: Setup, epochs: int) -> list[float]:
    model, opt, loader = setup.build()
    times = []
    for _ in range(epochs):
        start = time.perf_counter()
        for x, y in loader:
            _step(model, opt, x, y)
        times.append(time.perf_counter() - start)
    return times


def naive_epochs(setup: Setup, epochs: int, copies: int) -> list[float]:
    """The hand-written alternative: the main model plus ``copies`` deep copies, each stepped
    on every batch (the one-row swaps, negligible here, are left out)."""
    model, opt, loader = setup.build()
    import copy

    runs = [(model, opt)]
    for _ in range(copies):
        other = copy.deepcopy(model)
        runs.append((other, torch.optim.SGD(other.parameters(), lr=setup.lr, momentum=0.9)))
    times = []
    for _ in range(epochs):
        start = time.perf_counter()
        for x, y in loader:
            for m, o in runs:
                _step(m, o, x, y)
        times.append(time.perf_counter() - start)
    return times


def tracked_epochs(setup: Setup, epochs: int, shadows: int, engine: str, audit: bool = True
                   ) -> tuple[list[float], list[float], str]:
    """Epoch times (finish_epoch included) and, per epoch, the time spent stepping shadows."""
    model, opt, loader = setup.build()
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=setup.data,
                               shadows=shadows, engine=engine, audit=audit)
    stepping = [0.0]
    inner = tracker.engine.step

    def timed(*args, **kwargs):
        start = time.perf_counter()
        try:
            return inner(*args, **kwargs)
        finally:
            stepping[0] += time.perf_counter() - start

    tracker.engine.step = timed  # type: ignore[method-assign]
    times, step_times = [], []
    for _ in range(epochs):
        stepping[0] = 0.0
        start = time.perf_counter()
        for x, y in tracker.batches(loader):
            _step(model, opt, x, y)
        tracker.finish_epoch()
        times.append(time.perf_counter() - start)
        step_times.append(stepping[0])
    name = tracker.engine.name
    tracker.close()
    return times, step_times, name


# -- measurement --------------------------------------------------------------------------------
def steady(times: list[float]) -> float:
    """Mean epoch time after the first epoch (warm-up, forks and the audit live there)."""
    return statistics.fmean(times[1:])


def measure(setup: Setup, repeats: int, epochs: int) -> dict[str, float | str]:
    ratios: dict[str, list[float]] = {k: [] for k in (
        "k1", "k1_first", "k8", "k8_per_shadow", "keep_k0", "keep_k1", "keep_k8",
        "k2_batched_vs_per_shadow", "k4_batched_vs_per_shadow")}
    engine_k8 = ""
    for _ in range(repeats):
        plain = plain_epochs(setup, epochs)
        base = steady(plain)
        k1, k1_steps, _ = tracked_epochs(setup, epochs, 1, "per_shadow")
        ratios["k1"].append(steady(k1) / base)
        ratios["k1_first"].append(k1[0] / plain[0])
        ratios["keep_k1"].append((steady(k1) - steady(k1_steps) - base) / steady(k1))
        k0, _, _ = tracked_epochs(setup, epochs, 0, "auto", audit=False)
        ratios["keep_k0"].append((steady(k0) - base) / steady(k0))
        naive = naive_epochs(setup, epochs, 8)
        k8, k8_steps, engine_k8 = tracked_epochs(setup, epochs, 8, "auto")
        ratios["k8"].append(steady(k8) / steady(naive))
        ratios["keep_k8"].append((steady(k8) - steady(k8_steps) - base) / steady(k8))
        k8p, _, _ = tracked_epochs(setup, epochs, 8, "per_shadow")
        ratios["k8_per_shadow"].append(steady(k8p) / steady(naive))
        for k in (2, 4):
            b, _, _ = tracked_epochs(setup, epochs, k, "batched")
            p, _, _ = tracked_epochs(setup, epochs, k, "per_shadow")
            ratios[f"k{k}_batched_vs_per_shadow"].append(steady(b) / steady(p))
    out: dict[str, float | str] = {k: statistics.median(v) for k, v in ratios.items()}
    out["engine_k8"] = engine_k8
    out["plain_epoch_s"] = base
    return out


# -- memory (child processes) -------------------------------------------------------------------
def _peak_rss() -> int:
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError("no VmHWM in /proc/self/status")


def memory_child(kind: str, shadows: int) -> dict[str, float]:
    torch.set_num_threads(2)
    setup = Setup("memory", lambda: sorter_mlp(width=1024, features=64),
                  parcel_readings(4096, 3), 256)
    model, opt, loader = setup.build()
    tracker = None
    if kind in ("batched", "per_shadow"):
        tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=setup.data,
                                   shadows=shadows, engine=kind)
    for _ in range(2):
        source = tracker.batches(loader) if tracker is not None else loader
        for x, y in source:
            _step(model, opt, x, y)
        if tracker is not None:
            tracker.finish_epoch()
    params = sum(p.numel() * p.element_size() for p in model.parameters())
    state = sum(v.numel() * v.element_size() for entry in opt.state.values()
                for v in entry.values() if isinstance(v, torch.Tensor))
    x, y = setup.data[:setup.batch_size]
    batch = x.numel() * x.element_size() + y.numel() * y.element_size()
    row = batch / setup.batch_size
    return {"peak": _peak_rss(), "params": params, "state": state, "batch": batch,
            "probe_rows": 256 + 2 * shadows, "row": row}


def memory(shadows: int, pinned: bool) -> dict[str, float]:
    """Extra peak memory of each engine over the plain loop, against the budget. ``pinned`` fixes
    glibc's mmap threshold so that freed tensor memory leaves the resident set at once (by default
    the threshold grows and the heap keeps freed blocks, which RSS then still counts)."""
    env = dict(os.environ)
    if pinned:
        env["MALLOC_MMAP_THRESHOLD_"] = "65536"
    results = {}
    for kind in ("plain", "batched", "per_shadow"):
        output = subprocess.run([sys.executable, __file__, "--memory-child", kind, str(shadows)],
                                check=True, capture_output=True, text=True, env=env).stdout
        results[kind] = json.loads(output.strip().splitlines()[-1])
    sizes = results["plain"]
    copy_bytes = 2 * sizes["params"] + sizes["state"]   # parameters + gradients + momentum
    budget = shadows * copy_bytes + shadows * sizes["batch"] + sizes["probe_rows"] * sizes["row"]
    out = {"copy_mb": copy_bytes / 2**20, "budget_mb": budget / 2**20}
    for kind in ("batched", "per_shadow"):
        extra = results[kind]["peak"] - results["plain"]["peak"]
        out[f"{kind}_extra_mb"] = extra / 2**20
        out[f"{kind}_ratio"] = extra / budget
    return out


# -- report -------------------------------------------------------------------------------------
def _mark(value: float, target: float) -> str:
    return "ok" if value <= target else "MISSED"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="3 repeats, batch size 32 only")
    parser.add_argument("--repeats", type=int, default=None)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--memory-child", nargs=2, metavar=("KIND", "K"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.memory_child:
        print(json.dumps(memory_child(args.memory_child[0], int(args.memory_child[1]))))
        return 0
    torch.set_num_threads(args.threads)
    repeats = args.repeats or (3 if args.quick else 5)
    epochs = 3
    sizes = (32,) if args.quick else (32, 256)
    setups = []
    for batch_size in sizes:
        setups.append(Setup(f"MLP b={batch_size}", sorter_mlp, parcel_readings(4096, 1),
                            batch_size))
        setups.append(Setup(f"CNN b={batch_size}", ScanReader, label_scans(2048, 2), batch_size))
    print(f"torch {torch.__version__}, {args.threads} threads, {os.cpu_count()} cores, "
          f"{repeats} repeats x {epochs} epochs (first dropped); load average "
          f"{os.getloadavg()[0]:.2f}")
    columns = ("setup", "K1/plain", "K1 ep1", "K8/naive", "K8 engine", "K8 per-shadow/naive",
               "keep K0", "keep K1", "keep K8", "K2 b/p", "K4 b/p")
    print(" | ".join(columns))
    rows = []
    start = time.perf_counter()
    for setup in setups:
        r = measure(setup, repeats, epochs)
        rows.append((setup.name, r))
        print(" | ".join([
            setup.name, f"{r['k1']:.2f}", f"{r['k1_first']:.2f}", f"{r['k8']:.2f}",
            str(r["engine_k8"]), f"{r['k8_per_shadow']:.2f}", f"{100 * r['keep_k0']:+.1f}%",
            f"{100 * r['keep_k1']:+.1f}%", f"{100 * r['keep_k8']:+.1f}%",
            f"{r['k2_batched_vs_per_shadow']:.2f}", f"{r['k4_batched_vs_per_shadow']:.2f}"]),
            flush=True)
    for pinned in (False, True):
        mem = memory(8, pinned)
        print(f"memory, K=8, MLP 64-1024-1024-10, b=256, "
              f"{'mmap threshold pinned' if pinned else 'default allocator'} (one copy = "
              f"params+grads+momentum = {mem['copy_mb']:.1f} MB; budget for the extra peak = "
              f"{mem['budget_mb']:.1f} MB): batched +{mem['batched_extra_mb']:.1f} MB "
              f"({mem['batched_ratio']:.2f} of budget), per-shadow "
              f"+{mem['per_shadow_extra_mb']:.1f} MB ({mem['per_shadow_ratio']:.2f})", flush=True)
    worst = {
        "K1": max(r["k1"] for _, r in rows),
        "K8": max(r["k8"] for _, r in rows),
        "keep": max(max(r["keep_k0"], r["keep_k1"], r["keep_k8"]) for _, r in rows),
        "memory": mem["batched_ratio"],   # pinned allocator: live memory
    }
    print(f"summary ({time.perf_counter() - start:.0f} s, load average {os.getloadavg()[0]:.2f}):"
          f" K1/plain worst {worst['K1']:.2f} (target {TARGET_K1}, "
          f"{_mark(worst['K1'], TARGET_K1)}); K8/naive worst {worst['K8']:.2f} (target "
          f"{TARGET_K8}, {_mark(worst['K8'], TARGET_K8)}); bookkeeping worst "
          f"{100 * worst['keep']:.1f}% (target {100 * TARGET_BOOKKEEPING:.0f}%, "
          f"{_mark(worst['keep'], TARGET_BOOKKEEPING)}); memory {worst['memory']:.2f} of budget "
          f"({_mark(worst['memory'], TARGET_MEMORY)})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
