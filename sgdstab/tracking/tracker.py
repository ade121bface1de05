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
from torch.nn.parallel import DistributedDataParallel
from torch.utils._pytree import tree_flatten
from torch.utils.data import DataLoader, Dataset
from torch.utils.data._utils.collate import default_collate

from ..outputs.reading import EpochReading
from ..outputs.sinks import RunSinks
from ..shadows.engines import make_engine
from ..shadows.loaders import (
    SizedBatches,
    check_batch_device,
    check_drawn,
    check_train_set,
    drawable_indices,
    recording_loader,
)
from ..shadows.lockstep import (
    HostRngGuard,
    LockstepError,
    NeighbourSpec,
    Shadow,
    StepGroup,
    parameters_finite,
    preserved_rng,
    select_rows,
    trainable_parameters,
)
from ..shadows.neighbours import attach_rows, explicit_neighbours, seeded_neighbours
from ..theory.assessment import GroupSettings
from ..theory.constants import Constants
from ..theory.history import StepHistory, TimeSpent
from . import measure
from .measure import default_probe_size
from .optimizer_rule import optimizer_reason
from .probe import PerExampleLoss, ProbeRows, model_losses
from .settings import NOT_GIVEN, ConstantSettings, ProbeSettings, resolve_settings

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
        if not isinstance(model, nn.Module):
            raise TypeError("model must be a torch.nn.Module")
        if isinstance(model, DistributedDataParallel):
            raise LockstepError(
                "the model is wrapped in DistributedDataParallel: use "
                "sgdstab.DataParallelStabilityTracker(ddp_model, optimizer, ...) on every rank "
                "(the plain StabilityTracker would wait forever on the other ranks' gradients)")
        refuse_unmirrorable_modules(model)
        if not trainable_parameters(model):
            raise ValueError("the model has no trainable parameters (requires_grad=True): there is "
                             "nothing whose stability could be tracked")
        if not isinstance(optimizer, torch.optim.Optimizer):
            raise TypeError("optimizer must be a torch.optim.Optimizer")
        if isinstance(optimizer, torch.optim.LBFGS):
            raise LockstepError("LBFGS steps with a closure that re-evaluates the loss; the "
                                "tracker cannot mirror it")
        if loss_fn is None and step_loss is None:
            raise ValueError("give loss_fn=(outputs, targets) -> loss or "
                             "step_loss=(model, batch) -> loss (or both: step_loss for the "
                             "training steps, loss_fn for the clean per-example readings)")
        if not 0.0 < float(delta) < 1.0 or math.isnan(float(delta)):
            raise ValueError(f"delta must lie in (0, 1), got {delta}")
        self.n = check_train_set(train_set)
        self.dataset_size = self.n   # len(train_set); n is the number of drawable examples
        self.drawable: np.ndarray | None = None   # set when the sampler draws from a part only
        self._sampling_fixed = False
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
        self._probe_size_given = probe_size is not None
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
        self._checked_batch = False
        self._passes = 0            # passes over tracker.batches() since the last finish_epoch
        self._steps_at_finish = 0   # steps taken when finish_epoch last ran
        self._siblings: dict[int, tuple[DataLoader, DataLoader, Any]] = {}   # persistent
        self.time_spent = TimeSpent()
        self._swapped: np.ndarray | None = None   # the shadows' swapped indices, for hit counts
        self._is_swapped = np.zeros(0, dtype=bool)   # by training index (built with _swapped)
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
        self._check_replacement_types(collate)
        self._collate_rows_for = collate
        self._probe = None
        self._holdout = None

    def _check_replacement_types(self, collate: Callable[[list[Any]], Any]) -> None:
        """Refuse a replacement whose tensors have other dtypes than the training examples'
        (a float label where training uses integer labels would be cast silently in the
        shadows' batches and break the epoch-end evaluation)."""
        for shadow in self.shadows:
            own = collate([self._fetch(self.train_set, shadow.spec.index)])
            mine, theirs = tree_flatten(shadow.row)[0], tree_flatten(own)[0]
            for leaf, (a, b) in enumerate(zip(mine, theirs)):
                if isinstance(a, torch.Tensor) and isinstance(b, torch.Tensor) and \
                        a.dtype != b.dtype:
                    raise LockstepError(
                        f"{shadow.label}: the replacement for training example "
                        f"{shadow.spec.index} holds {a.dtype} where the training examples hold "
                        f"{b.dtype} (tensor {leaf} of the collated example); the shadow's "
                        "batches would convert it silently (a float label cut to an integer): "
                        "give replacements with the training examples' dtypes")

    # -- the part of train_set the sampler draws ------------------------------------------------
    def _fix_sampling(self, loader: DataLoader) -> None:
        """n, the swapped examples and the probe follow the part of ``train_set`` the loader's
        sampler can draw (``SubsetRandomSampler`` and any sampler with ``indices``); fixed by
        the first pass, and a later loader drawing from another part is refused."""
        if not isinstance(loader, DataLoader) or loader.batch_sampler is None:
            return   # recording_loader refuses it with the reason
        drawable = drawable_indices(loader, self.dataset_size)
        if self._sampling_fixed:
            same = drawable is None if self.drawable is None else \
                drawable is not None and np.array_equal(drawable, self.drawable)
            if not same:
                before = self.dataset_size if self.drawable is None else self.drawable.size
                now = self.dataset_size if drawable is None else drawable.size
                raise LockstepError(
                    f"this loader's sampler draws from another part of train_set ({now} "
                    f"examples) than the run's first pass ({before}): n and the swapped "
                    "examples were fixed then; draw from the same examples for the whole run")
            return
        self._sampling_fixed = True
        if drawable is None:
            return
        self._set_part(drawable)
        if self._explicit_swap:
            never = [s.spec.index for s in self.shadows if self._position[s.spec.index] < 0]
            if never:
                raise LockstepError(
                    f"swap indices {never} are never drawn: the loader's sampler draws "
                    f"{self.n} of the {self.dataset_size} examples of train_set; swap examples "
                    "it draws")
        else:
            part = _Part(self.train_set, drawable)
            chosen = seeded_neighbours(len(self.shadows), self.n,
                                       np.random.default_rng(self.seed), self._fetch, part,
                                       self.replacements)
            self.specs = [NeighbourSpec(
                int(drawable[c.index]), c.replacement, c.origin,
                int(drawable[c.source_index]) if c.origin == "train" else c.source_index)
                for c in chosen]
            for shadow, spec in zip(self.shadows, self.specs):
                shadow.spec = spec
        self._swapped = None
        self._collate_rows_for = None
        self._probe = None
        self._holdout = None
        if self.sinks is not None:
            self.sinks.write_run(self.describe())

    def _set_part(self, drawable: np.ndarray) -> None:
        """Use only the training indices ``drawable`` (sorted, distinct): n is their number."""
        if drawable.size < 2:
            raise LockstepError(f"the loader's sampler draws {drawable.size} example(s); "
                                "neighbouring datasets need at least 2")
        self.drawable = drawable
        self.n = int(drawable.size)
        self._position = np.full(self.dataset_size, -1, dtype=np.int64)
        self._position[drawable] = np.arange(self.n)
        if not self._probe_size_given:
            self.probe_size = default_probe_size(self.n)
        self._part_note = (f"n = {self.n}: the loader's sampler draws {self.n} of the "
                           f"{self.dataset_size} examples of train_set; the bounds, the swapped "
                           "examples and the probe's training sample use those")

    # -- the loop -------------------------------------------------------------------------------
    def batches(self, loader: DataLoader) -> SizedBatches:
        """Yield exactly the loader's batches, recording their indices and RNG states
        (``len()`` is the loader's)."""
        return SizedBatches(self._tracked_batches(loader), loader)

    def _tracked_batches(self, loader: DataLoader) -> Iterator[Any]:
        clock, spent = time.perf_counter, self.time_spent
        start = clock()
        self._fix_sampling(loader)
        sibling, recorder = self._sibling(loader)
        self._set_rows(loader.collate_fn)
        if self._passes:
            self._warn_once("passes", "a new pass over tracker.batches() started without "
                            "finish_epoch() after the last one: epochs are counted by "
                            "finish_epoch() calls, so the next reading covers both passes",
                            UserWarning)
        self._passes += 1
        spent.recording += clock() - start
        for batch in sibling:
            start = clock()
            indices = recorder.drawn.popleft()
            self._on_batch(batch, indices)
            spent.recording += clock() - start
            yield batch

    def _sibling(self, loader: DataLoader) -> tuple[DataLoader, Any]:
        """The recording sibling of ``loader``: a new one per pass, except for a loader with
        persistent workers, whose sibling is kept (its workers and seed persist like the
        user's loader's would)."""
        if isinstance(loader, DataLoader) and loader.num_workers > 0 and \
                loader.persistent_workers:
            kept = self._siblings.get(id(loader))
            if kept is None or kept[0] is not loader:
                sibling, recorder = recording_loader(loader, self.train_set)
                kept = self._siblings[id(loader)] = (loader, sibling, recorder)
            kept[2].drawn.clear()
            return kept[1], kept[2]
        return recording_loader(loader, self.train_set)

    def _on_batch(self, batch: Any, indices: np.ndarray) -> None:
        if indices.size and (indices.max() >= self.dataset_size or indices.min() < 0):
            check_drawn(indices, self.dataset_size)
        if not self._checked_batch:
            check_batch_device(batch, next(p for _, p in trainable_parameters(self.model)).device)
            self._checked_batch = True
        if self.steps == 0 and self.initial_loss is None:
            self._measure_start()
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
                    try:
                        self.engine.fork(shadow, self.steps, group.buffers)
                    except RuntimeError as error:
                        raise LockstepError(
                            f"cannot start {shadow.label} as a copy of the main run ({error}); "
                            "a module whose buffers change shape during training (per-channel "
                            "observers of quantization-aware training) cannot be mirrored"
                        ) from error
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
        reason = optimizer_reason(optimizer)   # the settings as this step used them
        if reason != self._step_reason:
            self._step_reason = reason
            self.history.note_optimizer(self.steps, reason)
        step_size = self.groups.observe(optimizer.param_groups)
        hit_counts = self._hit_counts(drawn)
        if self.drawable is not None:   # positions among the drawable examples, 0..n-1
            drawn = self._position[drawn]
        self.history.record(step_size, len(drawn), drawn, hit_counts)
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
            self._is_swapped = np.zeros(self.dataset_size, dtype=bool)
            self._is_swapped[self._swapped] = True
        if not self.shadows or not self._is_swapped[drawn].any():
            return [0] * len(self.shadows)
        return (drawn[:, None] == self._swapped[None, :]).sum(axis=0).tolist()

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

    # -- readings -------------------------------------------------------------------------------
    def finish_epoch(self) -> EpochReading:
        """Close the epoch: measure the shadows, compute the bounds, write the sinks."""
        if self._passes == 0 and self.steps == self._steps_at_finish and self.readings and \
                not self._group.batches:
            warnings.warn(f"finish_epoch() called again with no pass over tracker.batches() and "
                          f"no step since the last call: epoch {self.epoch} is not counted "
                          "twice; its reading is returned again", UserWarning, stacklevel=2)
            return self.readings[-1]
        start = time.perf_counter()
        notes: list[str] = [] if self._part_note is None else [self._part_note]
        if self._passes > 1:
            notes.append(f"this epoch spans {self._passes} passes over tracker.batches() "
                         "(finish_epoch() was not called between them)")
        if self._group.batches:
            notes.append(f"{len(self._group.batches)} batch(es) yielded after the last "
                         "optimizer.step() were never stepped (a break in the loop?): dropped, "
                         "the shadows do not replay them")
            self._group = StepGroup([], [], [])
        self._passes = 0
        self._steps_at_finish = self.steps
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
                collate=self._collate, drawable=self.drawable)
        summary, train_losses, largest = self._probe_summary()
        notes += summary.notes
        held_out = self._held_out_summary(train_losses)
        self._see_losses(largest)
        audit = measure.settle_audit(self.engine, self.audit_shadow, audit, notes,
                                     LockstepWarning)
        if self.audit_shadow is not None and self.audit_shadow not in self.engine.shadows:
            self.audit_shadow = None   # its verdict is in and the engine dropped it
        bound_fields, violated = measure.epoch_bounds(
            self.current_constants(), divergence, notes, history=self.history, n=self.n,
            delta=self.delta, groups=self.groups, optimizer_reason=self._bounds_reason(),
            model=self.model, warned=self._assumption_violated, category=AssumptionWarning,
            loss_seen=self.loss_seen)
        self._assumption_violated = self._assumption_violated or violated
        reading = measure.epoch_reading(self.epoch, self.steps, self.shadows, divergence, audit,
                                        layer, summary, bound_fields, notes, held_out,
                                        self.trivial_loss(), self.loss_seen)
        self.readings.append(reading)
        if self.sinks is not None:
            self.sinks.write(reading)
        self.time_spent.epoch_end += time.perf_counter() - start
        return reading

    def _probe_summary(self) -> tuple[measure.ProbeSummary, np.ndarray, float | None]:
        """The probe's summary, the main run's training-row losses and the largest loss (a
        spread tracker gathers the shadows' losses from every rank)."""
        assert self._probe is not None   # finish_epoch builds it first
        return measure.probe_summary(self.model, self.engine, self.shadows, self._probe,
                                     self._per_example, has_probe_set=self.probe_set is not None)

    def _held_out_rows(self) -> ProbeRows | None:
        if self._holdout is None:
            self._holdout = measure.build_holdout(self.shadows, self.replacements, self._collate)
        return self._holdout

    def _held_out_summary(self, train_losses: np.ndarray) -> measure.HeldOutSummary:
        """The main model on every held-out example no shadow swapped in, and this run's gap."""
        rows = self._held_out_rows()
        losses = None if rows is None else model_losses(self.model, rows, self._per_example)
        self._see_losses(measure.largest_loss(losses))
        return measure.held_out_summary(losses, train_losses)

    def _see_losses(self, largest: float | None) -> None:
        if largest is not None and (self.loss_seen is None or largest > self.loss_seen):
            self.loss_seen = largest

    def _measure_start(self) -> None:
        """The model's mean loss before its first step (on the held-out examples, else the
        training probe): the reference a bound must beat not to be vacuous."""
        rows = self._held_out_rows()
        if rows is None:
            if self._probe is None:
                self._probe = measure.build_probe(
                    self.shadows, self.train_set, n=self.n, probe_set=self.probe_set,
                    replacements=self.replacements, size=self.probe_size, seed=self.seed,
                    collate=self._collate, drawable=self.drawable)
            rows = self._probe
            keep = np.isin(rows.kinds, ["out", "train"])
        else:
            keep = None
        losses = model_losses(self.model, rows, self._per_example)
        if keep is not None:
            losses = losses[keep]
        self._see_losses(measure.largest_loss(losses))
        finite = losses[np.isfinite(losses)]
        self.initial_loss = float(finite.mean()) if finite.size else None

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
            if self.drawable is not None:
                chosen = self.drawable[chosen]
            batch = self._collate([self._fetch(self.train_set, j) for j in chosen])
            self._estimated = measure.estimate_constants(
                self.model, batch, self._estimated, loss_fn=self.loss_fn,
                step_loss=None if self.loss_fn is not None else self.step_loss,
                loss_bound=self.loss_bound,
                options=self.estimate_options)
        return self._estimated

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
        self._siblings = {}   # lets kept loaders' persistent workers shut down
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


