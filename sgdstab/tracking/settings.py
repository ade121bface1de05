"""Grouped options of StabilityTracker: the constants the bounds use, and the probe set.

``StabilityTracker(..., constant_settings=ConstantSettings(...), probe_settings=ProbeSettings(
...))`` is the same tracker as the flat keywords it groups (``constants``, ``estimate_every``,
``estimate_options``, ``loss_bound``; ``probe_set``, ``probe_size``); a tracker given one option
both ways is a TypeError, even when the two values agree.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

__all__ = ["ConstantSettings", "ProbeSettings", "NOT_GIVEN", "resolve_settings"]


class _NotGiven:
    """Default of a flat keyword, so that a value given both ways can be told apart."""

    def __repr__(self) -> str:
        return "NOT_GIVEN"


NOT_GIVEN: Any = _NotGiven()


@dataclass(frozen=True)
class ConstantSettings:
    """Where the Lipschitz and smoothness constants come from, and how often to re-estimate them.

    ``constants``: a declared ``Constants``, ``"estimate"`` or ``None`` (measure only);
    ``every``: re-estimate every this many epochs (flat keyword ``estimate_every``);
    ``options``: the estimator's settings (flat keyword ``estimate_options``);
    ``loss_bound``: the loss range M for estimated constants.
    """

    constants: Any = None
    every: int = 1
    options: Mapping[str, Any] = field(default_factory=dict)
    loss_bound: float | None = None


@dataclass(frozen=True)
class ProbeSettings:
    """The points the loss differences are read on.

    ``dataset``: the probe points (flat keyword ``probe_set``; ``None``: swapped examples plus a
    seeded sample of the training set); ``size``: that sample's size (flat keyword ``probe_size``;
    ``None``: n/16 kept within [128, 256]).
    """

    dataset: Any = None
    size: int | None = None


#: Flat keyword -> (grouping keyword, field of its settings object).
_FLAT = {
    "constants": ("constant_settings", "constants"),
    "estimate_every": ("constant_settings", "every"),
    "estimate_options": ("constant_settings", "options"),
    "loss_bound": ("constant_settings", "loss_bound"),
    "probe_set": ("probe_settings", "dataset"),
    "probe_size": ("probe_settings", "size"),
}
_TYPES = {"constant_settings": ConstantSettings, "probe_settings": ProbeSettings}


def resolve_settings(grouped: Mapping[str, Any], flat: Mapping[str, Any]) -> dict[str, Any]:
    """The flat keywords' values, taken from the settings objects or the flat keywords.

    ``grouped``: ``{"constant_settings": ..., "probe_settings": ...}`` (``None`` when not given);
    ``flat``: the six flat keywords, ``NOT_GIVEN`` when not given. Returns all six, defaults filled.
    """
    for name, value in grouped.items():
        if value is not None and not isinstance(value, _TYPES[name]):
            raise TypeError(f"{name} must be a {_TYPES[name].__name__}, got "
                            f"{type(value).__name__}")
    defaults = {name: _TYPES[name]() for name in _TYPES}
    resolved = {}
    for keyword, (group, attribute) in _FLAT.items():
        given = grouped.get(group)
        if flat[keyword] is not NOT_GIVEN:
            if given is not None:
                raise TypeError(
                    f"{keyword}= and {group}= both given: {keyword} is "
                    f"{_TYPES[group].__name__}.{attribute}; give it one way only")
            resolved[keyword] = flat[keyword]
        else:
            resolved[keyword] = getattr(given if given is not None else defaults[group],
                                        attribute)
    return resolved

