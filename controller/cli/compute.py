"""pycnoctl compute: the offline calculator - sample volume, its budget and density from typed values.

Why: checks a hand reading or a reported run without the daemon or any hardware, using the same
equations and budget as the engine.

Units: every value may carry a unit ('10 cm^3', '241.325 kPa', '25 degC', '1.4 bar').  Bare numbers:
volumes cm^3, pressures (and --u-p, --u-ambient) bar, temperatures degC, --u-temperature K, masses g.
P1 and P2 are gauge pressures (above --ambient), as everywhere in pycnoctl, unless --absolute is
given; a single value may also be tagged, e.g. --p1 '1.4 bar gauge' or --p2 '2.4 bar abs'.
--ambient is always absolute, and must be a lab's air pressure (30-120 kPa); temperatures must be a
lab's (-40 to 80 degC): a bare 1013 (read as bar) or 295 (read as degC) is refused with a hint to give
the unit.
Uncertainties: U is expanded (k = 2 unless --k says otherwise), u standard (k = 1); in --json the
fields named *_u_* are expanded (with the factor in the field k) and *_u_std_* standard.
Exit codes: 0 a result, 2 bad input, 7 a volume no specimen can have (NOT A MEASUREMENT: below zero
or above Vc beyond its U), as `pycnoctl run` says it.
"""

from __future__ import annotations

import argparse
import math
import sys

from pycnoctl.controller.cli.display import Units, add_output_args, add_units_arg, parse_units
from pycnoctl.controller.cli.exactness import exact_volumes, is_exact_volumes
from pycnoctl.controller.cli.main import RawDescriptionHelpFormatter, UsageError
from pycnoctl.controller.domain.gas import GASES, UnknownGas, get_gas
from pycnoctl.controller.domain.units import (
    UnitError,
    lab_pressure_problem,
    lab_temperature_problem,
    parse_mass,
    parse_pressure_spec,
    parse_temperature,
    parse_temperature_difference,
    parse_volume,
)
from pycnoctl.controller.maths.uncertainty import cycle_volume_budget, density, specific_gravity
from pycnoctl.controller.maths.verdict import EXIT_NOT_A_MEASUREMENT, not_a_measurement, outside_cell
from pycnoctl.controller.maths.volume import MODES, VolumeError, sample_volume, sample_volume_ideal

# typing.TYPE_CHECKING without importing typing (3 ms of the command's start; the annotations are
# never evaluated): type checkers take the name as True.
TYPE_CHECKING = False
if TYPE_CHECKING:
    from typing import Any

CM3 = 1e-6
G_CM3 = 1000.0  # kg/m^3 per g/cm^3


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "compute",
        help="compute a sample volume (and density) from pressures, offline",
        description=__doc__.split("\n\n", 1)[1] if __doc__ else None,
        formatter_class=RawDescriptionHelpFormatter,
    )
    p.add_argument("--cell-volume", required=True, help="sample-cell volume Vc (default unit cm^3)")
    p.add_argument("--expansion-volume", required=True, help="expansion volume Vr (default unit cm^3)")
    p.add_argument("--p1", required=True, help="pressure after fill (default unit bar, gauge)")
    p.add_argument("--p2", required=True, help="pressure after expansion (default unit bar, gauge)")
    p.add_argument("--ambient", default="101.325 kPa",
                   help="ambient/baseline absolute pressure [101.325 kPa]")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--absolute", action="store_true", help="--p1 and --p2 are absolute pressures")
    g.add_argument("--gauge", action="store_true",
                   help="--p1 and --p2 are gauge, above --ambient (the default; kept for scripts)")
    p.add_argument("--gas", default="helium", help=f"working gas: {', '.join(GASES)} [helium]")
    p.add_argument("--temperature", default="20 degC", help="gas temperature for all states [20 degC]")
    p.add_argument("--t1", help="temperature of the gas charged to P1 (default --temperature)")
    p.add_argument("--t2", help="temperature after expansion (default --temperature)")
    p.add_argument("--ta", help="temperature of the gas initially at ambient (default --temperature)")
    p.add_argument("--mode", choices=MODES, default="sample_first",
                   help="sample_first: fill the cell, expand into Vr; reference_first: the reverse")
    p.add_argument("--mass", help="sample mass (default unit g) to report density")
    p.add_argument("--water-temperature",
                   help="with --mass: also report specific gravity against water at this temperature")
    p.add_argument("--u-p", default="0", help="standard uncertainty of each P1/P2 reading [0]")
    p.add_argument("--u-ambient", default="0", help="standard uncertainty of the ambient reading [0]")
    p.add_argument("--u-cell-volume", default="0", help="standard uncertainty of Vc [0]")
    p.add_argument("--u-expansion-volume", default="0", help="standard uncertainty of Vr [0]")
    p.add_argument("--u-temperature", default="0", help="standard uncertainty of each temperature, K [0]")
    p.add_argument("--u-mass", default="0", help="standard uncertainty of the mass [0]")
    p.add_argument("--k", default=2.0, type=float, help="coverage factor for expanded uncertainties [2]")
    add_units_arg(p)
    add_output_args(p, what="the result (--csv: the uncertainty budget, one row per input)")
    p.set_defaults(func=run)


