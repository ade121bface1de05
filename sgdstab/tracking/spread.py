"""Shadow parallelism: the K shadows spread over the processes of a torch.distributed group.

``StabilityTracker(model, optimizer, ..., shadow_group=group)`` on every rank of ``group`` builds a
``SpreadStabilityTracker``. Every rank runs the user's loop unchanged and identically (the main run
is *replicated*: same seed, same loader order), so every rank sees the same batches and can replay
them on its own share of the shadows without talking to anyone: shadow k is stepped on rank
``k % W`` only, the null-swap audit on rank 0, one shadow at a time (the per-shadow engine: the
batched engine's rounding depends on how many shadows it stacks, so it is refused here). The
swapped examples are chosen exactly as one process holding all K would choose them, then
partitioned.

Communication happens at epoch ends only: one exchange of the per-shadow divergences, faults and
fork steps (with a fingerprint of each rank's main run, which must be bit-identical), one of the
per-shadow probe losses, and a broadcast of rank 0's reading. Every rank then returns the reading a
single process with all K shadows would have returned; only rank 0 writes the run directory.

On gloo each exchange starts with a monitored barrier: a rank that died or fell more than
``shadow_timeout`` seconds behind ends the others with a ``LockstepError`` naming it, instead of a
hang. (On NCCL the process group's own timeout applies.)
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import timedelta
from typing import Any

import numpy as np
import torch
import torch.distributed as dist
from torch.nn.parallel import DistributedDataParallel

from ..outputs.reading import EpochReading
from ..shadows.lockstep import LockstepError, NeighbourSpec, Shadow, preserved_rng
from . import measure
from .probe import model_losses, summarise_probe
from .remote import HeldHere, RemoteShadow, digest, model_digest
from .tracker import LockstepWarning, ShadowFaultWarning, StabilityTracker

__all__ = ["SpreadStabilityTracker", "RemoteShadow", "DEFAULT_SHADOW_TIMEOUT"]

# Seconds a rank waits at an epoch end for the others (torch's default process-group timeout for
# gloo is also 30 minutes). Ranks holding one shadow more than others arrive a little later.
DEFAULT_SHADOW_TIMEOUT = 1800.0


class SpreadStabilityTracker(StabilityTracker):
    """A ``StabilityTracker`` whose shadows are spread over the ranks of ``shadow_group``.

    Built by ``StabilityTracker(..., shadow_group=group)`` on every rank of ``group`` with the same
    model, data and options; see the module docstring. ``shadow_timeout`` (seconds) bounds how long
    a rank waits for the others at an epoch end.
    """

    def __init__(self, model: torch.nn.Module, optimizer: torch.optim.Optimizer, *,
                 shadow_group: Any, shadow_timeout: float = DEFAULT_SHADOW_TIMEOUT,
                 **options: Any) -> None:
        if isinstance(model, DistributedDataParallel):
            raise LockstepError(
                "shadow_group with a DistributedDataParallel model: spreading the shadows needs "
                "the main run replicated on every rank (every rank the same batches), while data "
                "parallelism gives each rank other batches and would need every shadow on every "
                "rank. Use either DataParallelStabilityTracker (split the batch) or a plain "
                "model with shadow_group (split the shadows), not both")
        if not dist.is_available() or not dist.is_initialized():
            raise LockstepError("shadow_group needs torch.distributed initialised: call "
                                "torch.distributed.init_process_group() first (torchrun sets "
                                "the environment it reads)")
        if not isinstance(shadow_group, dist.ProcessGroup):
            raise TypeError("shadow_group must be a torch.distributed process group (e.g. "
                            f"torch.distributed.group.WORLD), got {type(shadow_group).__name__}")
        if not math.isfinite(float(shadow_timeout)) or shadow_timeout <= 0:
            raise ValueError(f"shadow_timeout must be a positive number of seconds, got "
                             f"{shadow_timeout}")
        self.shadow_group = shadow_group
        self.rank = dist.get_rank(shadow_group)
        if self.rank < 0:
            raise LockstepError("this process is not a member of shadow_group: create the "
                                "tracker on the group's ranks only")
        self.world_size = dist.get_world_size(shadow_group)
        self.shadow_timeout = float(shadow_timeout)
        self._closed_together = False   # close() waits for the other ranks once
        self._monitored = dist.get_backend(shadow_group) == "gloo"
        self._source = dist.get_global_rank(shadow_group, 0)
        requested = options.get("engine", "auto")
        if requested in ("batched", "stacked"):
            raise LockstepError(
                f"engine={requested!r} with shadow_group: a stacked engine's rounding depends on "
                "how many shadows one process stacks (2 ranks holding 4 of K=8 each gave a gap "
                "estimate 1.3e-6 relative away from one process holding all 8), so the spread "
                "reading would not equal the single-process one; spread trackers step their "
                "shadows one by one (engine='per_shadow' or 'auto')")
        if requested == "auto":
            options["engine"] = "per_shadow"
        failure: BaseException | None = None
        try:
            super().__init__(model, optimizer, **options)
        except Exception as error:   # noqa: BLE001 - the other ranks must hear of it, then re-raised
            failure = error
        mine = {"error": f"{type(failure).__name__}: {failure}"} if failure is not None else \
            self._fingerprint(options, requested)
        everyone = self._exchange(mine, "start-up check")
        if failure is not None:
            raise failure
        try:
            self._check_agreement(everyone)
        except LockstepError:
            self.close()
            raise

    # -- which rank holds what ----------------------------------------------------------------
    def _holds(self, k: int) -> bool:
        return self.rank == 0 if k < 0 else k % self.world_size == self.rank

    def _held_elsewhere(self, k: int, spec: NeighbourSpec) -> Shadow:
        return RemoteShadow(spec, k % self.world_size, f"shadow_{k}")

    def held_shadows(self) -> list[int]:
        """The shadows this rank steps (their numbers k)."""
        return [k for k, s in enumerate(self.shadows) if not isinstance(s, RemoteShadow)]

    def _writes_files(self) -> bool:
        return self.rank == 0

    # -- start-up agreement -------------------------------------------------------------------
    def _fingerprint(self, options: dict[str, Any], requested: str) -> dict[str, str]:
        """What must be equal on every rank, each item hashed (a hash differs iff the item does,
        barring collisions)."""
        data = self.train_set
        rows = sorted({0, self.dataset_size // 2, self.dataset_size - 1})
        with preserved_rng():
            sample = [data[j] for j in rows]
            replacements: Any = self.replacements   # a map-style dataset with len
            extra = [] if replacements is None or len(replacements) == 0 else \
                [len(replacements), replacements[0], replacements[len(replacements) - 1]]
        groups = [{key: value for key, value in group.items() if key != "params"}
                  for group in self.optimizer.param_groups]
        constants = self.declared_constants.to_dict() if self.declared_constants else \
            ("estimate" if self.estimate_constants else None)
        return {
            "seed": digest(self.seed),
            "shadows (K and the swapped examples)": digest(
                [(s.spec.index, s.spec.origin, s.spec.source_index, s.spec.replacement)
                 for s in self.shadows]),
            "options": digest(self.delta, self.lazy_fork, self.probe_size, requested,
                               self.engine.name, constants, self.loss_bound, self.estimate_every,
                               sorted(self.estimate_options.items()), options.get("audit", True),
                               self.probe_set is not None and len(self.probe_set)),  # type: ignore[arg-type]  # noqa: E501
            "optimizer": digest(type(self.optimizer).__name__, groups),
            "model (parameters and buffers)": model_digest(self.model),
            "data (n and a few rows)": digest(self.dataset_size, rows, sample, extra),
            "torch version": torch.__version__,
        }

    def _check_agreement(self, everyone: list[dict[str, str]]) -> None:
        failed = [(r, theirs["error"]) for r, theirs in enumerate(everyone) if "error" in theirs]
        if failed:
            raise LockstepError("; ".join(f"rank {r} of the shadow group could not build its "
                                          f"tracker ({message})" for r, message in failed))
        reference = everyone[0]
        differing = {}
        for key in reference:
            ranks = [r for r, theirs in enumerate(everyone) if theirs.get(key) != reference[key]]
            if ranks:
                differing[key] = ranks
        if differing:
            what = "; ".join(f"{key} (ranks {ranks} differ from rank 0)"
                             for key, ranks in differing.items())
            raise LockstepError(
                f"the ranks of the shadow group disagree on: {what}. Spreading the shadows needs "
                "the main run replicated: every rank must build the same model (same "
                "torch.manual_seed before it), the same training data, the same optimizer and "
                "the same tracker options, in particular the same seed (not one offset by the "
                "rank)")

    # -- exchanges ----------------------------------------------------------------------------
    def _exchange(self, value: Any, what: str) -> list[Any]:
        """Every rank's ``value``, in rank order (one all_gather_object, after a monitored barrier
        on gloo); a dead or stalled rank gives a ``LockstepError``, never a hang."""
        try:
            if self._monitored and self.world_size > 1:
                dist.monitored_barrier(group=self.shadow_group,
                                       timeout=timedelta(seconds=self.shadow_timeout),
                                       wait_all_ranks=True)
            gathered: list[Any] = [None] * self.world_size
            dist.all_gather_object(gathered, value, group=self.shadow_group)
        except Exception as error:   # noqa: BLE001 - gloo/NCCL raise several error types
            raise LockstepError(
                f"rank {self.rank}: the {what} exchange with the other ranks of the shadow group "
                f"failed: a rank died, or fell more than {self.shadow_timeout:g} s behind "
                f"(shadow_timeout): {error}") from error
        return gathered

    def _broadcast(self, value: Any, what: str) -> Any:
        payload = [value]
        try:
            dist.broadcast_object_list(payload, src=self._source, group=self.shadow_group)
        except Exception as error:   # noqa: BLE001
            raise LockstepError(f"rank {self.rank}: receiving rank 0's {what} failed (rank 0 "
                                f"died?): {error}") from error
        return payload[0]

    # -- epoch end ----------------------------------------------------------------------------
    def _divergences(self) -> tuple[list[float], dict[str, float], float | None]:
        held = self.held_shadows()
        values, layer, audit = measure.divergences(
            self.engine, self.model, [self.shadows[k] for k in held], self.audit_shadow)
        mine = {"shadows": {k: (value, self.shadows[k].forked, self.shadows[k].forked_at,
                                self.shadows[k].fault) for k, value in zip(held, values)},
                "layer": layer, "audit": audit, "main": model_digest(self.model)}
        everyone = self._exchange(mine, f"epoch {self.epoch} divergence")
        mains = [theirs["main"] for theirs in everyone]
        if len(set(mains)) > 1:
            differ = [r for r, m in enumerate(mains) if m != mains[0]]
            raise LockstepError(
                f"at the end of epoch {self.epoch} the main run on ranks {differ} differs from "
                "rank 0's: the loop is not replicated (a loader shuffled with a per-rank seed, "
                "a DistributedSampler, dropout or augmentation drawn from differently seeded "
                "RNGs?); every rank must run the very same training")
        full = [math.nan] * len(self.shadows)
        for theirs in everyone:
            for k, (value, forked, forked_at, fault) in theirs["shadows"].items():
                full[k] = value
                shadow = self.shadows[k]
                if isinstance(shadow, RemoteShadow):
                    newly = fault is not None and shadow.fault is None
                    shadow.forked, shadow.forked_at, shadow.fault = forked, forked_at, fault
                    if newly:
                        warnings.warn(f"{shadow.label} (swapping index {shadow.spec.index}, "
                                      f"stepped on rank {shadow.held_by}): {fault}; it is "
                                      "frozen and marked, the other shadows go on",
                                      ShadowFaultWarning, stacklevel=4)
        for theirs in everyone:
            for name, value in theirs["layer"].items():
                layer[name] = max(layer.get(name, 0.0), value)
        return full, layer, everyone[0]["audit"]

    def _probe_summary(self) -> tuple[measure.ProbeSummary, np.ndarray, float | None]:
        probe, per_example, engine = self._probe, self._per_example, self.engine
        assert probe is not None   # finish_epoch builds it first
        main = model_losses(self.model, probe, per_example)
        losses: dict[int, np.ndarray | None] = {}
        for k in self.held_shadows():
            shadow = self.shadows[k]
            if shadow.fault is not None:
                losses[k] = np.full_like(main, np.nan)
            elif shadow.forked:
                losses[k] = model_losses(engine.module_of(shadow), probe, per_example)
            else:
                losses[k] = None   # not forked yet: the main run's losses
        largest = measure.largest_loss(main, *[v for v in losses.values() if v is not None])
        everyone = self._exchange({"losses": losses, "largest": largest},
                                  f"epoch {self.epoch} probe-loss")
        shadow_losses: list[np.ndarray] = [main] * len(self.shadows)
        for theirs in everyone:
            for k, value in theirs["losses"].items():
                shadow_losses[k] = main if value is None else value
        fresh, reason = measure.fresh_replacements(self.shadows)
        kinds = ("out", "in", "probe") if self.probe_set is not None else \
            ("out", "in", "train", "holdout")
        summary = summarise_probe(main, shadow_losses, probe, fresh, reason, kinds)
        train_rows = main[np.isin(probe.kinds, ["out", "train"])]
        values = [theirs["largest"] for theirs in everyone if theirs["largest"] is not None]
        return summary, train_rows, max(values) if values else None

    def finish_epoch(self) -> EpochReading:
        """Close the epoch on every rank: all ranks return rank 0's reading (which holds the
        null-swap audit), rank 0 writes it."""
        sinks, self.sinks = self.sinks, None
        try:
            reading = super().finish_epoch()
        finally:
            self.sinks = sinks
        reading = self._broadcast(reading, f"epoch {self.epoch} reading")
        self.readings[-1] = reading
        if self.rank != 0 and reading.audit_divergence not in (None, 0.0):
            warnings.warn(f"LOCKSTEP BROKEN: the null-swap shadow (stepped on rank 0) drifted "
                          f"{reading.audit_divergence:.3e} from the main run; the divergences "
                          "are not trustworthy (see rank 0's warning for likely causes)",
                          LockstepWarning, stacklevel=2)
        if self.sinks is not None:
            self.sinks.write(reading)
        return reading

    # -- checkpoints --------------------------------------------------------------------------
    @contextmanager
    def _checkpoint_view(self) -> Iterator[None]:
        engine = self.engine
        # a stand-in with the same checkpoint methods as the engine it wraps
        self.engine = HeldHere(engine)  # type: ignore[assignment]
        try:
            yield
        finally:
            self.engine = engine

    def state_dict(self) -> dict[str, Any]:
        """This rank's share (its own shadows; the others' rank, fork step and fault only):
        save one file per rank and load each rank's own on resume."""
        with self._checkpoint_view():
            state = super().state_dict()
        state["spread"] = {"rank": self.rank, "world_size": self.world_size,
                           "held": self.held_shadows()}
        return state

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Resume this rank from its own ``state_dict()``; the ranks then check they resumed at
        the same step."""
        spread = state.get("spread")
        if spread is None:
            raise LockstepError("this state was saved by a tracker without shadow_group: a "
                                "spread tracker resumes from its own ranks' states only")
        if (spread["rank"], spread["world_size"]) != (self.rank, self.world_size):
            raise LockstepError(
                f"this state was saved by rank {spread['rank']} of {spread['world_size']}, but "
                f"this is rank {self.rank} of {self.world_size}: load each rank's own state on "
                "the same number of ranks")
        with self._checkpoint_view():
            super().load_state_dict(state)
        everyone = self._exchange((self.epoch, self.steps), "resume check")
        if len(set(everyone)) > 1:
            raise LockstepError(f"the ranks resumed at different points (epoch, steps) "
                                f"{everyone}: load states saved at the same epoch end")

    def close(self) -> None:
        """Remove the hooks and close the writers, then wait (once, at most a minute) until
        every rank of the shadow group has closed too: a rank that tore its process group down
        while another was still writing its last files was seen to abort gloo's teardown."""
        super().close()
        if self._closed_together or self.world_size < 2:
            return
        self._closed_together = True
        wait_for_ranks(self.shadow_group, self.rank, self._monitored,
                       min(60.0, self.shadow_timeout), "shadow group")

    def describe(self) -> dict[str, Any]:
        description = super().describe()
        description["spread"] = {
            "world_size": self.world_size,
            "backend": str(dist.get_backend(self.shadow_group)),
            "placement": "shadow k on rank k % world_size; the null-swap audit on rank 0",
            "shadow_timeout": self.shadow_timeout,
        }
        return description


def wait_for_ranks(group: Any, rank: int, monitored: bool, seconds: float, name: str) -> None:
    """Wait until every rank of ``group`` gets here (the trackers' ``close``): a barrier, with
    gloo a monitored one bounded by ``seconds``. A rank that does not come is warned about, not
    raised: the run is over."""
    try:
        if monitored:
            dist.monitored_barrier(group=group, timeout=timedelta(seconds=seconds),
                                   wait_all_ranks=True)
        else:
            dist.barrier(group=group)
    except Exception as error:   # noqa: BLE001 - the run is over; say so, do not raise
        warnings.warn(f"rank {rank}: the other ranks of the {name} did not all close their "
                      f"trackers within {seconds:.0f} s: {error}", stacklevel=3)
