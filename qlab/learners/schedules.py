"""Schedules for exploration rates and step sizes, as pure functions of a count.

* ``constant``: ``start`` forever.
* ``linear``: from ``start`` to ``end`` over ``horizon`` counts, then ``end``.
* ``exponential``: ``end + (start - end) * exp(-n / horizon)``.
* ``polynomial``: ``start / (n + 1) ** power`` (power 1 gives the 1/n harmonic steps; with the
  visit count of a state-action pair as ``n`` this is the classic 1/visit-count step size).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from qlab.validation import require_choice, require_within

SCHEDULE_KINDS = ("constant", "linear", "exponential", "polynomial")


@dataclass(frozen=True)
class Schedule:
    """A rate as a function of a count ``n`` (steps, episodes or visits); vectorised over ``n``."""

    kind: str = "constant"
    start: float = 0.1
    end: float = 0.0
    horizon: float = 1.0
    power: float = 1.0

    def __post_init__(self) -> None:
        require_choice("schedule kind", self.kind, SCHEDULE_KINDS)
        if self.horizon <= 0:
            raise ValueError(f"schedule horizon must be > 0, got {self.horizon!r}")
        if self.kind == "polynomial":
            require_within("polynomial schedule power", self.power, 0.5, 1.0, open_low=True)

    def __call__(self, n: np.ndarray | int) -> np.ndarray | float:
        if isinstance(n, int | float) and self.kind in ("constant", "linear"):  # one count: plain floats, same numbers
            if self.kind == "constant":
                return self.start
            return self.start + min(max(n / self.horizon, 0.0), 1.0) * (self.end - self.start)
        n = np.asarray(n, dtype=np.float64)
        if self.kind == "constant":
            out = np.full_like(n, self.start)
        elif self.kind == "linear":
            frac = np.clip(n / self.horizon, 0.0, 1.0)
            out = self.start + frac * (self.end - self.start)
        elif self.kind == "exponential":
            out = self.end + (self.start - self.end) * np.exp(-n / self.horizon)
        else:
            out = self.start / (n + 1.0) ** self.power
        return float(out) if out.ndim == 0 else out

    def over(self, first: int, count: int) -> np.ndarray | float:
        """The rates at counts ``first, ..., first + count - 1``; one float when the schedule is constant or
        ``count`` is 1 on a linear schedule."""
        if self.kind == "constant":
            return self.start
        return self(first) if count == 1 and self.kind == "linear" else self(first + np.arange(count))


@dataclass
class ScheduleConfig:
    """The plain fields of a :class:`~qlab.learners.schedules.Schedule` (mutable, so it nests in hydra configs)."""

    kind: str = "constant"  # "constant" | "linear" | "exponential" | "polynomial"
    start: float = 0.1
    end: float = 0.0
    horizon: float = 1.0
    power: float = 1.0

    def build(self, name: str) -> Schedule:
        """The schedule; a bad field raises ``ValueError`` prefixed with ``name``."""
        try:
            return Schedule(str(self.kind), float(self.start), float(self.end), float(self.horizon), float(self.power))
        except ValueError as err:
            raise ValueError(f"{name}: {err}") from err


def check_epsilon(name: str, settings: ScheduleConfig) -> Schedule:
    """Build an exploration-rate schedule whose start and end lie in [0, 1]."""
    schedule = settings.build(name)
    if not (0.0 <= settings.start <= 1.0 and 0.0 <= settings.end <= 1.0):
        raise ValueError(f"{name}.start and {name}.end must lie in [0, 1], got {settings.start!r}, {settings.end!r}")
    return schedule
