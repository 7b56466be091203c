"""Statistics over the cycles of a run: summary, convergence and outlier screening.

Why separate from uncertainty: these decide *which* cycles count and *when* to stop cycling; the
budget then describes the ones kept.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

#: Consistency factor that makes the median absolute deviation estimate sigma for normal data.
MAD_TO_SIGMA = 1.482602218505602  # 1 / Phi^-1(3/4)
#: Same for the mean absolute deviation: sqrt(pi/2).
MEANAD_TO_SIGMA = math.sqrt(math.pi / 2.0)


@dataclass(frozen=True)
class CycleStats:
    n: int
    mean: float
    sd: float  # experimental standard deviation (n - 1); NaN for one value
    rsd: float  # sd / |mean|
    sem: float  # sd / sqrt(n)
    used_indices: tuple[int, ...]


def cycle_stats(volumes: Sequence[float], *, discard: int = 0, exclude: Sequence[int] = ()) -> CycleStats:
    """Summary of the cycles after dropping the first ``discard`` (early cycles still carry purge
    residue and thermal history - common practice) and any indices in ``exclude``."""
    x = [float(v) for v in volumes]
    if discard < 0:
        raise ValueError("discard must be >= 0")
    skip = set(exclude)
    used = tuple(i for i in range(discard, len(x)) if i not in skip)
    if not used:
        raise ValueError(f"no cycles left: {len(x)} given, {discard} discarded, {len(skip)} excluded")
    arr = np.array([x[i] for i in used])
    n = arr.size
    mean = float(arr.mean())
    sd = float(arr.std(ddof=1)) if n > 1 else math.nan
    rsd = sd / abs(mean) if mean != 0.0 else math.nan
    return CycleStats(n, mean, sd, rsd, sd / math.sqrt(n) if n > 1 else math.nan, used)


def converged(volumes: Sequence[float], *, last_k: int, within_fraction: float) -> bool:
    """True when the last ``last_k`` values each lie within ``within_fraction`` of their own mean.

    E.g. last_k=3, within_fraction=0.002 mirrors the "consecutive volumes agree within 0.2 %" stop
    rule of pharmacopoeial gas pycnometry (USP <699> [from memory]).
    """
    if last_k < 2:
        raise ValueError("last_k must be at least 2")
    if within_fraction < 0:
        raise ValueError("within_fraction must be >= 0")
    if len(volumes) < last_k:
        return False
    tail = np.asarray(volumes[-last_k:], dtype=float)
    mean = float(tail.mean())
    return bool(np.all(np.abs(tail - mean) <= within_fraction * abs(mean)))


def robust_z(volumes: Sequence[float], *, floor: float = 0.0) -> np.ndarray:
    """Robust z-scores (x - median) / (1.4826 MAD); falls back to the mean absolute deviation about
    the median when more than half the values coincide (MAD = 0); all zero when every value does.

    ``floor`` bounds the scale from below: cycles that agree far better than each one can be known
    (a clean simulator repeats itself to 1e-9) must not make a 1e-8 difference an outlier."""
    x = np.asarray(volumes, dtype=float)
    med = float(np.median(x))
    dev = np.abs(x - med)
    scale = MAD_TO_SIGMA * float(np.median(dev))
    if scale == 0.0:
        scale = MEANAD_TO_SIGMA * float(dev.mean())
    scale = max(scale, floor)
    if scale == 0.0:
        return np.zeros_like(x)
    return (x - med) / scale


def outliers(volumes: Sequence[float], *, z: float = 3.5, floor: float = 0.0) -> list[int]:
    """Indices whose robust z-score (median/MAD rule) exceeds ``z`` in magnitude.

    Median and MAD are not dragged by the outlier itself, unlike mean/sd, so one bad cycle in five
    is still found.  Needs at least 3 values; fewer give no outliers.
    """
    if len(volumes) < 3:
        return []
    return [int(i) for i in np.flatnonzero(np.abs(robust_z(volumes, floor=floor)) > z)]
