"""Choose the expansion volume that gives the smallest predicted uncertainty for a sample.

Why: the pressure term of the budget is u(Vs) = Vg (u_P/P1g) f(x), x = Vr/Vg,
f(x) = (1 + x) sqrt(1 + (1 + x)^2) / x, smallest near x = 1.21 (f = 4.43) and flat between about
0.7 and 2 (design analysis of the constant-volume gas pycnometer; derived in methods.md).  With a
calibration covariance per expansion volume the full GUM expression is compared instead.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

X_OPTIMUM = 1.2056  # minimiser of f(x), found numerically; see f_factor


class AdviceError(ValueError):
    """Inputs the advice cannot be computed for."""


def f_factor(x: float) -> float:
    """Pressure-noise amplification f(x) for x = Vr/Vg (equal u_P on P1 and P2, sample_first)."""
    if x <= 0.0:
        raise AdviceError("x = Vr/Vg must be positive")
    return (1.0 + x) * math.sqrt(1.0 + (1.0 + x) ** 2) / x


@dataclass(frozen=True)
class Choice:
    name: str
    vr: float
    predicted_u: float  # standard uncertainty of Vs, m^3
    predicted_rel_u: float  # predicted_u / Vs
    x_ratio: float  # Vr / Vg
    predicted_p2_gauge: float  # Pa, ideal gas


@dataclass(frozen=True)
class Advice:
    best: str
    choices: list[Choice]  # sorted, best first


def predicted_u(vs: float, vc: float, vr: float, p1_gauge: float, u_p: float,
                cov_cal: np.ndarray | None = None) -> tuple[float, float]:
    """(u(Vs), P2g) for an ideal-gas sample_first expansion with equal u_P on P1 and P2."""
    vg = vc - vs
    p2g = p1_gauge * vg / (vg + vr)
    y = vg / vr
    d = p1_gauge - p2g
    var = vr**2 * (p2g**2 + p1_gauge**2) * u_p**2 / d**4
    if cov_cal is not None:
        c = np.asarray(cov_cal, dtype=float)
        var += c[0, 0] + y * y * c[1, 1] - 2.0 * y * c[0, 1]
    return math.sqrt(max(var, 0.0)), p2g


def advise(
    estimated_sample_volume: float,
    cell_volume: float,
    expansion_volumes: Mapping[str, float],
    *,
    p1_gauge: float,
    u_p: float,
    cov_cal: np.ndarray | Mapping[str, np.ndarray] | None = None,
) -> Advice:
    """Rank the expansion volumes by predicted standard uncertainty of the sample volume.

    ``cov_cal`` is one 2x2 (vc, vr) covariance for all, or one per expansion-volume name.
    """
    vs, vc = estimated_sample_volume, cell_volume
    if not expansion_volumes:
        raise AdviceError("no expansion volumes to choose from")
    if not (0.0 < vs < vc):
        raise AdviceError(f"sample volume {vs!r} m^3 must be positive and below the cell volume {vc!r} m^3")
    if p1_gauge <= 0.0 or u_p < 0.0:
        raise AdviceError("p1_gauge must be positive and u_p non-negative")
    choices = []
    for name, vr in expansion_volumes.items():
        if vr <= 0.0:
            raise AdviceError(f"expansion volume {name!r} must be positive, got {vr!r}")
        cov = cov_cal.get(name) if isinstance(cov_cal, Mapping) else cov_cal
        u, p2g = predicted_u(vs, vc, vr, p1_gauge, u_p, cov)
        choices.append(Choice(name, vr, u, u / vs, vr / (vc - vs), p2g))
    choices.sort(key=lambda c: (c.predicted_u, abs(math.log(c.x_ratio / X_OPTIMUM))))
    return Advice(choices[0].name, choices)
