"""What a recorded run implies: the parameter groups' rule, constants, bounds, audit.

Pure functions between the tracker's record (``StepHistory``) and the published bounds
(``sgdstab.theory.divergence.assess_run``); the tracker only calls them and warns. Whether
the optimizer is one the bounds cover is decided in ``sgdstab.tracking.optimizer_rule``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from .constants import Constants
from .history import StepHistory

__all__ = ["GroupSettings", "groups_reason", "effective_constants",
           "run_bounds", "loss_bound_reason", "assumption_breaches", "reading_fields"]

#: Relative and absolute (times 1 + ||w||) slack for float round-off in the assumption audit.
AUDIT_RTOL = 1e-5
AUDIT_ATOL = 1e-6


@dataclass
class GroupSettings:
    """What the optimizer's parameter groups did, step by step, as the group rule needs it.

    For every step: the largest group step size ``alpha_max,t`` (returned by ``observe``), and
    whether the ratios ``r_g = alpha_g,t / alpha_max,t`` and the weight decays ``lambda_g`` stayed
    what they were at the first step. ``changed`` says, once they did not, at which step and how.
    """

    ratios: tuple[float, ...] | None = None
    decays: tuple[float, ...] | None = None
    changed: str = ""
    steps: int = 0
    _last: tuple[tuple[float, float], ...] | None = field(default=None, repr=False)

    def observe(self, param_groups: Sequence[dict[str, Any]]) -> float:
        """Record one step's groups; returns the largest step size among them."""
        settings = tuple((float(g["lr"]), float(g.get("weight_decay", 0.0) or 0.0))
                         for g in param_groups)
        largest = max(lr for lr, _ in settings)
        if settings != self._last:
            self._last = settings
            self._compare(settings, largest)
        self.steps += 1
        return largest

    def _compare(self, settings: tuple[tuple[float, float], ...], largest: float) -> None:
        if largest <= 0:          # a step of size 0 moves nothing: no ratio to keep
            return
        ratios = tuple(lr / largest for lr, _ in settings)
        decays = tuple(decay for _, decay in settings)
        if self.ratios is None:
            self.ratios, self.decays = ratios, decays
        elif not self.changed and (len(ratios) != len(self.ratios) or decays != self.decays
                                   or not np.allclose(ratios, self.ratios, rtol=1e-12, atol=0)):
            self.changed = (f"at step {self.steps + 1} the parameter groups' step-size ratios or "
                            f"weight decays changed (from ratios {_short(self.ratios)}, decays "
                            f"{_short(self.decays)} to {_short(ratios)}, {_short(decays)}): the "
                            "per-group rescaling needs them constant over the run")

    @property
    def several(self) -> bool:
        """Whether the groups differ in step size or weight decay (the rule is then needed)."""
        return self.ratios is not None and (len(set(self.ratios)) > 1
                                            or len(set(self.decays or ())) > 1)

    def state_dict(self) -> dict[str, Any]:
        return {"ratios": self.ratios, "decays": self.decays, "changed": self.changed,
                "steps": self.steps, "last": self._last}

    @classmethod
    def from_state_dict(cls, state: dict[str, Any]) -> GroupSettings:
        def tup(value: Any) -> Any:
            return None if value is None else tuple(value)
        settings = cls(tup(state["ratios"]), tup(state["decays"]), str(state["changed"]),
                       int(state["steps"]))
        last = state.get("last")
        settings._last = None if last is None else tuple(tuple(pair) for pair in last)
        return settings


def _short(values: Sequence[float] | None) -> str:
    return "[" + ", ".join(f"{v:.4g}" for v in (values or ())) + "]"


