"""StabilityTracker: follows a user's training loop with shadows on neighbouring datasets."""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, Dataset
from torch.utils.data._utils.collate import default_collate

from . import measure
from .assessment import optimizer_reason
from .constants import Constants
from .engines import make_engine
from .history import StepHistory, TimeSpent
from .loaders import check_batch_device, check_train_set, recording_loader
from .lockstep import (
    HostRngGuard,
    LockstepError,
    NeighbourSpec,
    Shadow,
    StepGroup,
    preserved_rng,
    select_rows,
    trainable_parameters,
)
from .measure import default_probe_size
from .neighbours import attach_rows, explicit_neighbours, seeded_neighbours
from .probe import PerExampleLoss, ProbeRows
from .reading import EpochReading
from .sinks import RunSinks

__all__ = ["StabilityTracker", "LockstepWarning", "AssumptionWarning", "ShadowFaultWarning"]


class LockstepWarning(UserWarning):
    """The null-swap audit found that the shadows do not follow the main run exactly."""


class AssumptionWarning(UserWarning):
    """A measured divergence exceeds its proved bound: declared constants or convexity are wrong."""


class ShadowFaultWarning(UserWarning):
    """A shadow hit a non-finite loss or parameter and was frozen."""


class StabilityTracker:
    """Trains ``shadows`` copies of ``model`` on neighbouring datasets in lockstep with your loop.

    Use ``for batch in tracker.batches(loader)`` in place of ``for batch in loader`` and call
    ``tracker.finish_epoch()`` after each epoch; the shadows step inside ``optimizer.step()``.
    """

    def __init__(
        self,
        model: nn.Module,
        optimizer: torch.optim.Optimizer,
        *,
        train_set: Dataset,
        loss_fn: Callable[..., torch.Tensor] | None = None,
        step_loss: Callable[[nn.Module, Any], torch.Tensor] | None = None,
        shadows: int = 4,
        swap: Sequence[tuple[int, Any]] | None = None,
        replacements: Dataset | None = None,
        probe_set: Dataset | None = None,
        log_dir: str | Path | None = None,
        seed: int = 0,
        audit: bool = True,
        constants: Constants | str | None = None,
        delta: float = 0.05,
        before_step: Callable[[nn.Module], Any] | None = None,
        lazy_fork: bool = True,
        probe_size: int | None = None,
        engine: str = "auto",
        loss_bound: float | None = None,
        estimate_every: int = 1,
        estimate_options: dict[str, Any] | None = None,
        preserve_host_rng: bool | None = None,
    ) -> None:
        if not isinstance(model, nn.Module):
            raise TypeError("model must be a torch.nn.Module")
        if not trainable_parameters(model):
            raise ValueError("the model has no trainable parameters (requires_grad=True): there is "
                             "nothing whose stability could be tracked")
        if not isinstance(optimizer, torch.optim.Optimizer):
            raise TypeError("optimizer must be a torch.optim.Optimizer")
        if isinstance(optimizer, torch.optim.LBFGS):
            raise LockstepError("LBFGS steps with a closure that re-evaluates the loss; the "
                                "tracker cannot mirror it")
        if (loss_fn is None) == (step_loss is None):
            raise ValueError("give exactly one of loss_fn=(outputs, targets) -> loss or "
                             "step_loss=(model, batch) -> loss")
        if not 0.0 < float(delta) < 1.0 or math.isnan(float(delta)):
            raise ValueError(f"delta must lie in (0, 1), got {delta}")
        self.n = check_train_set(train_set)
        if self.n < 2:
            raise ValueError(f"the training set has {self.n} example(s); neighbouring datasets "
                             "need at least 2")
        if isinstance(constants, str) and constants != "estimate":
            raise ValueError("constants must be a Constants, 'estimate' or None")
        self.model = model
        self.optimizer = optimizer
        self.train_set = train_set
        self.loss_fn = loss_fn
        self.step_loss = step_loss
        self.replacements = replacements
        self.probe_set = probe_set
        self.seed = int(seed)
        self.delta = float(delta)
        self.probe_size = default_probe_size(self.n) if probe_size is None else int(probe_size)
        if self.probe_size < 1:
            raise ValueError(f"probe_size must be at least 1, got {probe_size}")
        self.lazy_fork = bool(lazy_fork)
        self.declared_constants = constants if isinstance(constants, Constants) else None
        self.estimate_constants = constants == "estimate"
        if loss_bound is not None and not (math.isfinite(float(loss_bound)) and loss_bound > 0):
            raise ValueError(f"loss_bound must be a positive finite number, got {loss_bound}")
        if loss_bound is not None and self.declared_constants is not None:
            raise ValueError("give loss_bound inside Constants(...) when constants are declared")
        self.loss_bound = None if loss_bound is None else float(loss_bound)
        if isinstance(estimate_every, bool) or not isinstance(estimate_every, int) or \
                estimate_every < 1:
            raise ValueError(f"estimate_every must be a whole number >= 1, got {estimate_every!r}")
        self.estimate_every = estimate_every
        self.estimate_options = dict(estimate_options or {})
        self.host_rng = HostRngGuard(preserve_host_rng)
        self._estimated: Constants | None = None
        self.optimizer_reason = optimizer_reason(optimizer)
        self._rng = np.random.default_rng(self.seed)
        self.specs = self._neighbour_specs(shadows, swap)
        self.engine = make_engine(engine, model, optimizer, self._loss_of, before_step,
                                  shadows=len(self.specs) + int(bool(audit)), loss_fn=loss_fn)
        self.shadows: list[Shadow] = [self.engine.add_shadow(spec, None, f"shadow_{k}")
                                      for k, spec in enumerate(self.specs)]
        self.audit_shadow: Shadow | None = None
        if audit:
            placeholder = NeighbourSpec(-1, None, "self")
            self.audit_shadow = self.engine.add_shadow(placeholder, None, "audit")
        self.history = StepHistory(shadows=len(self.shadows))
        self._has_buffers = any(True for _ in model.buffers())
        self.epoch = 0
        self.steps = 0
        self.readings: list[EpochReading] = []
        self._group = StepGroup([], [], [])
        self._collate: Callable[[list[Any]], Any] = default_collate
        self._collate_rows_for: Any = None
        self._probe: ProbeRows | None = None
        self._per_example = PerExampleLoss(loss_fn, step_loss)
        self._warned: set[str] = set()
        self._assumption_violated = False
        self._checked_batch = False
        self.time_spent = TimeSpent()
        self._swapped: np.ndarray | None = None   # the shadows' swapped indices, for hit counts
        self._is_swapped = np.zeros(0, dtype=bool)   # by training index (built with _swapped)
        self.sinks = RunSinks(log_dir) if log_dir is not None and self._writes_files() else None
        if not self.lazy_fork:
            for shadow in self.shadows:
                self.engine.fork(shadow, 0, None)
        self._hooks = [optimizer.register_step_pre_hook(self._before_main_step),
                       optimizer.register_step_post_hook(self._after_main_step)]
        if self.sinks is not None:
            self.sinks.write_run(self.describe())
            self.sinks.tensorboard.write_layout(len(self.shadows))

    # -- set-up ---------------------------------------------------------------------------------
    def _fetch(self, dataset: Any, index: int) -> Any:
        with preserved_rng():
            return dataset[int(index)]

    def _neighbour_specs(self, shadows: int, swap: Sequence[tuple[int, Any]] | None
                         ) -> list[NeighbourSpec]:
        if swap is not None:
            return explicit_neighbours(swap, self.n)
        return seeded_neighbours(shadows, self.n, self._rng, self._fetch, self.train_set,
                                 self.replacements)

    def _loss_of(self, model: nn.Module, batch: Any) -> torch.Tensor:
        if self.step_loss is not None:
            loss = self.step_loss(model, batch)
        else:
            if not isinstance(batch, (list, tuple)) or len(batch) != 2:
                raise LockstepError("loss_fn expects (inputs, targets) batches; for other batch "
                                    "structures pass step_loss=(model, batch) -> loss")
            inputs, targets = batch
            loss = self.loss_fn(model(inputs), targets)
        if not isinstance(loss, torch.Tensor) or loss.numel() != 1:
            raise LockstepError("the loss must be a scalar tensor (mean-reduced), got "
                                f"{getattr(loss, 'shape', type(loss).__name__)}")
        return loss if loss.dim() == 0 else loss.reshape(())

    def _set_rows(self, collate: Callable[[list[Any]], Any]) -> None:
        if self._collate_rows_for is collate:
            return
        self._collate = collate
        attach_rows(self.shadows, self.train_set, collate)
        self._collate_rows_for = collate
        self._probe = None

    # -- the loop -------------------------------------------------------------------------------
    def batches(self, loader: DataLoader) -> Iterator[Any]:
        """Yield exactly the loader's batches, recording their indices and RNG states."""
        clock, spent = time.perf_counter, self.time_spent
        start = clock()
        sibling, recorder = recording_loader(loader, self.train_set)
        self._set_rows(loader.collate_fn)
        spent.recording += clock() - start
        for batch in sibling:
            start = clock()
            indices = recorder.drawn.popleft()
            self._on_batch(batch, indices)
            spent.recording += clock() - start
            yield batch

    def _on_batch(self, batch: Any, indices: np.ndarray) -> None:
        if not self._checked_batch:
            check_batch_device(batch, next(p for _, p in trainable_parameters(self.model)).device)
            self._checked_batch = True
        if self.audit_shadow is not None and self.audit_shadow.spec.index < 0:
            index = int(indices[0])
            row = select_rows(batch, [0], len(indices))
            self.audit_shadow.spec = NeighbourSpec(index, None, "self", index)
            self.audit_shadow.row = row
        group = self._group
        if self._has_buffers and not group.batches and \
                any(not s.forked for s in self.engine.shadows):
            group.buffers = {name: b.detach().clone() for name, b in self.model.named_buffers()}
        group.batches.append(batch)
        group.indices.append(indices)
        group.rng_states.append(torch.get_rng_state())

    def _before_main_step(self, optimizer: torch.optim.Optimizer, args: Any, kwargs: Any) -> None:
        start = time.perf_counter()
        group = self._group
        waiting = [s for s in self.engine.shadows if not s.forked]
        if group.batches and waiting:
            drawn = self._drawn_indices(group)
            for shadow in waiting:
                if shadow.spec.index in drawn:
                    self.engine.fork(shadow, self.steps, group.buffers)
        self.time_spent.step_hooks += time.perf_counter() - start

    def _after_main_step(self, optimizer: torch.optim.Optimizer, args: Any, kwargs: Any) -> None:
        start = time.perf_counter()
        stepping = self._step_shadows(optimizer)
        self.time_spent.shadow_steps += stepping
        self.time_spent.step_hooks += time.perf_counter() - start - stepping

    def _step_shadows(self, optimizer: torch.optim.Optimizer) -> float:
        """Step the shadows after the main step and record it; returns the seconds spent inside
        the engine's step."""
        group, self._group = self._group, StepGroup([], [], [])
        if not group.batches:
            self._warn_once("unrecorded", "optimizer.step() ran without a batch from "
                            "tracker.batches(): the shadows skipped this step and no longer "
                            "follow the main run", LockstepWarning)
            return 0.0
        stepping = self._run_engine(group) if self.engine.shadows else 0.0
        drawn = self._drawn_indices(group)
        rates = {float(g["lr"]) for g in optimizer.param_groups}
        if len(rates) > 1:
            self._warn_once("lrs", "parameter groups use different step sizes; the bounds use the "
                            "largest", UserWarning)
        hit_counts = self._hit_counts(drawn)
        self.history.record(max(rates), len(drawn), drawn, hit_counts)
        self.steps += 1
        return stepping

    def _run_engine(self, group: StepGroup) -> float:
        """The engine's step for the active shadows, with the RNG states put back after it;
        returns the seconds it took."""
        active = [s for s in self.engine.shadows if s.active]
        after = torch.get_rng_state()
        host = self.host_rng.save(first_epoch=self.epoch == 0, step=self.steps)
        engine_start = time.perf_counter()
        try:
            faulted = self.engine.step(active, group, self.steps)
        finally:
            stepping = time.perf_counter() - engine_start
            torch.set_rng_state(after)
            if host is not None and self.host_rng.restore(host):
                self._warn_once("host_rng", "the shadows' steps draw from Python's random or "
                                "NumPy's global RNG; the tracker now restores both after every "
                                "step so your run is unchanged, but it replays only torch's RNG "
                                "for the shadows: draw augmentation randomness from torch",
                                UserWarning)
        self._report_faults(faulted)
        return stepping

    def _hit_counts(self, drawn: np.ndarray) -> list[int]:
        """How often each shadow's swapped index was drawn at this step (mostly all zero: one
        look-up table read decides that, ~2 us, where comparing every pair cost ~13 us)."""
        if self._swapped is None:
            self._swapped = np.fromiter((s.spec.index for s in self.shadows), np.int64)
            self._is_swapped = np.zeros(self.n, dtype=bool)
            self._is_swapped[self._swapped] = True
        if not self.shadows or not self._is_swapped[drawn].any():
            return [0] * len(self.shadows)
        return (drawn[:, None] == self._swapped[None, :]).sum(axis=0).tolist()

    def _report_faults(self, faulted: list[Shadow]) -> None:
        for shadow in faulted:
            warnings.warn(f"{shadow.label} (swapping index {shadow.spec.index}): "
                          f"{shadow.fault}; it is frozen and marked, the other shadows and the "
                          "main run go on", ShadowFaultWarning, stacklevel=4)

    def _drawn_indices(self, group: StepGroup) -> np.ndarray:
        """Every training index the step used (a data-parallel tracker gathers all ranks')."""
        return group.all_indices()

    def _writes_files(self) -> bool:
        """Whether this process writes the run directory (only rank 0 in data-parallel runs)."""
        return True

    def _warn_once(self, key: str, message: str, category: type[Warning]) -> None:
        if key not in self._warned:
            self._warned.add(key)
            warnings.warn(message, category, stacklevel=4)

    # -- readings -------------------------------------------------------------------------------
    def finish_epoch(self) -> EpochReading:
        """Close the epoch: measure the shadows, compute the bounds, write the sinks."""
        start = time.perf_counter()
        notes: list[str] = []
        if self._group.batches:
            notes.append(f"{len(self._group.batches)} batch(es) yielded after the last "
                         "optimizer.step() belong to no step")
        self.epoch += 1
        notes += getattr(self.engine, "pending_notes", [])   # e.g. what engine="auto" chose
        getattr(self.engine, "pending_notes", []).clear()
        self._report_faults(self.engine.freeze_non_finite(self.shadows, self.steps))
        divergence, layer, audit = self._divergences()
        divergence = measure.masked_faults(divergence, self.shadows)
        if self._probe is None:
            self._probe = measure.build_probe(
                self.shadows, self.train_set, n=self.n, probe_set=self.probe_set,
                replacements=self.replacements, size=self.probe_size, seed=self.seed,
                collate=self._collate)
        summary = measure.probe_summary(self.model, self.engine, self.shadows, self._probe,
                                        self._per_example, has_probe_set=self.probe_set is not None)
        notes += summary.notes
        audit = measure.settle_audit(self.engine, self.audit_shadow, audit, notes,
                                     LockstepWarning)
        if audit is not None:   # its verdict is in and the engine dropped it
            self.audit_shadow = None
        bound_fields, violated = measure.epoch_bounds(
            self.current_constants(), divergence, notes, history=self.history, n=self.n,
            delta=self.delta, optimizer=self.optimizer, optimizer_reason=self.optimizer_reason,
            model=self.model, warned=self._assumption_violated, category=AssumptionWarning)
        self._assumption_violated = self._assumption_violated or violated
        reading = measure.epoch_reading(self.epoch, self.steps, self.shadows, divergence, audit,
                                        layer, summary, bound_fields, notes)
        self.readings.append(reading)
        if self.sinks is not None:
            self.sinks.write(reading)
        self.time_spent.epoch_end += time.perf_counter() - start
        return reading

    def _divergences(self) -> tuple[list[float], dict[str, float], float | None]:
        """The shadows' and the audit's divergences (a data-parallel tracker compares ranks')."""
        return measure.divergences(self.engine, self.model, self.shadows, self.audit_shadow)

    def current_constants(self) -> Constants | None:
        """The constants the bounds use now (declared, or running-maximum estimates).

        Estimates are refreshed at the end of every ``estimate_every``-th epoch (and the first),
        on a seeded sample of training examples, with ``estimate_options`` passed to
        ``Constants.estimate`` (e.g. ``iterations``, ``per_example``). Not estimated (None) when
        no bound applies to the optimizer, unless ``estimate_options`` has
        ``even_if_not_applicable=True``.
        """
        if not self.estimate_constants:
            return self.declared_constants
        if measure.estimation_skipped(self.optimizer_reason, self.estimate_options):
            return None   # no bound applies to this optimizer: the reading says so
        if self._estimated is None or (self.epoch - 1) % self.estimate_every == 0:
            chosen = measure.constants_rows(self.n, self.probe_size, self.seed)
            batch = self._collate([self._fetch(self.train_set, j) for j in chosen])
            self._estimated = measure.estimate_constants(
                self.model, batch, self._estimated, loss_fn=self.loss_fn,
                step_loss=self.step_loss, loss_bound=self.loss_bound,
                options=self.estimate_options)
        return self._estimated

    def advise(self, target: float | None = None, **options: Any) -> Any:
        """Stop suggestions from the readings so far (``sgdstab.advice.StopAdvice``).

        With a constant step size and batch size the budget projection uses the planner (a
        ``TrainingPlan`` built from the run); otherwise it extrapolates the recorded bound.
        ``options`` go to ``sgdstab.advice.advise``.
        """
        from .advice import TrainingPlan, advise

        if "plan" not in options and self.history.steps:
            step_sizes, batch_sizes = self.history.step_sizes(), self.history.batch_sizes()
            if np.all(step_sizes == step_sizes[0]) and np.all(batch_sizes == batch_sizes[0]):
                options["plan"] = TrainingPlan(n=self.n, step_size=float(step_sizes[0]),
                                               batch_size=int(batch_sizes[0]))
        advice = advise(self.readings, target=target, **options)
        if self.sinks is not None:
            self.sinks.write_advice(advice)
        return advice

    # -- checkpoints ----------------------------------------------------------------------------
    def state_dict(self) -> dict[str, Any]:
        """Everything needed to resume (take it after finish_epoch; save it with torch.save)."""
        from .checkpoint import tracker_state

        return tracker_state(self)

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Resume from ``state_dict()`` output; a state that does not fit is a clear error."""
        from .checkpoint import restore_tracker

        restore_tracker(self, state)

    # -- misc -----------------------------------------------------------------------------------
    @property
    def engine_choice(self) -> str:
        """Which engine steps the shadows and why (with engine="auto": what the timing found)."""
        return str(getattr(self.engine, "choice", self.engine.name))

    def describe(self) -> dict[str, Any]:
        """The run's configuration, JSON-friendly (written to run.json)."""
        return {
            "n": self.n, "shadows": [s.spec.describe() for s in self.shadows],
            "audit": self.audit_shadow is not None, "seed": self.seed, "delta": self.delta,
            "engine": self.engine.name, "lazy_fork": self.lazy_fork,
            "optimizer": type(self.optimizer).__name__,
            "optimizer_reason": self.optimizer_reason,
            "constants": (self.declared_constants.to_dict() if self.declared_constants else
                          ("estimate" if self.estimate_constants else None)),
        }

    def close(self) -> None:
        """Remove the optimizer hooks and close the writers. Safe to call twice."""
        for handle in self._hooks:
            handle.remove()
        self._hooks = []
        if self.sinks is not None:
            self.sinks.close()

    def __enter__(self) -> StabilityTracker:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
