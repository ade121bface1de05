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
import copy
import json
import os
import random
import statistics
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import StabilityTracker
from sgdstab.shadows.stacked import stacked_refusal

# Targets (ratios); see benchmarks/README.md for what each one covers.
TARGET_K1 = 2.1          # K=1 per-shadow tracked epoch / plain epoch (floor: 2.0)
# K=8 tracked epoch (auto engine) / hand-written loop over 9 models, by (batch size, threads)
TARGET_K8 = {(32, 1): 0.75, (128, 1): 0.85, (128, 2): 0.80}
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


# -- the loops: each one a generator that yields after every step --------------------------------
def _step(model: nn.Module, opt: torch.optim.Optimizer, x: torch.Tensor, y: torch.Tensor
          ) -> None:
    opt.zero_grad()
    F.cross_entropy(model(x), y).backward()
    opt.step()


class PlainLoop:
    """The user's loop without the tracker."""

    engine = ""

    def __init__(self, setup: Setup) -> None:
        self.model, self.opt, self.loader = setup.build()

    def spent(self) -> tuple[float, float, float]:
        """Seconds spent so far inside the shadows' steps, in the tracker's bookkeeping, and in
        the part of that bookkeeping which is the epoch end (probe and held-out evaluation)."""
        return 0.0, 0.0, 0.0

    def epochs(self) -> Iterator[bool]:
        """Runs epoch after epoch, yielding after every step: True after an epoch's last one."""
        while True:
            for x, y in self.loader:
                _step(self.model, self.opt, x, y)
                yield False
            yield True


class NaiveLoop(PlainLoop):
    """The hand-written alternative: the main model plus ``copies`` deep copies, each stepped on
    every batch (the one-row swaps, negligible here, are left out)."""

    def __init__(self, setup: Setup, copies: int) -> None:
        super().__init__(setup)
        self.runs = [(self.model, self.opt)]
        for _ in range(copies):
            other = copy.deepcopy(self.model)
            self.runs.append((other, torch.optim.SGD(other.parameters(), lr=setup.lr,
                                                     momentum=0.9)))

    def epochs(self) -> Iterator[bool]:
        while True:
            for x, y in self.loader:
                for model, opt in self.runs:
                    _step(model, opt, x, y)
                yield False
            yield True


class TrackedLoop(PlainLoop):
    """The user's loop with the tracker (``finish_epoch`` included)."""

    def __init__(self, setup: Setup, shadows: int, engine: str, audit: bool = True) -> None:
        super().__init__(setup)
        self.tracker = StabilityTracker(self.model, self.opt, loss_fn=F.cross_entropy,
                                        train_set=setup.data, shadows=shadows, engine=engine,
                                        audit=audit)

    @property
    def engine(self) -> str:  # type: ignore[override]
        return self.tracker.engine.name

    def spent(self) -> tuple[float, float, float]:
        spent = self.tracker.time_spent   # the tracker's own account (sgdstab.TimeSpent)
        return spent.shadow_steps, spent.bookkeeping, spent.epoch_end

    def epochs(self) -> Iterator[bool]:
        while True:
            for x, y in self.tracker.batches(self.loader):
                _step(self.model, self.opt, x, y)
                yield False
            self.tracker.finish_epoch()
            yield True


def stackable(setup: Setup) -> bool:
    """Whether the stacked engine can step this setup's model (Linear layers and activations)."""
    model, opt, _ = setup.build()
    return stacked_refusal(model, opt, F.cross_entropy) == ""


# -- measurement --------------------------------------------------------------------------------
@dataclass
class Figure:
    """The median and interquartile range of one ratio over the measured epochs."""

    values: list[float]

    @property
    def median(self) -> float:
        return statistics.median(self.values)

    @property
    def spread(self) -> float:
        if len(self.values) < 4:
            return max(self.values) - min(self.values)
        quartiles = statistics.quantiles(self.values, n=4)
        return quartiles[2] - quartiles[0]

    def show(self, percent: bool = False) -> str:
        if percent:
            return f"{100 * self.median:+.1f}% (±{50 * self.spread:.1f})"
        return f"{self.median:.2f} (±{self.spread / 2:.2f})"


