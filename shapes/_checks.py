"""Boundary checks every room may use: each returns the checked value or raises a
:class:`shapes.errors.ShapesError` whose one-line message names the option, what was expected and
what was found (``train.lr should be a finite number > 0, got 'abc' instead.``).

A leaf: it imports only :mod:`shapes.errors`. ``name`` is whatever the user typed or sees
(``train.epochs``, ``stud: pitch``), so the message points at the thing to change.
"""

from __future__ import annotations

import math
import numbers
from typing import Callable, Iterable

from shapes.errors import ConfigError, InputError

__all__ = ["number", "integer", "choice", "boolean", "text", "optional", "listed", "vector", "less_than", "fail",
           "Scope"]


def fail(name: str, expected: str, found: str, error: type = ConfigError) -> None:
    """Raise ``error`` with the one message format: '<name> should be <expected>, got <found> instead.'

    ``found`` is the value as text (``repr`` for a wrong type, ``:g`` for a number out of range)."""
    raise error(f"{name} should be {expected}, got {found} instead.")


def _span(low, high, low_open: bool, high_open: bool, unit: str) -> str:
    u = f" {unit}" if unit else ""
    if low is not None and high is not None:
        return f"in {'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}{u}"
    if low is not None:
        return f"{'>' if low_open else '>='} {low:g}{u}"
    if high is not None:
        return f"{'<' if high_open else '<='} {high:g}{u}"
    return ""


def number(name: str, value, *, low: float | None = None, high: float | None = None, low_open: bool = False,
           high_open: bool = False, unit: str = "", error: type = ConfigError) -> float:
    """``value`` as a finite float within the bounds (an int is a number; a bool or a string is not)."""
    span = _span(low, high, low_open, high_open, unit)
    expected = "a finite number" + (f" {span}" if span else "")
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        fail(name, expected, repr(value), error)
    value = float(value)
    if not math.isfinite(value):
        fail(name, expected, str(value), error)
    if ((low is not None and (value < low or (low_open and value == low)))
            or (high is not None and (value > high or (high_open and value == high)))):
        fail(name, expected, f"{value:g}", error)
    return value


def integer(name: str, value, *, low: int | None = None, high: int | None = None,
            error: type = ConfigError) -> int:
    """``value`` as an int within [low, high]; 2.5, '3' and True are refused (2.0 is refused too:
    a count written as a float is a typo more often than not)."""
    span = _span(low, high, False, False, "")
    expected = "an integer" + (f" {span}" if span else "")
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        fail(name, expected, repr(value), error)
    value = int(value)
    if (low is not None and value < low) or (high is not None and value > high):
        fail(name, expected, str(value), error)
    return value


def choice(name: str, value, options: Iterable, error: type = ConfigError):
    """``value`` if it is one of ``options``."""
    options = list(options)
    if isinstance(value, bool) or value not in options:
        fail(name, "one of " + ", ".join(str(o) for o in options), repr(value), error)
    return value


def boolean(name: str, value, error: type = ConfigError) -> bool:
    if not isinstance(value, bool):
        fail(name, "true or false", repr(value), error)
    return value


def text(name: str, value, error: type = ConfigError) -> str:
    """A non-empty string (a path, a name)."""
    if not isinstance(value, str) or not value.strip():
        fail(name, "a non-empty text (a name or a path)", repr(value), error)
    return value


def optional(check: Callable, name: str, value, **kwargs):
    """``None`` passes; anything else goes through ``check``. The message says null is allowed too."""
    if value is None:
        return None
    try:
        return check(name, value, **kwargs)
    except (ConfigError, InputError) as exc:
        msg = str(exc).replace(" should be ", " should be null or ", 1)
        raise type(exc)(msg) from None


def listed(name: str, value, item: Callable, *, minimum: int = 1, one_as_list: bool = False,
           error: type = ConfigError) -> list:
    """A list (tuple) of at least ``minimum`` items, each checked by ``item(f'{name}[i]', v)``.

    ``one_as_list``: a bare scalar (``eval.poses=any``) is taken as a one-element list, never
    read letter by letter.
    """
    if one_as_list and (isinstance(value, (str, numbers.Number))):
        value = [value]
    if isinstance(value, (str, bytes)) or not isinstance(value, (list, tuple)):
        fail(name, f"a list of at least {minimum} item{'s' * (minimum != 1)}", repr(value), error)
    if len(value) < minimum:
        fail(name, f"a list of at least {minimum} item{'s' * (minimum != 1)}", repr(list(value)), error)
    return [item(f"{name}[{i}]", v) for i, v in enumerate(value)]


def vector(name: str, value, size: int = 3, error: type = ConfigError) -> list[float]:
    """``size`` finite numbers, as a list (a position ``[x, y, z]``); any sequence of numbers passes."""
    def finite(v) -> bool:
        return not isinstance(v, bool) and isinstance(v, numbers.Real) and math.isfinite(v)

    if (isinstance(value, (str, bytes, dict)) or not hasattr(value, "__len__") or len(value) != size
            or not all(finite(v) for v in value)):
        fail(name, f"{size} numbers [x, y, z]" if size == 3 else f"{size} numbers", repr(value), error)
    return [float(v) for v in value]


def less_than(small: str, a: float, big: str, b: float, *, unit: str = "", error: type = InputError) -> None:
    """Raise unless ``a < b`` (e.g. a bore smaller than the outside diameter)."""
    u = f" {unit}" if unit else ""
    if not a < b:
        raise error(f"{small} should be < {big} ({b:g}{u}), got {a:g}{u} instead.")


class Scope:
    """The validators above for one family of options: every name gets ``prefix`` (``Scope("hex_nut: ",
    InputError).integer("segments", 8, low=12)`` says ``hex_nut: segments should be an integer >= 12,
    ...``) and every failure raises ``error``; ``choice`` keeps ConfigError unless told otherwise (an
    unknown name is a wrong option, not a bad measure)."""

    def __init__(self, prefix: str, error: type = ConfigError, unit: str = ""):
        self.prefix, self.error, self.unit = prefix, error, unit

    def number(self, name: str, value, **bounds) -> float:
        return number(self.prefix + name, value, error=self.error, **{"unit": self.unit, **bounds})

    def positive(self, name: str, value) -> float:
        """A finite number > 0 (a length, in ``unit``)."""
        return self.number(name, value, low=0, low_open=True)

    def integer(self, name: str, value, low: int | None = None, high: int | None = None) -> int:
        return integer(self.prefix + name, value, low=low, high=high, error=self.error)

    def choice(self, name: str, value, options: Iterable, error: type = ConfigError):
        return choice(self.prefix + name, value, options, error=error)

    def boolean(self, name: str, value) -> bool:
        return boolean(self.prefix + name, value, error=self.error)

    def less_than(self, small: str, a: float, big: str, b: float) -> None:
        less_than(self.prefix + small, a, big, b, unit=self.unit, error=self.error)