def _parse(flag: str, fn, text: Any, *, positive: bool = False, nonneg: bool = False) -> float:
    try:
        value = fn(text)
    except (UnitError, ValueError) as exc:
        raise UsageError(f"{flag}: {exc}") from None
    if positive and not value > 0.0:
        raise UsageError(f"{flag}: must be positive, got {text!r}")
    if nonneg and value < 0.0:
        raise UsageError(f"{flag}: must not be negative, got {text!r}")
    return value


def _pressure(flag: str, text: str, *, gauge_default: bool, ambient: float) -> float:
    try:
        value, tag = parse_pressure_spec(text)
    except UnitError as exc:
        raise UsageError(f"{flag}: {exc}") from None
    gauge = gauge_default if tag is None else tag
    absolute = value + ambient if gauge else value
    if absolute <= 0.0:
        raise UsageError(f"{flag}: absolute pressure must be positive, got {text!r}")
    return absolute


def _pressure_u(flag: str, text: str) -> float:
    return _parse(flag, lambda t: parse_pressure_spec(t)[0], text, nonneg=True)


def compute(args: argparse.Namespace) -> dict[str, Any]:
    """Parse the flags and return the result as a plain dict (SI inside, cm^3 and g/cm^3 out)."""
    vc = _parse("--cell-volume", parse_volume, args.cell_volume, positive=True)
    vr = _parse("--expansion-volume", parse_volume, args.expansion_volume, positive=True)
    try:
        if parse_pressure_spec(args.ambient)[1] is True:  # '1 bar gauge': gauge against what?
            raise UsageError(f"--ambient: {args.ambient!r} is tagged gauge; the ambient pressure is absolute")
    except UnitError:
        pass  # said by _pressure, below
    pa = _pressure("--ambient", args.ambient, gauge_default=False, ambient=0.0)
    if (problem := lab_pressure_problem(args.ambient, pa)) is not None:
        raise UsageError(f"--ambient: {problem}")
    p1 = _pressure("--p1", args.p1, gauge_default=not args.absolute, ambient=pa)
    p2 = _pressure("--p2", args.p2, gauge_default=not args.absolute, ambient=pa)
    try:
        gas = get_gas(args.gas)
    except UnknownGas as exc:
        raise UsageError(f"--gas: {exc}") from None
    t = _parse("--temperature", parse_temperature, args.temperature)
    t1 = _parse("--t1", parse_temperature, args.t1) if args.t1 else t
    t2 = _parse("--t2", parse_temperature, args.t2) if args.t2 else t
    ta = _parse("--ta", parse_temperature, args.ta) if args.ta else t
    for flag, text, kelvin in (("--temperature", args.temperature, t), ("--t1", args.t1, t1), ("--t2", args.t2, t2),
                               ("--ta", args.ta, ta)):
        if text and (problem := lab_temperature_problem(text, kelvin)) is not None:
            raise UsageError(f"{flag}: {problem}")
    u_p = _pressure_u("--u-p", args.u_p)
    u_pa = _pressure_u("--u-ambient", args.u_ambient)
    u_vc = _parse("--u-cell-volume", parse_volume, args.u_cell_volume, nonneg=True)
    u_vr = _parse("--u-expansion-volume", parse_volume, args.u_expansion_volume, nonneg=True)
    u_t = _parse("--u-temperature", parse_temperature_difference, args.u_temperature, nonneg=True)
    if not (math.isfinite(args.k) and args.k > 0):
        raise UsageError(f"--k: must be positive, got {args.k!r}")
    lo, hi = min(pa, p1), max(pa, p1)
    if not lo < p2 < hi:
        raise UsageError(
            f"--p2: {p2 / 1e3:.6g} kPa absolute is not strictly between ambient {pa / 1e3:.6g} kPa "
            f"and P1 {p1 / 1e3:.6g} kPa (P1 and P2 are read as "
            f"{'absolute' if args.absolute else 'gauge; use --absolute for absolute pressures'})"
        )
    try:
        vs = sample_volume(p1, p2, pa, vc, vr, gas=gas, t1=t1, t2=t2, ta=ta, mode=args.mode)
        vs_ideal = sample_volume_ideal(p1, p2, pa, vc, vr, mode=args.mode)
        budget = cycle_volume_budget(p1, p2, pa, vc, vr, u_p1=u_p, u_p2=u_p, u_pa=u_pa, u_vc=u_vc,
                                     u_vr=u_vr, t1=t1, t2=t2, ta=ta, u_t=u_t, gas=gas, mode=args.mode,
                                     k=args.k)
    except VolumeError as exc:
        raise UsageError(str(exc)) from None
    out: dict[str, Any] = {
        "volume_cm3": vs / CM3,
        "volume_u_cm3": budget.expanded / CM3,
        "volume_u_std_cm3": budget.combined / CM3,
        "k": budget.k,
        "ideal_gas_volume_cm3": vs_ideal / CM3,
        "gas": gas.name,
        "mode": args.mode,
        "inputs": {"cell_volume_cm3": vc / CM3, "expansion_volume_cm3": vr / CM3, "p1_pa": p1,
                   "p2_pa": p2, "ambient_pa": pa, "t1_k": t1, "t2_k": t2, "ta_k": ta},
        "budget": [_row(row) for row in budget.as_table()],
        "warnings": [],
    }
    exact = exact_volumes(u_vc, u_vr)
    if exact:  # the budget leaves them out: its U is not the result's
        out["warnings"].append(exact)
    if u_p > 0.1 * abs(p1 - pa):
        out["warnings"].append(
            f"--u-p is {u_p:.6g} Pa, more than 10 % of the fill pressure above ambient; bare numbers are "
            "bar (write e.g. '50 Pa')"
        )
    impossible = outside_cell(vs, budget.expanded, vc)
    out["impossible"] = impossible
    if impossible:  # as `run` says it, and with its exit code
        out["warnings"].append(not_a_measurement(impossible))
    elif not 0.0 < vs <= vc:
        out["warnings"].append(
            f"sample volume {vs / CM3:.6g} cm^3 lies outside (0, Vc = {vc / CM3:.6g} cm^3]: "
            "check the calibration, the pressures and for leaks"
        )
    if args.water_temperature is not None and args.mass is None:
        raise UsageError("--water-temperature: needs --mass")
    if args.mass is not None:
        m = _parse("--mass", parse_mass, args.mass, positive=True)
        u_m = _parse("--u-mass", parse_mass, args.u_mass, nonneg=True)
        if vs <= 0.0:
            if impossible:  # no density of a volume below zero; the verdict says why
                return out
            raise UsageError("--mass: density needs a positive sample volume")
        rho, u_rho = density(vs, budget.combined, m, u_m)
        out.update(density_g_cm3=rho / G_CM3, density_u_g_cm3=budget.k * u_rho / G_CM3,
                   density_u_std_g_cm3=u_rho / G_CM3, mass_g=m * 1e3)
        if args.water_temperature is not None:
            tw = _parse("--water-temperature", parse_temperature, args.water_temperature)
            try:
                sg, u_sg = specific_gravity(rho, u_rho, tw)
            except ValueError as exc:
                raise UsageError(f"--water-temperature: {exc}") from None
            out.update(specific_gravity=sg, specific_gravity_u=budget.k * u_sg, water_temperature_k=tw)
    return out


