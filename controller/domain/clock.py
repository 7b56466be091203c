"""Clocks: the only source of time for the control loop.

Everything that waits or time-stamps goes through a Clock, so the same code runs in real time
on hardware and many times faster than real time against the simulator, whose clock's sleep
simply advances simulated time.
"""

from __future__ import annotations

import time
from typing import Protocol, runtime_checkable


@runtime_checkable
class Clock(Protocol):
    def now(self) -> float:
        """Seconds on a monotonic time line."""

    def sleep(self, dt: float) -> None:
        """Let dt seconds pass."""


class WallClock:
    """Real time, monotonic."""

    def now(self) -> float:
        return time.monotonic()

    def sleep(self, dt: float) -> None:
        if dt > 0:
            time.sleep(dt)


class ManualClock:
    """Time that moves only when told to: sleep adds dt. The simulator's clock and tests use it."""

    def __init__(self, start: float = 0.0) -> None:
        self._t = float(start)

    def now(self) -> float:
        return self._t

    def sleep(self, dt: float) -> None:
        if dt > 0:
            self._t += dt
