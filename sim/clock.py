"""The simulator's clock: simulated time (sleep advances it) or real time since start.

Why one class: the bench advances its physics lazily to ``clock.now()`` before every read or valve
change, so the same code serves fast simulated runs (tests, sequence trials) and the real-time
daemon with its dashboard.  Implements the Clock protocol of drivers/clock.py.
"""

from __future__ import annotations

import threading
import time


class SimClock:
    """Simulated time (default) or wall time since construction (``realtime=True``). Thread-safe.

    ``speed`` scales a real-time clock: 10 runs the simulated instrument ten times faster than the
    wall clock while it still paces itself (demonstrations, browser tests of the dashboard).
    """

    def __init__(self, start: float = 0.0, *, realtime: bool = False, speed: float = 1.0) -> None:
        if not speed > 0:
            raise ValueError(f"speed must be positive, got {speed!r}")
        self.realtime = realtime
        self.speed = float(speed)
        self._start = float(start)
        self._t = float(start)
        self._wall0 = time.monotonic()
        self._lock = threading.Lock()

    def now(self) -> float:
        if self.realtime:
            return self._start + (time.monotonic() - self._wall0) * self.speed
        return self._t

    def sleep(self, dt: float) -> None:
        if dt <= 0:
            return
        if self.realtime:
            time.sleep(dt / self.speed)
            return
        with self._lock:
            self._t += dt
