"""StabilityTracker: follows a user's training loop with shadows on neighbouring datasets.

The class holds the run's state and its wiring; the loop's side (``loop``), the part of the
training set the sampler draws (``sampling``), the epoch's end (``epoch_end``) and the refusals
at construction (``checks``) live in their own modules, their functions assigned as methods.
"""

from __future__ import annotations

import warnings
import weakref
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, Dataset
from torch.utils.data._utils.collate import default_collate

from ..outputs.reading import EpochReading
from ..outputs.sinks import RunSinks
from ..shadows.engines import make_engine
from ..shadows.loaders import SizedBatches, check_train_set
from ..shadows.lockstep import (
    HostRngGuard,
    LockstepError,
    NeighbourSpec,
    Shadow,
    StepGroup,
    parameters_finite,
    preserved_rng,
    trainable_parameters,
)
from ..shadows.neighbours import attach_rows, explicit_neighbours, seeded_neighbours
from ..theory.assessment import GroupSettings
from ..theory.constants import Constants
from ..theory.history import StepHistory, TimeSpent
from . import epoch_end, loop, sampling
from .checks import check_loop_parts, check_options, check_replacement_types
from .checks import refuse_unmirrorable_modules as refuse_unmirrorable_modules  # re-exported
from .measure import default_probe_size
from .notices import AssumptionWarning, LockstepWarning, ShadowFaultWarning
from .optimizer_rule import optimizer_reason
from .probe import PerExampleLoss, ProbeRows
from .settings import NOT_GIVEN, ConstantSettings, ProbeSettings, resolve_settings

__all__ = ["StabilityTracker", "LockstepWarning", "AssumptionWarning", "ShadowFaultWarning"]


