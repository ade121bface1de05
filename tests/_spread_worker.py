"""One rank of a spread-shadow test run, and the single-process run it is compared with.

Invented scenario: beekeepers weigh their hives; five readings (weight change, brood temperature,
humidity, entrance traffic, hour of day) and a flag "the colony swarmed within a week". The data are
generated here. Run as a script by tests/test_spread.py, one process per rank, with RANK /
WORLD_SIZE / MASTER_ADDR / MASTER_PORT in the environment:
``python _spread_worker.py CONFIG.json OUT.json``.
"""

from __future__ import annotations

import json
import os
import sys
import time
import warnings
from datetime import timedelta
from typing import Any

import torch
import torch.distributed as dist
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import Constants, LockstepError, StabilityTracker

FEATURES = 5


def hive_scales(count: int, seed: int) -> TensorDataset:
    """``count`` generated hive-weeks: five readings and whether the colony swarmed."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(count, FEATURES, generator=g)
    score = 0.9 * x[:, 0] + 0.7 * x[:, 1] * x[:, 3] - 0.5 * x[:, 2] + \
        0.5 * torch.randn(count, generator=g)
    return TensorDataset(x, (score > 0.3).long())


def hive_model(seed: int) -> nn.Module:
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(FEATURES, 24), nn.Tanh(), nn.Dropout(0.2), nn.Linear(24, 2))


def _flat(module: nn.Module) -> list[float]:
    return torch.cat([p.detach().double().reshape(-1) for p in module.parameters()]).tolist()


def run(config: dict, group: Any = None, rank: int = 0) -> dict:
    """Train (replicated on every rank) with the tracker; ``group`` None: one process, all K."""
    data = hive_scales(config["n"] + config["held_out"], config["data_seed"])
    train_set = TensorDataset(*data[:config["n"]])
    replacements = TensorDataset(*data[config["n"]:])
    model_seed = config["model_seed"] + (rank if config.get("model_seed_by_rank") else 0)
    model = hive_model(model_seed)
    optimizer = torch.optim.SGD(model.parameters(), lr=config["lr"],
                                momentum=config.get("momentum", 0.0))
    generator = torch.Generator().manual_seed(config["loader_seed"])
    loader = DataLoader(train_set, batch_size=config["batch"], shuffle=True, generator=generator)
    options: dict[str, Any] = {
        "train_set": train_set, "loss_fn": F.cross_entropy, "replacements": replacements,
        "seed": config["tracker_seed"] + (rank if config.get("seed_by_rank") else 0),
        "shadows": config["shadows"], "engine": config.get("engine", "per_shadow"),
        "constants": Constants(lipschitz=2.0, smoothness=4.0, loss_bound=3.0),
        "log_dir": config.get("log_dir", "").format(rank=rank) or None,
    }
    if config.get("nan_swap") is not None:   # explicit swaps, the listed ones with a NaN row
        swap = []
        for index in config["swap"]:
            x, y = train_set[index]
            nan = index in config["nan_swap"]
            swap.append((index, (torch.full_like(x, float("nan")) if nan else x + 0.5, y)))
        options["swap"] = swap
        options.pop("replacements")
    if group is not None:
        options["shadow_group"] = group
        options["shadow_timeout"] = config.get("shadow_timeout", 60)
    torch.manual_seed(config["loop_seed"])   # dropout: the same draws on every rank
    first, last = config.get("first_epoch", 0), config["epochs"]
    readings, caught_all = [], []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            tracker = StabilityTracker(model, optimizer, **options)
        except LockstepError as error:
            return {"error": type(error).__name__, "message": str(error)}
        if first:
            saved = torch.load(config["checkpoint"].format(rank=rank), weights_only=False)
            model.load_state_dict(saved["model"])
            optimizer.load_state_dict(saved["optimizer"])
            tracker.load_state_dict(saved["tracker"])
            generator.set_state(saved["generator"])
            torch.set_rng_state(saved["rng"])
        started = time.monotonic()
        try:
            for epoch in range(first, last):
                for step, (x, y) in enumerate(tracker.batches(loader)):
                    if rank == config.get("die_rank") and epoch == 1 and step == 3:
                        os._exit(7)   # this rank dies in the middle of an epoch
                    optimizer.zero_grad()
                    F.cross_entropy(model(x), y).backward()
                    optimizer.step()
                readings.append(tracker.finish_epoch())
        except LockstepError as error:
            return {"error": type(error).__name__, "message": str(error),
                    "seconds": time.monotonic() - started}
        if config.get("save_after") is not None:
            torch.save({"model": model.state_dict(), "optimizer": optimizer.state_dict(),
                        "tracker": tracker.state_dict(), "generator": generator.get_state(),
                        "rng": torch.get_rng_state()}, config["checkpoint"].format(rank=rank))
        tracker.close()
        caught_all = [f"{w.category.__name__}: {w.message}" for w in caught]
    return {
        "readings": [r.to_dict() for r in readings],
        "main": _flat(model),
        "held": [k for k, s in enumerate(tracker.shadows) if s.model is not None],
        "shadows": {k: _flat(s.model) for k, s in enumerate(tracker.shadows)
                    if s.model is not None},
        "faults": [s.fault for s in tracker.shadows],
        "forked_at": [s.forked_at for s in tracker.shadows],
        "hits": [h.tolist() for h in tracker.history.shadow_hits()],
        "engine": tracker.engine.name,
        "warnings": caught_all,
    }


def main() -> None:
    config_path, out_path = sys.argv[1], sys.argv[2]
    with open(config_path, encoding="utf-8") as handle:
        config = json.load(handle)
    torch.set_num_threads(1)
    rank = int(os.environ["RANK"])
    dist.init_process_group("gloo", rank=rank, world_size=int(os.environ["WORLD_SIZE"]),
                            timeout=timedelta(seconds=config.get("timeout", 60)))
    result = run(config, dist.group.WORLD, rank)
    if "error" not in result:   # after an error (a dead peer) the tear-down is skipped: os._exit
        dist.barrier()
        dist.destroy_process_group()
    with open(out_path, "w", encoding="utf-8") as handle:
        json.dump(result, handle)
        handle.flush()
        os.fsync(handle.fileno())


if __name__ == "__main__":
    main()
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(0)   # no interpreter-exit destructors: a gloo thread torn down late can abort
