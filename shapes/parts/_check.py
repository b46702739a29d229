"""Boundary checks for generator parameters, named ``<family>: <parameter>``: thin wrappers over
the shared validators in :mod:`shapes._checks` (one message format across the project)."""

from __future__ import annotations

from typing import Iterable

from shapes import _checks
from shapes.errors import ConfigError, InputError

__all__ = ["positive", "at_least", "integer", "choice", "less_than", "boolean"]


def positive(family: str, name: str, value) -> float:
    """Return ``value`` as float, or raise InputError unless it is a finite number > 0 (mm)."""
    return _checks.number(f"{family}: {name}", value, low=0, low_open=True, unit="mm", error=InputError)


def at_least(family: str, name: str, value, low: float) -> float:
    """Return ``value`` as float, or raise InputError unless it is a finite number >= ``low``."""
    return _checks.number(f"{family}: {name}", value, low=low, error=InputError)


def integer(family: str, name: str, value, low: int, high: int | None = None) -> int:
    """Return ``value`` as int, or raise InputError unless it is an integer in [low, high]."""
    return _checks.integer(f"{family}: {name}", value, low=low, high=high, error=InputError)


def choice(family: str, name: str, value, options: Iterable) -> object:
    """Return ``value`` unless it is not one of ``options`` (then ConfigError listing them)."""
    return _checks.choice(f"{family}: {name}", value, options, error=ConfigError)


def less_than(family: str, small: str, a: float, big: str, b: float) -> None:
    """Raise InputError unless ``a < b`` (e.g. a bore smaller than the outside diameter)."""
    _checks.less_than(f"{family}: {small}", a, big, b, unit="mm", error=InputError)


def boolean(family: str, name: str, value) -> bool:
    """Return ``value`` unless it is not a bool."""
    return _checks.boolean(f"{family}: {name}", value, error=InputError)
