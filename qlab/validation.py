"""Checks of settings, written once for every task, learner, reference and report.

Each check returns the value (as a plain ``float``, ``int``, ``str`` or tuple) when it is allowed
and otherwise raises ``ValueError`` naming the setting, what is allowed and what it got, e.g.
``dt_s must be a finite number > 0, got -1.0``. ``note`` adds a few words after what is allowed
(``grid must be an integer >= 2 (nodes per axis), got 1``). Booleans never pass as numbers.
"""

from __future__ import annotations

import numbers
from collections.abc import Sequence
from typing import Any

import numpy as np


def _real(value: Any) -> float:
    """``value`` as a float, NaN when it is no real number (so every range check fails on it)."""
    if isinstance(value, np.ndarray) and value.ndim == 0:
        value = value.item()
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        return float("nan")
    return float(value)


def _items(value: Any) -> list[Any]:
    """The elements of a list-like ``value`` (list, tuple, array, config list), ``[]`` for anything else."""
    if isinstance(value, str | bytes):
        return []
    try:
        return list(value)
    except TypeError:
        return []


def _fail(name: str, allowed: str, note: str, value: Any) -> ValueError:
    return ValueError(f"{name} must {allowed}{f' {note}' if note else ''}, got {value!r}")


def require_positive(name: str, value: Any, note: str = "") -> float:
    """``value`` as a float if it is a finite number > 0, else ``ValueError``."""
    x = _real(value)
    if not (np.isfinite(x) and x > 0):
        raise _fail(name, "be a finite number > 0", note, value)
    return x


def require_non_negative(name: str, value: Any, note: str = "") -> float:
    """``value`` as a float if it is a finite number >= 0, else ``ValueError``."""
    x = _real(value)
    if not (np.isfinite(x) and x >= 0):
        raise _fail(name, "be a finite number >= 0", note, value)
    return x


def require_within(
    name: str, value: Any, low: float, high: float, *, open_low: bool = False, open_high: bool = False, note: str = ""
) -> float:
    """``value`` as a float if it lies between ``low`` and ``high`` (ends open as asked), else ``ValueError``."""
    x = _real(value)
    above = x > low if open_low else x >= low
    below = x < high if open_high else x <= high
    if not (np.isfinite(x) and above and below):
        interval = f"{'(' if open_low else '['}{low:g}, {high:g}{')' if open_high else ']'}"
        raise _fail(name, f"lie in {interval}", note, value)
    return x


def require_gamma(gamma: Any, *, above_zero: bool = False, below_one: bool = False, note: str = "") -> float:
    """A discount factor in [0, 1] (``above_zero``/``below_one`` exclude the ends) as a float, else ``ValueError``."""
    return require_within("gamma", gamma, 0.0, 1.0, open_low=above_zero, open_high=below_one, note=note)


def require_int(name: str, value: Any, minimum: int, note: str = "") -> int:
    """``value`` as an int if it is a whole number >= ``minimum`` (``3.0`` passes), else ``ValueError``."""
    x = _real(value)
    if not (x.is_integer() and x >= minimum):
        raise _fail(name, f"be an integer >= {minimum}", note, value)
    return int(x)


def require_int_list(name: str, values: Any, minimum: int = 1, note: str = "") -> list[int]:
    """``values`` as ints if it is a non-empty list of whole numbers >= ``minimum``, else ``ValueError``."""
    counts = [_real(v) for v in _items(values)]
    if not counts or not all(x.is_integer() and x >= minimum for x in counts):
        raise _fail(name, f"be a non-empty list of integers >= {minimum}", note, values)
    return [int(x) for x in counts]


def require_choice(name: str, value: Any, choices: Sequence[str], note: str = "") -> str:
    """``value`` if it is one of ``choices``, else ``ValueError`` listing them."""
    if not isinstance(value, str) or value not in choices:
        raise _fail(name, f"be one of {list(choices)}", note, value)
    return value


def require_range(name: str, value: Any, low: float = -np.inf) -> tuple[float, float]:
    """``(lo, hi)`` as floats if ``value`` is a finite pair with ``low <= lo <= hi``, else ``ValueError``."""
    pair = _items(value)
    if len(pair) != 2:
        raise ValueError(f"{name} must be a (low, high) pair, got {value!r}")
    lo, hi = (_real(v) for v in pair)
    if not (np.isfinite(lo) and np.isfinite(hi) and low <= lo <= hi):
        raise ValueError(f"{name} must be a finite (low, high) pair with {low} <= low <= high, got {value!r}")
    return lo, hi


def require_name(key: str, value: Any) -> str:
    """``value`` if it is one relative path component (no ``/``, not ``.``/``..``, not empty), else ``ValueError``."""
    if not isinstance(value, str) or value in ("", ".", "..") or "/" in value or "\\" in value or "\0" in value:
        raise ValueError(f"{key} must be a single folder name (no '/', not '', '.' or '..'), got {value!r}")
    return value
