"""Gas-expansion (Boyle's law) working equations: sample volume from the two pressures, and back.

Why one module: the forward equation (pressures -> volume), its inverse (volume -> expected P2) and
the linear variable y used by calibration must all count moles the same way, n = P V / (Z R T),
or a calibration made with one and a measurement made with the other would disagree.

Conventions (SI floats): pressures absolute Pa, volumes m^3, temperatures K.

Modes:
  ``sample_first``    the sample cell (gas volume Vg = Vc - Vs) is filled to p1, the expansion
                      volume Vr starts at pa; the valve between them opens and both settle at p2.
  ``reference_first`` the expansion volume is charged to p1, the cell starts at pa; the gas expands
                      into the cell and both settle at p2.

Temperatures: ``t1`` is the temperature of the gas charged to p1, ``ta`` that of the gas initially
at pa, ``t2`` that of the final mixture.  All None -> 293.15 K.  Missing ones take the first value
given in the order (t1, t2, ta), so giving one temperature makes the expansion isothermal.

Mass balance (sample_first): Vg rho(p1,t1) + Vr rho(pa,ta) = (Vg + Vr) rho(p2,t2), with
rho = P/(Z R T), hence Vg = Vr (rho2 - rhoa)/(rho1 - rho2) and Vs = Vc - Vg.  For an ideal gas at one
temperature this is the textbook Vs = Vc - Vr / ((P1 - Pa)/(P2 - Pa) - 1) (ASM Handbook Vol. 7,
"Pycnometry").  reference_first: Vg = Vr (rho1 - rho2)/(rho2 - rhoa).
"""

from __future__ import annotations

import math

from pycnoctl.controller.domain.gas import Gas, R, get_gas

# typing.TYPE_CHECKING without importing typing (about 2 ms of every start of the command line; the
# annotations are never evaluated): type checkers take the name as True.
TYPE_CHECKING = False
if TYPE_CHECKING:
    from typing import Any

DEFAULT_T: float = 293.15
MODES: tuple[str, ...] = ("sample_first", "reference_first")

_IDEAL = get_gas("ideal")


class VolumeError(ValueError):
    """Inputs that cannot come from a gas expansion (pressure order, non-positive volumes...)."""


def resolve_temperatures(t1: float | None, t2: float | None, ta: float | None) -> tuple[float, float, float]:
    """Fill missing temperatures: first given of (t1, t2, ta), else 293.15 K."""
    given = [t for t in (t1, t2, ta) if t is not None]
    fill = given[0] if given else DEFAULT_T
    out = tuple(fill if t is None else float(t) for t in (t1, t2, ta))
    for t in out:
        if not (math.isfinite(t) and t > 0.0):
            raise VolumeError(f"temperature must be a positive number of kelvin, got {t!r}")
    return out  # type: ignore[return-value]


def _check_mode(mode: str) -> None:
    if mode not in MODES:
        raise VolumeError(f"unknown mode {mode!r}; choose one of: {', '.join(MODES)}")


def _check_pressures(p1: float, p2: float, pa: float) -> None:
    for name, p in (("p1", p1), ("p2", p2), ("pa", pa)):
        if not (math.isfinite(p) and p > 0.0):
            raise VolumeError(f"{name} must be a positive absolute pressure in Pa, got {p!r}")
    lo, hi = min(p1, pa), max(p1, pa)
    if not (lo < p2 < hi):
        raise VolumeError(
            f"p2 = {p2:.6g} Pa is not strictly between ambient {pa:.6g} Pa and p1 = {p1:.6g} Pa"
        )


def _check_positive(**vols: float) -> None:
    for name, v in vols.items():
        if not (math.isfinite(v) and v > 0.0):
            raise VolumeError(f"{name} must be a positive volume, got {v!r} m^3")


def expansion_ratio(
    p1: float,
    p2: float,
    pa: float,
    *,
    gas: Gas | str = _IDEAL,
    t1: float | None = None,
    t2: float | None = None,
    ta: float | None = None,
    mode: str = "sample_first",
) -> float:
    """The dimensionless y = Vg/Vr implied by the pressures (linear in Vs: Vs = Vc - Vr y).

    Ideal gas, one temperature: y = P2g/(P1g - P2g) (sample_first), (P1g - P2g)/P2g (reference_first).
    """
    _check_mode(mode)
    _check_pressures(p1, p2, pa)
    g = get_gas(gas)
    t1_, t2_, ta_ = resolve_temperatures(t1, t2, ta)
    r1 = g.molar_density(p1, t1_)
    r2 = g.molar_density(p2, t2_)
    ra = g.molar_density(pa, ta_)
    if mode == "sample_first":
        num, den = r2 - ra, r1 - r2
    else:
        num, den = r1 - r2, r2 - ra
    if den == 0.0:
        raise VolumeError("final state has the same gas density as the charged one; no expansion seen")
    return num / den