class StabilityTracker:
    """Trains ``shadows`` copies of ``model`` on neighbouring datasets in lockstep with your loop.

    Use ``for batch in tracker.batches(loader)`` in place of ``for batch in loader`` and call
    ``tracker.finish_epoch()`` after each epoch; the shadows step inside ``optimizer.step()``.
    ``constant_settings=ConstantSettings(...)`` and ``probe_settings=ProbeSettings(...)`` group
    the flat keywords ``constants``, ``estimate_every``, ``estimate_options``, ``loss_bound`` and
    ``probe_set``, ``probe_size`` (either form; one option given both ways is a TypeError).
    """

    def __new__(cls, *args: Any, shadow_group: Any = None, **kwargs: Any) -> StabilityTracker:
        if shadow_group is not None and cls is StabilityTracker:   # shadows spread over ranks
            from .spread import SpreadStabilityTracker

            return super().__new__(SpreadStabilityTracker)
        return super().__new__(cls)

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
        probe_set: Dataset | None = NOT_GIVEN,
        log_dir: str | Path | None = None,
        seed: int = 0,
        audit: bool = True,
        constants: Constants | str | None = NOT_GIVEN,
        delta: float = 0.05,
        before_step: Callable[[nn.Module], Any] | None = None,
        after_step: Callable[[nn.Module], Any] | None = None,
        lazy_fork: bool = True,
        probe_size: int | None = NOT_GIVEN,
        engine: str = "auto",
        loss_bound: float | None = NOT_GIVEN,
        estimate_every: int = NOT_GIVEN,
        estimate_options: dict[str, Any] | None = NOT_GIVEN,
        preserve_host_rng: bool | None = None,
        shadow_group: Any = None,
        constant_settings: ConstantSettings | None = None,
        probe_settings: ProbeSettings | None = None,
    ) -> None:
        if shadow_group is not None:   # StabilityTracker(...) itself builds a spread tracker
            raise LockstepError(
                f"{type(self).__name__} cannot spread its shadows over ranks (shadow_group): "
                "shadow parallelism replicates the main run on every rank, which data-parallel "
                "tracking does not; use StabilityTracker(model, optimizer, shadow_group=group, "
                "...) on every rank with a replicated loop instead")
        chosen = resolve_settings(
            {"constant_settings": constant_settings, "probe_settings": probe_settings},
            {"constants": constants, "estimate_every": estimate_every,
             "estimate_options": estimate_options, "loss_bound": loss_bound,
             "probe_set": probe_set, "probe_size": probe_size})
        constants, estimate_every = chosen["constants"], chosen["estimate_every"]
        estimate_options, loss_bound = chosen["estimate_options"], chosen["loss_bound"]
        probe_set, probe_size = chosen["probe_set"], chosen["probe_size"]
        check_loop_parts(model, optimizer, loss_fn, step_loss, delta)
        self.n = check_train_set(train_set)
        self.dataset_size = self.n   # len(train_set); n is the number of drawable examples
        self.drawable: np.ndarray | None = None   # set when the sampler draws from a part only
        self._sampling_fixed = False
        check_options(self.n, constants, probe_size, loss_bound, estimate_every)
        self.model = model
        self.optimizer = optimizer
        self.train_set = train_set
        self.loss_fn = loss_fn
        self.step_loss = step_loss
        self.replacements = replacements
        self.probe_set = probe_set
        self.seed = int(seed)
        self.delta = float(delta)
        self._probe_size_given = probe_size is not None
        self.probe_size = default_probe_size(self.n) if probe_size is None else int(probe_size)
        self.lazy_fork = bool(lazy_fork)
        self.declared_constants = constants if isinstance(constants, Constants) else None
        self.estimate_constants = constants == "estimate"
        self.loss_bound = None if loss_bound is None else float(loss_bound)
        self.estimate_every = estimate_every
        self.estimate_options = dict(estimate_options or {})
        self.host_rng = HostRngGuard(preserve_host_rng)
        self._estimated: Constants | None = None
        self.optimizer_reason = optimizer_reason(optimizer)
        self.groups = GroupSettings()   # per-group step-size ratios and decays, step by step
        self._step_reason: str | None = None   # as the optimizer's settings were last used
        self._rng = np.random.default_rng(self.seed)
        self._explicit_swap = swap is not None
        self._position = np.zeros(0, dtype=np.int64)   # training index -> drawable position
        self._part_note: str | None = None
        self.specs = self._neighbour_specs(shadows, swap)
        held = [self._holds(k) for k in range(len(self.specs))]
        audit = bool(audit) and self._holds(-1)
        self.engine = make_engine(engine, model, optimizer, self._loss_of, before_step,
                                  shadows=sum(held) + int(audit), loss_fn=loss_fn)
        self.engine.after_step = after_step
        self.shadows: list[Shadow] = [
            self.engine.add_shadow(spec, None, f"shadow_{k}") if held[k] else
            self._held_elsewhere(k, spec) for k, spec in enumerate(self.specs)]
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
        self._holdout: ProbeRows | None = None   # every held-out example no shadow swapped in
        self.loss_seen: float | None = None       # the largest per-example loss evaluated so far
        self.initial_loss: float | None = None    # the mean loss before the first step
        self._per_example = PerExampleLoss(loss_fn, step_loss)
        self._warned: set[str] = set()
        self._assumption_violated = False
        # optimizer steps the shadows could not replay (no batch from tracker.batches()): how
        # many this epoch, and (epoch, replayed steps before it) of the first one ever
        self._skipped_steps = 0
        self._lockstep_lost: tuple[int, int] | None = None
        self._checked_batch = False
        self._passes = 0            # passes over tracker.batches() since the last finish_epoch
        self._steps_at_finish = 0   # steps taken when finish_epoch last ran
        # the recording siblings of loaders with persistent workers, by the user's loader and
        # held weakly: a loader built anew each epoch lets its sibling (and workers) go with it
        self._siblings: weakref.WeakKeyDictionary[DataLoader, tuple[DataLoader, Any]] = \
            weakref.WeakKeyDictionary()
        self.time_spent = TimeSpent()
        self._swapped: np.ndarray | None = None   # the shadows' swapped indices, for hit counts
        self._swapped_set: set[int] = set()   # the same as a set (built with _swapped)
        self.sinks = RunSinks(log_dir) if log_dir is not None and self._writes_files() else None
        if not self.lazy_fork:
            for shadow, mine in zip(self.shadows, held):
                if mine:
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

    def _holds(self, k: int) -> bool:
        """Whether this process steps shadow ``k`` (-1: the null-swap audit); a spread tracker
        holds only its share."""
        return True

    def _held_elsewhere(self, k: int, spec: NeighbourSpec) -> Shadow:
        """The stand-in for shadow ``k`` when another process steps it (spread trackers)."""
        raise NotImplementedError

    def _loss_of(self, model: nn.Module, batch: Any) -> torch.Tensor:
        if self.step_loss is not None:
            loss = self.step_loss(model, batch)
        else:
            if not isinstance(batch, (list, tuple)) or len(batch) != 2:
                raise LockstepError("loss_fn expects (inputs, targets) batches; for other batch "
                                    "structures pass step_loss=(model, batch) -> loss")
            inputs, targets = batch
            assert self.loss_fn is not None   # the constructor requires loss_fn or step_loss
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
        check_replacement_types(self.shadows, self.train_set, collate, self._fetch)
        self._collate_rows_for = collate
        self._probe = None
        self._holdout = None

    # -- methods whose bodies live in the modules named: assigned, not wrapped, so subclasses
    # override them as before and a warning's stacklevel counts the same frames
    _fix_sampling = sampling.fix_sampling   # the part of train_set the sampler draws
    _set_part = sampling.set_part

    def batches(self, loader: DataLoader) -> SizedBatches:
        """Yield exactly the loader's batches, recording their indices and RNG states
        (``len()`` is the loader's)."""
        return SizedBatches(self._tracked_batches(loader), loader)

    _tracked_batches = loop.tracked_batches   # the loop: recorded batches, step hooks
    _sibling = loop.sibling_loader
    _on_batch = loop.on_batch
    _before_main_step = loop.before_main_step
    _after_main_step = loop.after_main_step
    _step_shadows = loop.step_shadows
    _run_engine = loop.run_engine
    _hit_counts = loop.hit_counts

    finish_epoch = epoch_end.finish_epoch   # the epoch's end: measurement, bounds, sinks
    _probe_summary = epoch_end.probe_summary
    _held_out_rows = epoch_end.held_out_rows
    _held_out_summary = epoch_end.held_out_summary
    _see_losses = epoch_end.see_losses
    _measure_start = epoch_end.measure_start
    _divergences = epoch_end.divergences
    current_constants = epoch_end.current_constants

    def _report_faults(self, faulted: list[Shadow]) -> None:
        if not faulted:
            return
        if parameters_finite([p for _, p in trainable_parameters(self.model)]):
            tail = "it is frozen and marked, the other shadows and the main run go on"
        else:
            tail = ("it is frozen and marked. YOUR MAIN RUN's parameters are not finite either: "
                    "your training itself went NaN/inf, and the shadows only followed it")
        for shadow in faulted:
            warnings.warn(f"{shadow.label} (swapping index {shadow.spec.index}): "
                          f"{shadow.fault}; {tail}", ShadowFaultWarning, stacklevel=4)

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

    def trivial_loss(self) -> float | None:
        """What a bound must beat to say anything: the smaller of the model's loss before
        training and the loss bound M (when declared); None when neither is known."""
        constants = self.declared_constants
        bound = constants.loss_bound if constants is not None else self.loss_bound
        known = [v for v in (self.initial_loss, bound) if v is not None]
        return min(known) if known else None

    def _bounds_reason(self) -> str:
        """Why the bounds do not apply to the optimizer as the run's steps used it ('' when they
        do): settings changed after construction (momentum switched on) count from their step."""
        if not self.history.steps:
            return self.optimizer_reason
        return self.history.optimizer_reason()

    def advise(self, target: float | None = None, **options: Any) -> Any:
        """Stop suggestions from the readings so far (``sgdstab.outputs.advice.StopAdvice``).

        With a constant step size and batch size the budget projection uses the planner (a
        ``TrainingPlan`` built from the run); otherwise it extrapolates the recorded bound.
        ``options`` go to ``sgdstab.outputs.advice.advise``.
        """
        from ..outputs.advice import TrainingPlan, advise

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
            "n": self.n, "train_set_size": self.dataset_size,
            "shadows": [s.spec.describe() for s in self.shadows],
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
        self._siblings = weakref.WeakKeyDictionary()   # kept siblings' workers shut down
        if self.sinks is not None:
            self.sinks.close()

    def __repr__(self) -> str:
        where = "no log_dir" if self.sinks is None else f"log_dir={str(self.sinks.log_dir)!r}"
        constants = ("declared constants" if self.declared_constants is not None else
                     "estimated constants" if self.estimate_constants else "no constants")
        return (f"<StabilityTracker n={self.n}, {len(self.shadows)} shadows, "
                f"epoch {self.epoch}, {self.steps} steps, engine {self.engine.name!r}, "
                f"{constants}, {where}>")

    def __enter__(self) -> StabilityTracker:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
