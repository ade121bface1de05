"""Launch worker processes as the ranks of a gloo group on 127.0.0.1 (shared by the distributed
and spread tests): every rank gets its own log and writes its result as JSON."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def launch_ranks(worker: Path, config: dict, tmp_path: Path, world: int = 2,
                 timeout: float = 120.0, expect_ok: bool = True) -> list[dict | None]:
    """Run ``world`` ranks of ``worker`` to completion (or kill them); each rank's result, None
    if it wrote none (a rank that died). With ``expect_ok`` every rank must exit 0."""
    tmp_path.mkdir(parents=True, exist_ok=True)
    config_path = tmp_path / "config.json"
    config_path.write_text(json.dumps({"timeout": 60, **config}), encoding="utf-8")
    port = free_port()
    procs, logs = [], []
    try:
        for rank in range(world):
            env = {**os.environ, "MASTER_ADDR": "127.0.0.1", "MASTER_PORT": str(port),
                   "RANK": str(rank), "WORLD_SIZE": str(world), "GLOO_SOCKET_IFNAME": "lo",
                   "OMP_NUM_THREADS": "1", "PYTHONFAULTHANDLER": "1"}
            log = open(tmp_path / f"rank{rank}.log", "wb")   # noqa: SIM115 - closed below
            logs.append(log)
            procs.append(subprocess.Popen(
                [sys.executable, str(worker), str(config_path), str(tmp_path / f"out{rank}.json")],
                env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True))
        deadline = time.monotonic() + timeout
        for proc in procs:
            proc.wait(timeout=max(1.0, deadline - time.monotonic()))
    finally:
        for proc in procs:
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait()
        for log in logs:
            log.close()
    results: list[dict | None] = []
    for rank, proc in enumerate(procs):
        output = (tmp_path / f"rank{rank}.log").read_text(errors="replace")
        if expect_ok:
            assert proc.returncode == 0, f"rank {rank} failed:\n{output[-4000:]}"
        out = tmp_path / f"out{rank}.json"
        results.append(json.loads(out.read_text(encoding="utf-8")) if out.exists() else None)
    return results


def run_torchrun(example: Path, args: list[str], timeout: float = 150.0) -> str:
    """Run ``example`` under torchrun with 2 CPU processes on 127.0.0.1; its output (it must
    exit 0)."""
    # --standalone: torchrun binds a free port itself (one picked here first could be taken
    # by another process before torchrun binds it)
    command = [sys.executable, "-m", "torch.distributed.run", "--standalone",
               "--nproc-per-node=2", str(example), *args]
    env = {**os.environ, "OMP_NUM_THREADS": "1", "GLOO_SOCKET_IFNAME": "lo"}
    proc = subprocess.Popen(command, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            start_new_session=True)
    try:
        output, _ = proc.communicate(timeout=timeout)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    text = output.decode(errors="replace")
    assert proc.returncode == 0, text[-4000:]
    return text