def interleaved_epochs(loops: dict[str, PlainLoop], epochs: int, chunk: int, seed: int
                       ) -> dict[str, list[tuple[float, float, float, float]]]:
    """Run ``loops`` side by side, ``chunk`` steps of each in turn (order reshuffled every turn),
    so that every loop's epoch spans the same stretch of wall-clock time as the others'. This
    machine's speed drifts by up to 40 % within seconds, so whole epochs run one after another
    would not compare. Returns, per loop and epoch, (epoch time, time inside the shadows'
    steps, time in the tracker's bookkeeping, the epoch-end part of it)."""
    rng = random.Random(seed)
    runners = {name: loop.epochs() for name, loop in loops.items()}
    out: dict[str, list[tuple[float, float, float, float]]] = {name: [] for name in loops}
    order = list(loops)
    for _ in range(epochs):
        spent = dict.fromkeys(loops, 0.0)
        before = {name: loop.spent() for name, loop in loops.items()}
        open_loops = set(loops)
        while open_loops:
            rng.shuffle(order)
            for name in order:
                if name not in open_loops:
                    continue
                start = time.perf_counter()
                for _ in range(chunk):
                    if next(runners[name]):
                        open_loops.discard(name)
                        break
                spent[name] += time.perf_counter() - start
        for name, loop in loops.items():
            after = loop.spent()
            out[name].append((spent[name], after[0] - before[name][0],
                              after[1] - before[name][1], after[2] - before[name][2]))
    return out


def measure(setup: Setup, epochs: int, chunk: int = 8, seed: int = 0) -> dict[str, Any]:
    """Three groups of loops, each run interleaved (``interleaved_epochs``): plain / K=0 / K=1;
    the 8-copy loop / K=8 with each engine; K=4 with each engine. The first epoch of every loop
    (warm-up, the lazy forks, the null-swap audit) is measured apart and left out of the rest."""
    groups = [
        {"plain": PlainLoop(setup), "k0": TrackedLoop(setup, 0, "auto", audit=False),
         "k1": TrackedLoop(setup, 1, "per_shadow")},
        {"plain": PlainLoop(setup), "naive8": NaiveLoop(setup, 8),
         "k8": TrackedLoop(setup, 8, "auto"),
         "k8p": TrackedLoop(setup, 8, "per_shadow"), "k8b": TrackedLoop(setup, 8, "batched"),
         **({"k8s": TrackedLoop(setup, 8, "stacked")} if stackable(setup) else {})},
        {"k4b": TrackedLoop(setup, 4, "batched"), "k4p": TrackedLoop(setup, 4, "per_shadow")},
    ]
    times: dict[str, list[float]] = {}
    engine: dict[str, list[float]] = {}
    bookkeeping: dict[str, list[float]] = {}
    epoch_end: dict[str, list[float]] = {}
    first: dict[str, float] = {}
    plain: dict[str, list[float]] = {}   # each loop's own group's plain epochs
    for number, group in enumerate(groups):
        measured = interleaved_epochs(group, 1 + epochs, chunk, seed + number)
        for name in group:
            key = name if name != "plain" else f"plain{number}"
            first[key] = measured[name][0][0]
            times[key] = [m[0] for m in measured[name][1:]]
            engine[key] = [m[1] for m in measured[name][1:]]
            bookkeeping[key] = [m[2] for m in measured[name][1:]]
            epoch_end[key] = [m[3] for m in measured[name][1:]]
            if "plain" in group:
                plain[key] = [m[0] for m in measured["plain"][1:]]
    times["plain"], first["plain"] = times["plain0"], first["plain0"]

    def ratio(a: str, b: str) -> Figure:
        return Figure([x / y for x, y in zip(times[a], times[b])])

    def keep(name: str) -> Figure:
        """The tracker's own account of its bookkeeping, as a share of the tracked epoch."""
        return Figure([b / t for b, t in zip(bookkeeping[name], times[name])])

    def keep_steps(name: str) -> Figure:
        """The same without the epoch end (the probe and held-out evaluation): recording and
        the step hooks only, what tracking adds to every step."""
        return Figure([(b - e) / t for b, e, t in zip(bookkeeping[name], epoch_end[name],
                                                       times[name])])

    def extra(name: str) -> Figure:
        """Tracked epoch minus plain epoch minus the shadows' steps, as a share of the tracked
        epoch: bookkeeping plus whatever else tracking costs the main run (cache misses after
        the shadows' steps, the hooks' call overhead)."""
        return Figure([(t - e - p) / t for t, e, p in zip(times[name], engine[name],
                                                          plain[name])])

    return {
        "k1": ratio("k1", "plain"), "k1_first": Figure([first["k1"] / first["plain"]]),
        "k8": ratio("k8", "naive8"), "k8_per_shadow": ratio("k8p", "naive8"),
        "k8_batched": ratio("k8b", "naive8"),
        "k8_stacked": ratio("k8s", "naive8") if "k8s" in times else None,
        "keep_k0": keep("k0"), "keep_k1": keep("k1"), "keep_k8": keep("k8"),
        "steps_k1": keep_steps("k1"), "steps_k8": keep_steps("k8"),
        "extra_k0": extra("k0"), "extra_k1": extra("k1"), "extra_k8": extra("k8"),
        "k4_batched_vs_per_shadow": ratio("k4b", "k4p"),
        "engine_k8": groups[1]["k8"].engine,
        "choice_k8": groups[1]["k8"].tracker.engine_choice,  # type: ignore[attr-defined]
        "plain_epoch_ms": 1000 * statistics.median(times["plain"]),
    }


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
    runs = [(model, opt)]
    if kind in ("batched", "per_shadow", "stacked", "stacked_no_audit"):
        # "stacked_no_audit": the stacked engine with audit=False (no null-swap shadow and no
        # unbatched twin of it during the first epoch)
        tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=setup.data,
                                   shadows=shadows, engine=kind.removesuffix("_no_audit"),
                                   audit=kind != "stacked_no_audit")
    elif kind == "naive":
        for _ in range(shadows):
            other = copy.deepcopy(model)
            runs.append((other, torch.optim.SGD(other.parameters(), lr=setup.lr, momentum=0.9)))
    for _ in range(2):
        source = tracker.batches(loader) if tracker is not None else loader
        for x, y in source:
            for run_model, run_opt in runs:
                _step(run_model, run_opt, x, y)
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
    for kind in ("plain", "batched", "per_shadow", "stacked", "stacked_no_audit", "naive"):
        output = subprocess.run([sys.executable, __file__, "--memory-child", kind, str(shadows)],
                                check=True, capture_output=True, text=True, env=env).stdout
        results[kind] = json.loads(output.strip().splitlines()[-1])
    sizes = results["plain"]
    copy_bytes = 2 * sizes["params"] + sizes["state"]   # parameters + gradients + momentum
    budget = shadows * copy_bytes + shadows * sizes["batch"] + sizes["probe_rows"] * sizes["row"]
    out = {"copy_mb": copy_bytes / 2**20, "budget_mb": budget / 2**20}
    for kind in ("batched", "per_shadow", "stacked", "stacked_no_audit", "naive"):
        extra = results[kind]["peak"] - results["plain"]["peak"]
        out[f"{kind}_extra_mb"] = extra / 2**20
        out[f"{kind}_ratio"] = extra / budget
    return out