class _Part:
    """The examples ``indices`` of ``dataset``, addressed 0..len-1 (for choosing swaps)."""

    def __init__(self, dataset: Any, indices: np.ndarray) -> None:
        self.dataset = dataset
        self.indices = indices

    def __len__(self) -> int:
        return int(self.indices.size)

    def __getitem__(self, position: int) -> Any:
        return self.dataset[int(self.indices[position])]


_PER_CHANNEL = tuple(getattr(torch, name) for name in (
    "per_channel_affine", "per_channel_symmetric", "per_channel_affine_float_qparams")
    if hasattr(torch, name))


def refuse_unmirrorable_modules(model: nn.Module) -> None:
    """Refuse modules the shadows cannot copy: per-channel fake-quantization and observers
    (quantization-aware training) size their buffers at the first forward pass, so a shadow
    started from the main run cannot take them over."""
    for name, module in model.named_modules():
        if not type(module).__module__.startswith("torch.ao.quantization"):
            continue
        if getattr(module, "is_per_channel", False) or \
                getattr(module, "qscheme", None) in _PER_CHANNEL:
            raise LockstepError(
                f"module {name or 'model'} ({type(module).__name__}) quantizes per channel: its "
                "observer buffers change shape at the first forward pass, so the shadows cannot "
                "mirror it; use a per-tensor quantization-aware-training configuration (e.g. "
                "torch.ao.quantization.default_qat_qconfig) while tracking")
