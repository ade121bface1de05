"""Argument types for the command line: each checks one option's value and says what is wrong
with it in the option's own terms (argparse names the option in the message)."""

from __future__ import annotations

import argparse
import math
from collections.abc import Callable

__all__ = ["whole_number", "number"]


def whole_number(minimum: int, what: str = "") -> Callable[[str], int]:
    """An integer >= ``minimum``."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(
                f"must be at least {minimum}{what}, got {value}")
        return value
    parse.__name__ = "whole number"
    return parse


def number(*, above: float | None = None, at_least: float | None = None,
           below: float | None = None, at_most: float | None = None) -> Callable[[str], float]:
    """A finite float within the given limits."""
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
        if not math.isfinite(value):
            raise argparse.ArgumentTypeError(f"must be a finite number, got {text}")
        if above is not None and not value > above:
            raise argparse.ArgumentTypeError(f"must be greater than {above:g}, got {value:g}")
        if at_least is not None and not value >= at_least:
            raise argparse.ArgumentTypeError(f"must be at least {at_least:g}, got {value:g}")
        if below is not None and not value < below:
            raise argparse.ArgumentTypeError(f"must be less than {below:g}, got {value:g}")
        if at_most is not None and not value <= at_most:
            raise argparse.ArgumentTypeError(f"must be at most {at_most:g}, got {value:g}")
        return value
    parse.__name__ = "number"
    return parse
