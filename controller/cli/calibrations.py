"""pycnoctl calibrations: the chamber calibrations on record, and which one a run computes with.

Every calibration is bound to the instrument it was made on (its identity: the config's
instrument_id or name; a simulated build adds a digest of its gas path), to an expansion volume and
to a gas.  A measurement uses, for its instrument, volume and gas, the calibration the operator
selected, else the newest one not retired; a calibration of another instrument is never used.

  list      the calibrations (of one instrument with --instrument/--sim; * marks the one in use)
  show ID   one calibration in full: volumes, covariance, spheres, residuals, where it was made
  select ID make ID the one in use for its instrument and volume (--gas: for another gas, with a
            warning on every run); binds a calibration made before instruments had identities
  retire ID take it out of use for good (it stays on record, and so do the runs that used it)
  import    record volumes determined elsewhere (water filling, a reference laboratory) with their
            standard uncertainties, which are required

Volumes in cm3, uncertainties standard (k = 1).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import TYPE_CHECKING, Any

from pycnoctl.controller.cli.common import add_data_arg, note_arg, plain_arg
from pycnoctl.controller.cli.display import add_output_args
from pycnoctl.controller.cli.main import UsageError

if TYPE_CHECKING:
    from pycnoctl.controller.domain.gaspath import Chambers

CSV_COLUMNS = ["id", "in_use", "created", "instrument", "expansion_volume", "gas", "source", "vc_cm3", "u_vc_cm3",
               "vr_cm3", "u_vr_cm3", "operator", "retired"]


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("calibrations", help="list, show, select, retire or import chamber calibrations",
                       description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    act = p.add_subparsers(dest="action", metavar="ACTION", required=True,
                           help="list, show, select, retire or import (pycnoctl calibrations ACTION --help)")

    ls = act.add_parser("list", help="the calibrations on record (one instrument's with --instrument/--sim)",
                        description="The calibrations on record, newest first; with --instrument or --sim only "
                                    "that instrument's, * marking the one a run would use.")
    _instrument_args(ls, required=False)
    ls.add_argument("--all", action="store_true", help="include retired calibrations")
    add_data_arg(ls)
    add_output_args(ls, what="the calibrations")

    sh = act.add_parser("show", help="one calibration in full", description="One calibration in full.")
    sh.add_argument("id", help="calibration ID (C...)")
    add_data_arg(sh)
    sh.add_argument("--json", action="store_true", help="print the stored record as JSON")

    se = act.add_parser("select", help="make a calibration the one in use for its instrument and volume",
                        description="Make ID the calibration runs on this instrument compute with, for its "
                                    "expansion volume (and its gas, or --gas), until another is selected or it is "
                                    "retired.")
    se.add_argument("id", help="calibration ID (C...)")
    _instrument_args(se, required=True)
    se.add_argument("--gas", help="use it for runs in this gas too (each such run warns that the gases differ)")
    add_data_arg(se)

    rt = act.add_parser("retire", help="take a calibration out of use for good",
                        description="Take ID out of use; it stays on record with the reason.")
    rt.add_argument("id", help="calibration ID (C...)")
    rt.add_argument("--reason", required=True, type=_said, help="why, for the record (e.g. 'expansion valve replaced')")
    add_data_arg(rt)

    im = act.add_parser("import", help="record volumes determined elsewhere, with their uncertainties",
                        description="Record the cell and expansion volumes of this instrument as determined "
                                    "elsewhere; both standard uncertainties are required.")
    _instrument_args(im, required=True)
    im.add_argument("--expansion-volume", required=True, metavar="NAME", help="which expansion volume")
    im.add_argument("--gas", help="the gas runs will use (default: the instrument's)")
    im.add_argument("--cell-volume", required=True, metavar="VOLUME", help="cell volume Vc, e.g. '12.034 cm3'")
    im.add_argument("--u-cell-volume", required=True, metavar="VOLUME", help="its standard uncertainty (k = 1)")
    im.add_argument("--volume", required=True, metavar="VOLUME", help="expansion volume Vr, e.g. '8.012 cm3'")
    im.add_argument("--u-volume", required=True, metavar="VOLUME", help="its standard uncertainty (k = 1)")
    im.add_argument("--correlation", type=float, default=0.0, metavar="R",
                    help="correlation of the two errors, from -1 to 1 (default 0)")
    im.add_argument("--operator", default="", type=plain_arg, help="who recorded it")
    im.add_argument("--note", required=True, type=_note, help="how the volumes were determined, for the record")
    im.add_argument("--far-from-nominal", action="store_true",
                    help="record volumes far from the config's nominal ones (a rebuilt chamber; update the "
                         "config's nominal volumes too)")
    add_data_arg(im)
    p.set_defaults(func=main)


def _said(text: str) -> str:
    """An argparse type for a required free text (--reason, --note): one of blanks only is no answer."""
    if not text.strip():
        raise argparse.ArgumentTypeError("must not be blank: say it, for the record")
    return text


def _note(text: str) -> str:
    return _said(note_arg(text))


def _gas(flag: str, name: str) -> str:
    """The gas by the name the project gives it ('He' is 'helium'), or bad input: a calibration is
    found by its gas name, so one stored as 'He' or 'xenon' was never used by any run."""
    from pycnoctl.controller.domain.gas import UnknownGas, get_gas

    try:
        return get_gas(name).name
    except UnknownGas as exc:
        raise UsageError(f"{flag}: {exc}") from None


def _instrument_args(p: argparse.ArgumentParser, *, required: bool) -> None:
    g = p.add_mutually_exclusive_group(required=required)
    g.add_argument("--instrument", metavar="CONFIG", help="the instrument config (no device is opened)")
    g.add_argument("--sim", nargs="?", const="", metavar="SIMCONFIG",
                   help="the simulated instrument (its clean default without a file)")


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir
    from pycnoctl.controller.record.catalog import Catalog, CatalogError

    root = data_dir(args.data)
    path = root / "catalog.sqlite"
    if args.action in ("list", "show") and not path.exists():
        raise UsageError(f"no catalog at {path} (set --data or PYCNOCTL_DATA)")
    if args.action not in ("list", "show"):
        root.mkdir(parents=True, exist_ok=True)
    catalog = Catalog.for_reading(path) if args.action in ("list", "show") else Catalog(path)
    try:
        return int(ACTIONS[args.action](args, catalog))
    except CatalogError as exc:
        raise UsageError(str(exc)) from None
    finally:
        catalog.close()


# ------------------------------------------------------------------------------------------ identity
class Identity:
    """Who an instrument is, read from its config without opening any device."""

    def __init__(self, identity: str, fingerprint: str, gas: str, volumes: list[str],
                 chambers: Chambers | None = None) -> None:
        self.identity, self.fingerprint, self.gas, self.volumes = identity, fingerprint, gas, volumes
        self.chambers = chambers  # the config's nominal volumes (None: not known)


def identify(args: argparse.Namespace) -> Identity | None:
    if getattr(args, "sim", None) is not None:
        from pycnoctl.drivers.simulated import build_sim_instrument

        try:
            inst = build_sim_instrument(args.sim or None)
        except FileNotFoundError as exc:
            raise UsageError(str(exc)) from None
        return Identity(inst.identity, inst.fingerprint, inst.gas, list(inst.roles.expansion), inst.chambers)
    if not getattr(args, "instrument", None):
        return None
    from pycnoctl.drivers.config import build_instrument, load_instrument_config
    from pycnoctl.drivers.instrument import fingerprint
    from pycnoctl.drivers.simulated import SimDevice

    try:
        cfg = load_instrument_config(args.instrument)
    except FileNotFoundError as exc:
        raise UsageError(str(exc)) from None
    if isinstance(cfg.pressure, SimDevice):  # a simulated build: the simulator says who it is
        inst = build_instrument(cfg)
        try:
            return Identity(inst.identity, inst.fingerprint, inst.gas, list(inst.roles.expansion), inst.chambers)
        finally:
            inst.close()
    if cfg.chambers is None or cfg.valve_roles is None:
        raise UsageError(f"{args.instrument}: chambers and valve_roles are needed to identify the instrument")
    return Identity(cfg.instrument_id or cfg.name, fingerprint(cfg.chambers, cfg.valve_roles, cfg.pressure_is_gauge),
                    cfg.gas, list(cfg.valve_roles.expansion), cfg.chambers)


# ------------------------------------------------------------------------------------------ actions
def _row(rec: Any, in_use: bool) -> dict[str, Any]:
    cov = rec.cov or [[0.0, 0.0], [0.0, 0.0]]
    return {"id": rec.id, "in_use": in_use, "created": rec.created, "instrument": rec.instrument,
            "expansion_volume": rec.expansion_volume, "gas": rec.gas, "source": rec.source or "spheres",
            "vc_cm3": rec.vc * 1e6, "u_vc_cm3": math.sqrt(max(cov[0][0], 0.0)) * 1e6,
            "vr_cm3": rec.vr * 1e6, "u_vr_cm3": math.sqrt(max(cov[1][1], 0.0)) * 1e6,
            "operator": rec.operator, "retired": rec.retired}


def _list(args: argparse.Namespace, catalog: Any) -> int:
    who = identify(args)
    recs = catalog.list_calibrations(instrument=who.identity if who else None, include_retired=args.all)
    in_use: set[str] = set()
    if who is not None:
        for vol in who.volumes:
            for gas in {r.gas for r in recs} | {who.gas}:
                cur = catalog.latest_calibration(vol, gas, who.identity)
                if cur is not None:
                    in_use.add(cur.id)
    rows = [_row(r, r.id in in_use) for r in recs]
    if args.json:
        print(json.dumps(rows, indent=2))
        return 0
    if args.csv:
        from pycnoctl.controller.cli.display import write_csv

        write_csv(rows, CSV_COLUMNS, sys.stdout)
        return 0
    from pycnoctl.controller.cli.display import NAME_FOLD, Column, console, print_table

    con = console()
    if not rows:
        con.print("no calibrations on record" + (f" for instrument {who.identity}" if who else ""), markup=False)
        return 0
    cols = [Column("id"), Column("use"), Column("created", priority=2),
            Column("instrument", priority=3, fold=NAME_FOLD), Column("volume"), Column("gas", priority=1),
            Column("source", priority=4, fold=NAME_FOLD), Column("Vc / cm3", True),
            Column("u(Vc)", True, 1), Column("Vr / cm3", True), Column("u(Vr)", True, 1),
            Column("retired", priority=5, wrap=True)]
    table = [[r["id"], "*" if r["in_use"] else "", str(r["created"])[:16], r["instrument"] or "(unbound)",
              r["expansion_volume"], r["gas"], r["source"], f"{r['vc_cm3']:.5f}", f"{r['u_vc_cm3']:.5f}",
              f"{r['vr_cm3']:.5f}", f"{r['u_vr_cm3']:.5f}", r["retired"] or ""] for r in rows]
    print_table(cols, table, title="calibrations", con=con)
    con.print("u: standard uncertainty (k = 1)" + ("; * the calibration a run on this instrument uses"
                                                   if who else ""), markup=False)
    if any(r["instrument"] is None for r in rows):
        con.print("(unbound): made before instruments had identities; never used until selected for one "
                  "(pycnoctl calibrations select ID --instrument CONFIG)", markup=False)
    return 0


def _show(args: argparse.Namespace, catalog: Any) -> int:
    import dataclasses

    rec = catalog.get_calibration(args.id)
    if rec is None:
        raise UsageError(f"no calibration {args.id}")
    if args.json:
        print(json.dumps(dataclasses.asdict(rec), indent=2))
        return 0
    r = _row(rec, False)
    cov = rec.cov or [[0.0, 0.0], [0.0, 0.0]]
    corr = cov[0][1] / math.sqrt(cov[0][0] * cov[1][1]) if cov[0][0] > 0 and cov[1][1] > 0 else 0.0
    payload = rec.payload or {}
    lines = [f"calibration {rec.id} of {rec.created}", f"instrument: {rec.instrument or '(unbound)'}"
             + (f" (config {rec.fingerprint})" if rec.fingerprint else ""),
             f"expansion volume {rec.expansion_volume!r} in {rec.gas}; source: {r['source']}",
             f"Vc = {r['vc_cm3']:.5f} cm3, u = {r['u_vc_cm3']:.5f} cm3 (k = 1)",
             f"Vr = {r['vr_cm3']:.5f} cm3, u = {r['u_vr_cm3']:.5f} cm3 (k = 1); correlation {corr:+.4f}"]
    if payload.get("chi2") is not None:
        lines.append(f"residual test: chi-square {payload['chi2']:.3g} on {payload.get('dof')} degrees of freedom "
                     f"({payload.get('residual_test', 'passed')})")
    if rec.fill_pressure:
        lines.append(f"fill pressure {rec.fill_pressure / 1e5:.4f} bar (gauge), gas {rec.temperature - 273.15:.2f} degC"
                     if rec.temperature else f"fill pressure {rec.fill_pressure / 1e5:.4f} bar (gauge)")
    for s in rec.spheres or []:
        lines.append(_sphere_line(s))
    if payload.get("note"):
        lines.append(f"note: {payload['note']}")
    if rec.operator:
        lines.append(f"operator: {rec.operator}")
    if rec.retired:
        lines.append(f"RETIRED {rec.retired}")
    print("\n".join(lines))
    return 0


def _sphere_line(s: Any) -> str:
    """One insert of the calibration as a person reads it (was the stored dict, in m^3)."""
    if not isinstance(s, dict):
        return f"insert: {s}"
    label = s.get("label") or "sphere"
    volume, u = s.get("volume"), s.get("u_volume")
    if not isinstance(volume, int | float) or volume == 0:
        return f"{label}: nothing in the cell"
    text = f"{label}: {volume * 1e6:.5f} cm3"
    if isinstance(u, int | float):
        text += f", u = {u * 1e6:.5f} cm3 (k = 1)"
    return text + (f"; certificate '{s['spec']}'" if s.get("spec") else "")


def _select(args: argparse.Namespace, catalog: Any) -> int:
    who = identify(args)
    assert who is not None  # the group is required
    rec = catalog.get_calibration(args.id)
    if rec is None:
        raise UsageError(f"no calibration {args.id}")
    if rec.expansion_volume not in who.volumes:
        raise UsageError(f"calibration {rec.id} is of expansion volume {rec.expansion_volume!r}; instrument "
                         f"{who.identity} has {', '.join(who.volumes)}")
    gas = _gas("--gas", args.gas) if args.gas else None
    catalog.choose_calibration(rec.id, who.identity, gas=gas)
    print(f"calibration {rec.id} is in use for {rec.expansion_volume!r} in {gas or rec.gas} on {who.identity}")
    return 0


def _retire(args: argparse.Namespace, catalog: Any) -> int:
    catalog.retire_calibration(args.id, args.reason)
    print(f"calibration {args.id} retired: {args.reason}")
    return 0


#: how far an imported volume may lie from the config's nominal one without --far-from-nominal: this many of
#: the config's stated uncertainties of its nominal volumes, and never less than NOMINAL_FLOOR; half the
#: volume where the config states none (a drawing's volume is rarely 2 % off; a unit slip is 1e6 off)
NOMINAL_SIGMAS = 5.0
NOMINAL_FLOOR = 0.02
NOMINAL_UNSTATED = 0.5


def far_from_nominal(volume: float, nominal: float | None, nominal_u: float | None) -> str | None:
    """Why an imported volume is too far from the config's nominal one to be this chamber's, or None.

    Found by a sweep: '12 m^3' for the cell was stored and the next run stated 11999993 cm3 for a 5 cm3
    specimen; 13.2 cm3 for a 12 cm3 cell (stated to 0.5 %) gave 6.2 cm3 for 5, with no word."""
    if nominal is None or not nominal > 0:
        return None
    allowed = max(NOMINAL_SIGMAS * nominal_u, NOMINAL_FLOOR) if nominal_u else NOMINAL_UNSTATED
    off = volume / nominal - 1.0
    if abs(off) <= allowed:
        return None
    stated = (f"{NOMINAL_SIGMAS:g} times the {100 * nominal_u:g} % it states for its nominal volumes"
              if nominal_u else f"{100 * NOMINAL_UNSTATED:g} % (it states no uncertainty for its nominal volumes)")
    return (f"{volume * 1e6:.6g} cm3 lies {100 * off:+.3g} % from the instrument config's {nominal * 1e6:.6g} cm3, "
            f"more than {stated}: a unit slip, or another instrument's volume? If the chamber was rebuilt, "
            "update the config's nominal volume, or pass --far-from-nominal")


def _import(args: argparse.Namespace, catalog: Any) -> int:
    from pycnoctl.controller.domain.units import UnitError, parse_volume
    from pycnoctl.controller.record.catalog import CalibrationRecord

    who = identify(args)
    assert who is not None
    if args.expansion_volume not in who.volumes:
        raise UsageError(f"--expansion-volume: instrument {who.identity} has {', '.join(who.volumes)}")
    values: dict[str, float] = {}
    for key in ("cell_volume", "u_cell_volume", "volume", "u_volume"):
        try:
            values[key] = parse_volume(getattr(args, key))
        except (UnitError, ValueError) as exc:
            raise UsageError(f"--{key.replace('_', '-')}: {exc}") from None
        if not (math.isfinite(values[key]) and values[key] > 0):
            raise UsageError(f"--{key.replace('_', '-')}: must be a positive volume" + (
                " (an uncertainty of zero is never true)" if key.startswith("u_") else ""))
    for v, u in (("cell_volume", "u_cell_volume"), ("volume", "u_volume")):
        if values[u] >= 0.5 * values[v]:
            raise UsageError(f"--{u.replace('_', '-')}: {values[u] * 1e6:g} cm3 is not an uncertainty of a "
                             f"{values[v] * 1e6:g} cm3 volume")
    if not -1.0 < args.correlation < 1.0:
        raise UsageError("--correlation: must lie strictly between -1 and 1")
    if who.chambers is not None and not args.far_from_nominal:
        for key, nominal in (("cell_volume", who.chambers.cell),
                             ("volume", who.chambers.expansion.get(args.expansion_volume))):
            far = far_from_nominal(values[key], nominal, who.chambers.nominal_u)
            if far is not None:
                raise UsageError(f"--{key.replace('_', '-')}: {far}")
    gas = _gas("--gas", args.gas) if args.gas else who.gas
    uc, ur = values["u_cell_volume"], values["u_volume"]
    cov = [[uc * uc, args.correlation * uc * ur], [args.correlation * uc * ur, ur * ur]]
    cid = catalog.put_calibration(CalibrationRecord(
        expansion_volume=args.expansion_volume, gas=gas, vc=values["cell_volume"], vr=values["volume"],
        operator=args.operator or None, cov=cov, payload={"note": args.note, "method": "imported"},
        instrument=who.identity, fingerprint=who.fingerprint, source="imported"))
    print(f"calibration {cid} imported for {args.expansion_volume!r} in {gas} on {who.identity}")
    return 0


ACTIONS = {"list": _list, "show": _show, "select": _select, "retire": _retire, "import": _import}