# -- report -------------------------------------------------------------------------------------
def _mark(value: float, target: float) -> str:
    return "ok" if value <= target else "MISSED"


def _table(threads: int, setups: list[Setup], rounds: int) -> dict[str, Any]:
    torch.set_num_threads(threads)
    print(f"\n## {threads} thread(s): median (± half the interquartile range) over {rounds} "
          f"rounds; load average {os.getloadavg()[0]:.2f}")
    columns = ("setup", "plain ms", "K1/plain", "K1 ep1", "K8/naive", "K8 engine", "K8 target",
               "K8 per-shadow/naive", "K8 stacked/naive", "K8 batched/naive", "keep K0",
               "keep K1", "keep K8", "steps K1", "steps K8", "extra K0", "extra K1", "extra K8",
               "K4 b/p")
    print("| " + " | ".join(columns) + " |")
    print("|" + "---|" * len(columns))
    rows = []
    for setup in setups:
        r = measure(setup, rounds)
        target = TARGET_K8.get((setup.batch_size, threads)) if setup.name.startswith("MLP") \
            else None
        r["k8_target"] = target
        rows.append(r)
        print("| " + " | ".join([
            setup.name, f"{r['plain_epoch_ms']:.0f}", r["k1"].show(),
            f"{r['k1_first'].median:.2f}", r["k8"].show(), str(r["engine_k8"]),
            "-" if target is None else f"{target} {_mark(r['k8'].median, target)}",
            r["k8_per_shadow"].show(),
            "n/a" if r["k8_stacked"] is None else r["k8_stacked"].show(),
            r["k8_batched"].show(), r["keep_k0"].show(True),
            r["keep_k1"].show(True), r["keep_k8"].show(True), r["steps_k1"].show(True),
            r["steps_k8"].show(True), r["extra_k0"].show(True),
            r["extra_k1"].show(True), r["extra_k8"].show(True),
            r["k4_batched_vs_per_shadow"].show()]) + " |", flush=True)
        print(f"  ({setup.name}: auto chose {r['choice_k8']})", flush=True)
    return {
        "K1": max(r["k1"].median for r in rows),
        "K8": max(r["k8"].median for r in rows),
        "K8 missed": [f"{s.name} {r['k8'].median:.2f} > {r['k8_target']}"
                      for s, r in zip(setups, rows)
                      if r["k8_target"] is not None and r["k8"].median > r["k8_target"]],
        "keep": max(max(r["keep_k0"].median, r["keep_k1"].median, r["keep_k8"].median)
                    for r in rows),
        "steps": max(max(r["steps_k1"].median, r["steps_k8"].median) for r in rows),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="4 epochs, batch size 32 only")
    parser.add_argument("--rounds", type=int, default=None, help="measured epochs per loop")
    parser.add_argument("--threads", default="1,2",
                        help="comma-separated torch thread counts, one table each (default 1,2)")
    parser.add_argument("--batch-sizes", default=None,
                        help="comma-separated batch sizes (default 32,128,256; 32 with --quick)")
    parser.add_argument("--mlp-only", action="store_true", help="leave out the CNN setups")
    parser.add_argument("--no-memory", action="store_true", help="skip the memory children")
    parser.add_argument("--memory-only", action="store_true",
                        help="only the memory children (no timing tables)")
    parser.add_argument("--memory-child", nargs=2, metavar=("KIND", "K"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.memory_child:
        print(json.dumps(memory_child(args.memory_child[0], int(args.memory_child[1]))))
        return 0
    rounds = args.rounds or (4 if args.quick else 6)
    sizes = (32,) if args.quick else (32, 128, 256)
    if args.batch_sizes:
        sizes = tuple(int(size) for size in args.batch_sizes.split(","))
    setups = []
    for batch_size in sizes:
        setups.append(Setup(f"MLP b={batch_size}", sorter_mlp, parcel_readings(4096, 1),
                            batch_size))
        if not args.mlp_only:
            setups.append(Setup(f"CNN b={batch_size}", ScanReader, label_scans(2048, 2),
                                batch_size))
    print(f"torch {torch.__version__}, {os.cpu_count()} cores; every figure is a ratio of "
          "epochs run in the same round (first epoch of each loop excluded, except 'K1 ep1')")
    start = time.perf_counter()
    worst = {} if args.memory_only else {int(t): _table(int(t), setups, rounds)
                                         for t in args.threads.split(",")}
    mem = None
    if not args.no_memory:
        for pinned in (False, True):
            mem = memory(8, pinned)
            print(f"memory, K=8, MLP 64-1024-1024-10, b=256, "
                  f"{'mmap threshold pinned' if pinned else 'default allocator'} (one copy = "
                  f"params+grads+momentum = {mem['copy_mb']:.1f} MB; budget for the extra peak "
                  f"= {mem['budget_mb']:.1f} MB): batched +{mem['batched_extra_mb']:.1f} MB "
                  f"({mem['batched_ratio']:.2f} of budget), per-shadow "
                  f"+{mem['per_shadow_extra_mb']:.1f} MB ({mem['per_shadow_ratio']:.2f}), "
                  f"stacked +{mem['stacked_extra_mb']:.1f} MB ({mem['stacked_ratio']:.2f}), "
                  f"stacked with audit=False +{mem['stacked_no_audit_extra_mb']:.1f} MB, "
                  f"hand-written 9-model loop +{mem['naive_extra_mb']:.1f} MB "
                  f"({mem['naive_ratio']:.2f})", flush=True)
    for threads, w in worst.items():
        print(f"summary, {threads} thread(s) ({time.perf_counter() - start:.0f} s so far, load "
              f"average {os.getloadavg()[0]:.2f}): K1/plain worst {w['K1']:.2f} (target "
              f"{TARGET_K1}, {_mark(w['K1'], TARGET_K1)}); K8/naive worst {w['K8']:.2f}, "
              f"targets missed: {', '.join(w['K8 missed']) or 'none'}; bookkeeping worst "
              f"{100 * w['keep']:.1f}% (target {100 * TARGET_BOOKKEEPING:.0f}%, "
              f"{_mark(w['keep'], TARGET_BOOKKEEPING)}; without the epoch end "
              f"{100 * w['steps']:.1f}%)")
    if mem is not None:
        print(f"summary, memory (pinned allocator, live memory): per-shadow "
              f"{mem['per_shadow_ratio']:.2f} of budget ({_mark(mem['per_shadow_ratio'], 1.0)}),"
              f" batched {mem['batched_ratio']:.2f} ({_mark(mem['batched_ratio'], 1.0)}),"
              f" stacked {mem['stacked_extra_mb']:.1f} MB against the 9-model loop's "
              f"{mem['naive_extra_mb']:.1f} MB "
              f"({_mark(mem['stacked_extra_mb'], mem['naive_extra_mb'])}); with audit=False "
              f"{mem['stacked_no_audit_extra_mb']:.1f} MB "
              f"({_mark(mem['stacked_no_audit_extra_mb'], mem['naive_extra_mb'])})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
