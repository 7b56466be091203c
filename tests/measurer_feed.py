"""A test helper: hand-made rows fed to the cycle measurer one state at a time, as the engine would."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from pycnoctl.controller.maths.cycle import CycleMeasurer, Row
from pycnoctl.controller.maths.settle import SettleStatus

PA = 101325.0


class StateFeeder:
    """0.1 s rows of ``gauge(seconds since the state began)`` plus white noise; a settle state stops at
    its decision, because the engine moves on there."""

    def __init__(self, meter: CycleMeasurer, *, noise: float = 0.0, seed: int = 5, temp_k: float = 295.0) -> None:
        self.meter, self.noise, self.temp_k = meter, noise, temp_k
        self.rng = np.random.default_rng(seed)
        self.t = 0.0

    def hold(self, state: str, gauge: Callable[[float], float], seconds: float) -> None:
        start = self.t
        for _ in range(round(seconds / 0.1)):
            self.t += 0.1
            row = Row(self.t, gauge(self.t - start) + self.noise * self.rng.standard_normal(), PA, self.temp_k)
            if self.meter.feed(state, row) is SettleStatus.SETTLED:
                return
