"""Boundary checks for generator parameters: each message names the parameter, what was
expected and what was found."""

from __future__ import annotations

import numbers
from typing import Iterable

from shapes.errors import ConfigError, InputError

__all__ = ["positive", "at_least", "integer", "choice", "less_than", "boolean"]


def _number(family: str, name: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InputError(f"{family}: {name} should be a number, got {value!r} instead.")
    value = float(value)
    if value != value or value in (float("inf"), float("-inf")):
        raise InputError(f"{family}: {name} should be a finite number, got {value} instead.")
    return value


def positive(family: str, name: str, value) -> float:
    """Return ``value`` as float, or raise InputError unless it is a finite number > 0."""
    value = _number(family, name, value)
    if value <= 0:
        raise InputError(f"{family}: {name} should be > 0 mm, got {value:g} instead.")
    return value


def at_least(family: str, name: str, value, low: float) -> float:
    """Return ``value`` as float, or raise InputError unless it is >= ``low``."""
    value = _number(family, name, value)
    if value < low:
        raise InputError(f"{family}: {name} should be >= {low:g}, got {value:g} instead.")
    return value


def integer(family: str, name: str, value, low: int, high: int | None = None) -> int:
    """Return ``value`` as int, or raise InputError unless it is an integer in [low, high]."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise InputError(f"{family}: {name} should be an integer, got {value!r} instead.")
    value = int(value)
    if value < low or (high is not None and value > high):
        span = f"in [{low}, {high}]" if high is not None else f">= {low}"
        raise InputError(f"{family}: {name} should be an integer {span}, got {value} instead.")
    return value


def choice(family: str, name: str, value, options: Iterable) -> object:
    """Return ``value`` unless it is not one of ``options`` (then ConfigError listing them)."""
    options = list(options)
    if value not in options:
        listed = ", ".join(str(o) for o in options)
        raise ConfigError(f"{family}: unknown {name} {value!r}; expected one of {listed}.")
    return value


def less_than(family: str, small: str, a: float, big: str, b: float) -> None:
    """Raise InputError unless ``a < b`` (e.g. a bore smaller than the outside diameter)."""
    if not a < b:
        raise InputError(f"{family}: {small} should be < {big} ({b:g} mm), got {a:g} mm instead.")


def boolean(family: str, name: str, value) -> bool:
    """Return ``value`` unless it is not a bool."""
    if not isinstance(value, bool):
        raise InputError(f"{family}: {name} should be true or false, got {value!r} instead.")
    return value
