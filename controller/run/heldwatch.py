"""Does the pressure transducer update more slowly than it is read?  Watched over each fill.

A transducer read faster than it updates holds its reading, then steps.  The settle rules take every
sample as a new look at the pressure, so held readings read as steps and as more independent samples than
there are: a zero that never settles, or a pressure stated with too small an uncertainty.  A fill shows it
best: the pressure moves, so a transducer that is read as fast as it updates changes its reading on
nearly every sample.  Two signs, either enough:

* **fast fills** - at least HELD_SHARE of the samples repeat the one before while the pressure rises
  HELD_RISE Pa a sample on average: any transducer whose resolution is finer than that changes on every
  sample of such a fill;
* **any fill** - as many repeats, and the changes almost never come on consecutive samples (under
  HELD_QUICK of them) and either are not whole multiples of one step or keep one beat (nearly every
  gap between them a whole multiple of the shortest, 2 samples or more: a coarse transducer held too,
  found by a sweep: 1 mbar steps at 5 Hz read at 10 Hz passed).  A held transducer changes once per update
  (every k samples, k >= 2) whatever the pressure does, by what the pressure did meanwhile plus its noise;
  a coarse but fast one that repeats because the fill moves less than its step per sample changes by whole
  steps of its resolution; a fine one read as fast as it updates changes on consecutive samples.  Found by a sweep: a
  1 Hz gauge read every 0.1 s passed the first sign on a fill slower than 100 Pa a sample.
"""

from __future__ import annotations

import math

#: share of a fill's samples repeating the one before at which the transducer may be holding its readings
# a transducer updating every second sample repeats half of them, one updating every 1.67 samples (6 Hz read at
# 10 Hz) 40 %: at 0.4 that one was refused at the first fill, the second or not at all, by its noise (found by a
# sweep); at 0.45 it measures and every second sample is refused, whatever the noise
HELD_SHARE = 0.45
#: Pa a sample: a fill rising faster than this on average changes any usable transducer's reading every sample
HELD_RISE = 100.0
#: share of the changes that follow the previous change by one sample, under which the changes keep a rhythm of
#: their own (a transducer updating every 2 samples has none; every 1.67 samples, a third; a memoryless one
#: repeating 40 % of its samples, 60 %)
HELD_QUICK = 0.2
#: a coarse transducer's changes are whole multiples of its resolution (the smallest change): so many of them
#: within LATTICE_TOL of one say the repeats are its resolution, not its update rate
LATTICE_SHARE = 0.9
LATTICE_TOL = 0.02
HELD_MIN_SAMPLES = 20
HELD_MIN_CHANGES = 10


def _beat(gaps: list[int]) -> int | None:
    """The update interval, in samples, where the changes keep one (nearly every gap between them a whole
    multiple of one interval of 2 samples or more: an update that moved the reading less than its step
    shows as a gap of two intervals), or None.  A held transducer changes on its updates only, whatever
    its resolution; a coarse one read as fast as it updates changes when the pressure crosses a step,
    which a fill's changing rate puts at gaps of no common beat (8, 9, 9, 10, ...)."""
    if not gaps:
        return None
    for k in range(min(gaps), 1, -1):
        if sum(g % k == 0 for g in gaps) >= LATTICE_SHARE * len(gaps):
            return k
    return None


def _whole_steps(steps: list[float]) -> bool:
    """Are the changes whole multiples of the smallest one, as a coarse transducer's are?"""
    q = min(steps)
    if not q > 0:
        return False
    on = sum(abs(x / q - round(x / q)) <= LATTICE_TOL for x in steps)
    return on >= LATTICE_SHARE * len(steps)


class FillWatch:
    """One fill's valid pressure samples: how often the reading repeats, and how its changes fall."""

    def __init__(self) -> None:
        self.n = 0
        self.repeats = 0
        self._last = math.nan
        self.first_gauge = math.nan
        self._last_change: int | None = None  # the sample index of the last change seen
        self.quick = 0  # changes one sample after the previous change
        self.steps: list[float] = []  # the size of every change
        self.gaps: list[int] = []  # samples from each change to the next

    def add(self, raw: float, gauge: float) -> None:
        if self.n == 0:
            self.first_gauge = gauge
        elif raw == self._last:
            self.repeats += 1
        else:
            self.steps.append(abs(raw - self._last))
            if self._last_change is not None:
                self.quick += self.n - self._last_change == 1
                self.gaps.append(self.n - self._last_change)
            self._last_change = self.n
        self.n += 1
        self._last = raw

    def verdict(self, gauge: float, sample_period: float) -> str | None:
        """At the fill's end (``gauge`` its last pressure): why the transducer holds its readings, or None."""
        n, repeats = self.n, self.repeats
        if n < HELD_MIN_SAMPLES or repeats < HELD_SHARE * n:
            return None
        rise = gauge - self.first_gauge
        fast = rise >= HELD_RISE * n
        changes = len(self.steps)
        judged = changes >= HELD_MIN_CHANGES  # enough changes to see their sizes and their rhythm
        whole = judged and _whole_steps(self.steps)
        beat = _beat(self.gaps) if judged else None  # the updates' interval, where the changes keep one
        seldom = judged and self.quick < HELD_QUICK * (changes - 1)  # hardly ever on consecutive samples
        if not (fast or (seldom and (not whole or beat is not None))):
            return None
        if fast and whole and beat is None and not seldom:
            # every change a whole step of one size, on no beat and often on consecutive samples: a coarse
            # transducer read as fast as it updates, not a held one (found by a sweep: a 50 Hz gauge in 5 mbar
            # steps was told to be read every 0.21 s)
            return (f"the pressure reading repeated the one before in {repeats} of {n} samples while the fill raised "
                    f"it {rise / 1e3:.3g} kPa, and every change was a whole step of {min(self.steps):.3g} Pa: the "
                    f"transducer's resolution is coarser than the fill's rise per sample ({rise / n:.3g} Pa), too "
                    f"coarse for the settle rules and a volume (a settled pressure is known to no better than its "
                    f"step). Use a transducer or an output with a finer resolution")
        beat = None if fast else beat  # a fast fill's message says its rise, as before
        # the beat where one shows (an update that moved a coarse reading less than its step changed nothing),
        # else from the changes (the fill's first sample is not a change)
        period = beat * sample_period if beat else (n - 1) * sample_period / max(n - repeats - 1, 1)
        why = (f"the fill raised it {rise / 1e3:.3g} kPa" if fast else
               f"its changes came every {beat} samples or a whole multiple of that, as updates do" if beat else
               f"its changes came one sample apart {self.quick} times in {changes - 1}, by {min(self.steps):.3g} to "
               f"{max(self.steps):.3g} Pa, not whole steps of a resolution")
        coarse = f" (or its resolution is coarser than {rise / n:.3g} Pa, the fill's mean rise per sample)" \
            if fast else ""
        return (f"the pressure reading repeated the one before in {repeats} of {n} samples while {why}: the "
                f"transducer gives a new reading about every {period:.2g} s but is read every {sample_period:g} s"
                f"{coarse}. Held readings look like steps to the interlocks and the settle rules (a zero that "
                f"never settles, or a pressure taken with too small an uncertainty). Set the instrument's "
                f"sample_period to at least {period:.2g} s (with limits.stale_after above it), or the transducer "
                f"to a faster output rate")