# budget row kind -> (display unit of the input, factor from SI)
_DISPLAY = {"calibration": ("cm^3", 1e6), "pressure": ("Pa", 1.0), "temperature": ("K", 1.0)}


def _row(row: dict[str, Any]) -> dict[str, Any]:
    """Budget row with SI values kept, plus the input's u in a readable unit and c*u in cm^3."""
    unit, factor = _DISPLAY.get(str(row["kind"]), ("", 1.0))
    if row["name"].startswith("covariance"):
        unit, factor = "cm^6", 1e12
    return {**row, "unit": unit, "value_display": row["value"] * factor,
            "std_u_display": row["std_u"] * factor, "contribution_cm3": row["contribution"] / CM3}


def _text(out: dict[str, Any], units: Units | None = None) -> str:
    units = units or Units()
    k = out["k"]
    lines = [
        f"sample volume   {out['volume_cm3']:.5f} cm^3  +/- {out['volume_u_cm3']:.5f} cm^3 (expanded U, k = {k:g})",
        f"  ideal-gas form {out['ideal_gas_volume_cm3']:.5f} cm^3  (gas: {out['gas']}, mode: {out['mode']})",
    ]
    verdict = not_a_measurement(out["impossible"]) if out.get("impossible") else None
    if verdict:  # right under the number, as `run` shows it
        lines.append(verdict)
    beside = [w for w in out["warnings"] if is_exact_volumes(w)]
    lines += [f"warning: {w}" for w in beside]  # next to the U it concerns, not after the budget
    if "density_g_cm3" in out:
        rho, u_rho = out["density_g_cm3"] * G_CM3, out["density_u_g_cm3"] * G_CM3
        lines.append(f"density         {units.rho(rho)} {units.density} +/- {units.rho(u_rho)} {units.density} "
                     f"(expanded U, k = {k:g})")
    if "specific_gravity" in out:
        lines.append(f"specific gravity {out['specific_gravity']:.5f} +/- {out['specific_gravity_u']:.5f}")
    rows = [r for r in out["budget"] if r["variance"] != 0.0]
    if rows:
        lines.append("budget (standard uncertainties):")
        lines.append(f"  {'input':<24}{'u(input)':>14}{'c*u / cm^3':>14}{'share':>8}")
        for r in rows:
            has_u = r["std_u"] is not None and not math.isnan(r["std_u"])
            u = f"{r['std_u_display']:.4g} {r['unit']}" if has_u else ""
            lines.append(f"  {r['name']:<24}{u:>14}{r['contribution_cm3']:>14.3e}{100 * r['share']:>7.1f}%")
    lines += [f"warning: {w}" for w in out["warnings"] if w != verdict and w not in beside]
    return "\n".join(lines)


BUDGET_CSV = ["name", "kind", "value", "std_u", "unit", "value_display", "std_u_display", "sensitivity",
              "contribution_cm3", "share"]


def run(args: argparse.Namespace) -> int:
    units = parse_units(args.units)
    out = compute(args)
    if args.json:
        print(_dumps(out))
    elif args.csv:
        from pycnoctl.controller.cli.display import write_csv

        write_csv(_clean(out["budget"]), BUDGET_CSV, sys.stdout)
    else:
        print(_text(out, units))
    for w in out["warnings"]:
        if args.json or args.csv:
            print(f"warning: {w}", file=sys.stderr)
    return EXIT_NOT_A_MEASUREMENT if out["impossible"] else 0


def _clean(obj: Any) -> Any:
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_clean(v) for v in obj]
    return obj


def _dumps(out: dict[str, Any]) -> str:
    """Strict JSON: NaN (e.g. the covariance row's u) becomes null."""
    import json  # only --json needs it: imported here to keep it off the command's start

    return json.dumps(_clean(out), allow_nan=False)