def gas_volume(p1: float, p2: float, pa: float, vr: float, **kw: Any) -> float:
    """Gas volume Vg of the cell side (m^3) from the pressures and the expansion volume."""
    _check_positive(vr=vr)
    return vr * expansion_ratio(p1, p2, pa, **kw)


def sample_volume(
    p1: float,
    p2: float,
    pa: float,
    vc: float,
    vr: float,
    *,
    gas: Gas | str = _IDEAL,
    t1: float | None = None,
    t2: float | None = None,
    ta: float | None = None,
    mode: str = "sample_first",
) -> float:
    """Sample (skeletal) volume Vs = Vc - Vr y, m^3.

    Raises VolumeError for impossible inputs (p2 outside (pa, p1), non-positive volumes or
    pressures).  A result outside (0, Vc] is returned as is; the caller decides what it means
    (a wrong calibration, a leak, a sample larger than the cell).
    """
    _check_positive(vc=vc, vr=vr)
    y = expansion_ratio(p1, p2, pa, gas=gas, t1=t1, t2=t2, ta=ta, mode=mode)
    return vc - vr * y


def sample_volume_ideal(p1: float, p2: float, pa: float, vc: float, vr: float, *,
                        mode: str = "sample_first") -> float:
    """Textbook isothermal ideal-gas form, written out (used to show the size of the corrections)."""
    _check_positive(vc=vc, vr=vr)
    _check_mode(mode)
    _check_pressures(p1, p2, pa)
    p1g, p2g = p1 - pa, p2 - pa
    if mode == "sample_first":
        return vc - vr / (p1g / p2g - 1.0)
    return vc - vr * (p1g - p2g) / p2g


def gauge_ratio(p1g: float, p2g: float) -> float:
    """r = P1g/P2g, the quantity the two-run (empty cell + sphere) calibration works with."""
    if p2g == 0.0:
        raise VolumeError("p2 gauge is zero: no expansion seen")
    return p1g / p2g


def _pressure_for_density(gas: Gas, rho: float, t: float) -> float:
    """Invert rho = P/(Z(P,T) R T) by fixed-point iteration (dZ/dP is ~1e-9 /Pa, so it contracts fast)."""
    p = rho * R * t
    for _ in range(100):
        p_new = rho * R * t * gas.Z(p, t)
        if abs(p_new - p) <= 1e-14 * p_new:
            return p_new
        p = p_new
    return p


def expansion_pressure(
    vs: float,
    p1: float,
    pa: float,
    vc: float,
    vr: float,
    *,
    gas: Gas | str = _IDEAL,
    t1: float | None = None,
    t2: float | None = None,
    ta: float | None = None,
    mode: str = "sample_first",
) -> float:
    """Absolute P2 (Pa) that a sample of volume ``vs`` produces: the mass balance solved for P2.

    Inverse of :func:`sample_volume` for the same gas model and temperatures.
    """
    _check_mode(mode)
    _check_positive(vc=vc, vr=vr)
    if not (math.isfinite(vs) and 0.0 <= vs < vc):
        raise VolumeError(f"sample volume must lie in [0, Vc), got {vs!r} m^3 with Vc = {vc!r} m^3")
    for name, p in (("p1", p1), ("pa", pa)):
        if not (math.isfinite(p) and p > 0.0):
            raise VolumeError(f"{name} must be a positive absolute pressure in Pa, got {p!r}")
    g = get_gas(gas)
    t1_, t2_, ta_ = resolve_temperatures(t1, t2, ta)
    vg = vc - vs
    v_charged, v_ambient = (vg, vr) if mode == "sample_first" else (vr, vg)
    n = v_charged * g.molar_density(p1, t1_) + v_ambient * g.molar_density(pa, ta_)
    return _pressure_for_density(g, n / (vg + vr), t2_)