def effective_constants(constants: Constants, groups: GroupSettings | None = None) -> Constants:
    """The constants of plain SGD with step ``alpha_max,t`` that the groups' run reduces to.

    SGD's parameter groups update ``w_g <- w_g - alpha_g (grad_g f + lambda_g w_g)``. With the
    ratios ``r_g = alpha_g / alpha_max`` constant over the run, substituting
    ``u_g = w_g / sqrt(r_g)`` makes the update plain SGD with step ``alpha_max`` on a function
    that is convex when ``f`` is, with Lipschitz constant <= L, smoothness <= ``beta + max_g
    lambda_g r_g`` and strong convexity >= ``gamma min_g r_g + min_g lambda_g r_g``; and
    ``||w - w'|| <= ||u - u'||`` since every ``r_g <= 1``. One group with decay lambda gives the
    usual ``beta + lambda`` and ``gamma + lambda`` (weight decay adds ``lambda/2 ||w||^2``:
    Hardt, Recht & Singer 2016 Sec. 2 for the growth lemma; the rescaling is our derivation, checked
    in tests/test_assessment.py on a quadratic). A group without decay (the usual bias group)
    leaves the strong convexity at ``gamma min_g r_g``: 0 for a merely convex loss.
    ``groups=None`` or no step recorded yet: one group, no decay.
    """
    if groups is None or groups.ratios is None:
        return constants
    ratios = np.asarray(groups.ratios, dtype=float)
    decays = np.asarray(groups.decays, dtype=float)
    scaled = decays * ratios
    if not scaled.any() and ratios.min() == 1.0:
        return constants
    strong = constants.strong_convexity * float(ratios.min()) + float(scaled.min())
    return Constants(
        lipschitz=constants.lipschitz,
        smoothness=constants.smoothness + float(scaled.max()),
        strong_convexity=strong if constants.convex else 0.0,
        loss_bound=constants.loss_bound, convex=constants.convex, source=constants.source)


def groups_reason(groups: GroupSettings | None) -> str:
    """Why the bounds do not apply because of the parameter groups ('' when they do)."""
    return "" if groups is None else groups.changed


def loss_bound_reason(constants: Constants, loss_seen: float | None) -> str:
    """Why the declared loss bound M cannot be used ('' when no observed loss exceeds it)."""
    bound = constants.loss_bound
    if bound is None or loss_seen is None or loss_seen <= bound * (1 + 1e-9):
        return ""
    return (f"the loss bound M = {bound:g} is below a per-example loss the tracker observed "
            f"({loss_seen:.4g}), so f is not in [0, M]: every bound that uses M is not "
            "applicable")


def run_bounds(history: StepHistory, n: int, constants: Constants, delta: float,
               reason: str, loss_seen: float | None = None) -> Any:
    """Every bound for the recorded run (``sgdstab.theory.divergence.RunBounds``).

    A declared M below an observed per-example loss makes the bounds that use M (the
    high-probability gap; the non-convex t0 bound) not applicable, with that reason.
    """
    from ..theory.divergence import assess_run

    result = assess_run(
        regime=constants.regime, step_sizes=history.step_sizes(),
        batch_sizes=history.batch_sizes(), n=n, lipschitz=constants.lipschitz,
        smoothness=constants.smoothness, strong_convexity=constants.strong_convexity,
        loss_bound=constants.loss_bound, shadow_hits=history.shadow_hits(),
        batch_indices=history.flat_indices(), delta=delta, not_applicable_reason=reason)
    m_reason = loss_bound_reason(constants, loss_seen)
    if m_reason:
        def failed(bound: Any) -> Any:
            return replace(bound, value=None, applicable=False, reason=m_reason)
        result = replace(result, high_probability=failed(result.high_probability))
        if result.regime == "nonconvex":
            result = replace(result, expected=failed(result.expected))
    return result


def assumption_breaches(divergence: Sequence[float], path_bound: Sequence[float | None],
                        parameter_norm: float) -> list[str]:
    """Shadows whose measured divergence exceeds their pathwise bound beyond round-off.

    In the convex and strongly convex regimes the pathwise bound is a theorem (for the declared
    constants), so a breach means the constants or the convexity are wrong for this run.
    """
    slack = AUDIT_ATOL * (1.0 + parameter_norm)
    return [f"shadow_{k}: measured {measured:.6g} > bound {bound:.6g}"
            for k, (measured, bound) in enumerate(zip(divergence, path_bound))
            if bound is not None and measured > bound * (1 + AUDIT_RTOL) + slack]


def reading_fields(result: Any, constants: Constants, violated: bool, *, n: int,
                   delta: float) -> dict[str, Any]:
    """The EpochReading fields that come from the bounds."""
    return {
        "path_bound": tuple(result.path_bound),
        "expected_bound": result.expected.value,
        "high_probability_gap": result.high_probability.value,
        "uniform_stability": result.uniform_stability.value,
        "bounds": {**result.to_dict(), "n": n, "delta": delta},
        "constants": constants.to_dict(),
        "assumption_violated": violated,
    }
