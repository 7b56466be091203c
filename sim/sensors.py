"""Sensor models: what a transducer, thermometer or barometer makes of the true value.

Why: the engine must cope with what real sensors deliver, not with the truth.  Each model applies,
in order: a first-order lag (the sensing element's response), sample-and-hold at the update rate
(repeated reads within one update return the identical value), zero offset plus any zero drift,
white Gaussian noise, quantisation to the resolution, and saturation outside the rated span.
Noise comes from a seeded numpy Generator, drawn in blocks, so a run is reproducible.
"""

from __future__ import annotations

import math

import numpy as np

_BLOCK = 4096


class SensorModel:
    """One sensor channel.  ``sample(t, x)`` takes the true value x at time t, returns the output."""

    def __init__(self, *, noise: float = 0.0, zero_offset: float = 0.0, resolution: float = 0.0,
                 update_rate: float = 100.0, lag: float = 0.0, low: float = -math.inf,
                 high: float = math.inf, rng: np.random.Generator | None = None) -> None:
        self.noise = float(noise)
        self.zero_offset = float(zero_offset)
        self.resolution = float(resolution)
        self.period = 1.0 / float(update_rate)
        self.lag = float(lag)
        self.low, self.high = float(low), float(high)
        self.drift_rate = 0.0
        self.drift_since = 0.0
        self._rng = rng if rng is not None else np.random.default_rng(0)
        self._buf: list[float] = []
        self._k: int | None = None  # index of the held update
        self._held = math.nan
        self._y: float | None = None  # lag filter state
        self._ty = 0.0

    def _normal(self) -> float:
        if not self._buf:
            self._buf = self._rng.standard_normal(_BLOCK).tolist()
        return self._buf.pop()

    def start_drift(self, t: float, rate: float) -> None:
        """Zero drift (units of the quantity per second) from time t on; rate 0 stops it."""
        self.zero_offset += self.drift_rate * (t - self.drift_since)
        self.drift_rate, self.drift_since = float(rate), float(t)

    def sample(self, t: float, x: float) -> float:
        k = math.floor(t / self.period + 1e-9)
        if k == self._k:
            return self._held
        tk = k * self.period
        # first-order lag, input held at its present value over the interval (exact for a step)
        if self.lag > 0.0 and self._y is not None:
            self._y = x + (self._y - x) * math.exp(-max(tk - self._ty, 0.0) / self.lag)
        else:
            self._y = x
        self._ty = tk
        y = self._y + self.zero_offset + self.drift_rate * (t - self.drift_since)
        if self.noise > 0.0:
            y += self.noise * self._normal()
        if self.resolution > 0.0:
            y = round(y / self.resolution) * self.resolution
        y = min(max(y, self.low), self.high)
        self._k, self._held = k, y
        return y
