"""One-purpose validation helpers for component parameters.

Every helper raises :class:`~bhgrow.errors.ParameterError` with one message format::

    `boost` of BondiHoyle must be > 0; got -3

Components call these from ``__post_init__`` (frozen dataclasses), so a component that
exists has valid parameters.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

from .errors import ParameterError


def _fail(owner: str, name: str, rule: str, value) -> None:
    raise ParameterError(f"`{name}` of {owner} must be {rule}; got {value!r}",
                         source=owner, rule=name)


def _finite_number(owner: str, name: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        try:
            import numpy as np

            if isinstance(value, np.generic) and np.issubdtype(type(value), np.number):
                value = float(value)
            else:
                raise TypeError
        except TypeError:
            _fail(owner, name, "a number", value)
    value = float(value)
    if not math.isfinite(value):
        _fail(owner, name, "finite", value)
    return value


def positive(owner: str, name: str, value) -> float:
    """Require a finite number > 0."""
    v = _finite_number(owner, name, value)
    if not v > 0:
        _fail(owner, name, "> 0", value)
    return v


def non_negative(owner: str, name: str, value) -> float:
    """Require a finite number >= 0."""
    v = _finite_number(owner, name, value)
    if not v >= 0:
        _fail(owner, name, ">= 0", value)
    return v


def in_range(owner: str, name: str, value, lo: float, hi: float, *,
             lo_open: bool = False, hi_open: bool = False) -> float:
    """Require ``lo <= value <= hi`` (or open ends)."""
    v = _finite_number(owner, name, value)
    ok_lo = v > lo if lo_open else v >= lo
    ok_hi = v < hi if hi_open else v <= hi
    if not (ok_lo and ok_hi):
        left = "(" if lo_open else "["
        right = ")" if hi_open else "]"
        _fail(owner, name, f"in {left}{lo:g}, {hi:g}{right}", value)
    return v


def integer(owner: str, name: str, value, *, minimum: int | None = None) -> int:
    """Require an integer (bool excluded), optionally >= ``minimum``."""
    import numpy as np

    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        _fail(owner, name, "an integer", value)
    if minimum is not None and value < minimum:
        _fail(owner, name, f">= {minimum}", value)
    return int(value)


def one_of(owner: str, name: str, value, choices: Iterable[str]) -> str:
    """Require one of a fixed set of strings."""
    choices = tuple(choices)
    if value not in choices:
        _fail(owner, name, "one of " + ", ".join(repr(c) for c in choices), value)
    return value
