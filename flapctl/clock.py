"""Clocks that pace the controller.

The scheduler takes a :class:`Clock` and never reads the wall clock itself.  Deadlines are
absolute, in integer nanoseconds since the clock started (``due += period``), so a late tick
does not shift every later one; lateness and overruns are counted, never hidden.

* :class:`VirtualClock` -- lockstep SIL: ``wait()`` advances the plant by exactly one period
  and returns at once.  Runs as fast as the CPU allows.
"""
from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable

__all__ = ["Clock", "VirtualClock"]


class Clock(ABC):
    """Fixed-period pacing.  ``wait()`` returns the time of the tick that starts now."""

    def __init__(self, period_ns: int) -> None:
        if period_ns <= 0:
            raise ValueError(f"clock period must be positive, got {period_ns} ns")
        self.period_ns = int(period_ns)
        self.period_s = self.period_ns * 1e-9
        self.ticks = 0
        self.lateness_ns = 0          # of the most recent tick
        self.overruns = 0             # ticks that started more than one period late

    @abstractmethod
    def start(self) -> int:
        """Start the clock; return the time of tick 0 (ns since start, i.e. 0)."""

    @abstractmethod
    def wait(self) -> int:
        """Block until the next deadline; return its time in ns since start."""

    def now_s(self) -> float:
        """Time of the current tick in seconds since start."""
        return self.ticks * self.period_s

    def close(self) -> None:
        """Undo anything the clock changed (priorities, memory locks)."""


class VirtualClock(Clock):
    """Lockstep clock for SIL: each ``wait()`` steps the plant by one period.

    ``plant_step(dt_s)`` is called with the period in seconds; the controller's commands of the
    tick just finished act on the plant during that step.
    """

    def __init__(self, period_ns: int, plant_step: Callable[[float], None] | None = None) -> None:
        super().__init__(period_ns)
        self._plant_step = plant_step

    def start(self) -> int:
        self.ticks = 0
        return 0

    def wait(self) -> int:
        if self._plant_step is not None:
            self._plant_step(self.period_s)
        self.ticks += 1
        return self.ticks * self.period_ns
