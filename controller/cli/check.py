"""pycnoctl check: prove a sequence sound before it touches hardware.

First the file itself (types, units, ranges, unknown and duplicate keys: every problem as
file:line:col), then against the instrument (names, pressures below the interlock limit), then a
dry run of the whole sequence on the simulator, as fast as the CPU allows, which gives the
expected duration and shows whether the settle rules and time limits hold.  No valve on real
hardware is touched: with --instrument the config is only read, and the dry run uses the
simulator (the config's own when it names one, else the clean default).
Exit codes: 0 sound, 2 problems in a file, 3 the dry run faulted, 7 the dry run's result is not the
simulated specimen's (NOT A MEASUREMENT, or beyond its U from the specimen the simulator holds).
"""

from __future__ import annotations

import argparse
import json
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

from pycnoctl.controller.cli.main import UsageError
from pycnoctl.drivers.instrument import Instrument


def _data_folder(text: str) -> str:
    from pycnoctl.controller.cli.common import data_folder_arg  # not at import: check starts light

    return data_folder_arg(text)


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("check", help="validate a sequence and dry-run it on the simulator",
                       description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("sequence", help="sequence file, or the name of a shipped one")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--instrument", metavar="CONFIG", help="check against this instrument config (read only)")
    g.add_argument("--sim", nargs="?", const="", metavar="SIMCONFIG",
                   help="dry-run on this simulator config (the clean default without a file; the default anyway)")
    p.add_argument("--data", metavar="DIR", type=_data_folder,
                   help="keep the dry run's record in this data folder (read it with pycnoctl show; sample "
                        "'dry-run'); default: a temporary folder, deleted afterwards")
    p.add_argument("--no-dry-run", action="store_true", help="only the static checks")
    p.add_argument("--json", action="store_true", help="print the findings as JSON")
    p.set_defaults(func=main)


def _hardware_facts(cfg: Any) -> tuple[list[str], float]:
    """The expansion volumes and the trip pressure of a config with real devices, read without opening any.
    With simulated valves the config may leave both to its simulator config (found by a sweep: a config of
    simulated valves and a VISA meter failed check with 'max_pressure ... got 0.0', exit 3)."""
    from pycnoctl.drivers.simulated import SimDevice, sim_config_limits

    names = list(cfg.chambers.expansion) if cfg.chambers else []
    max_p = cfg.limits.max_pressure if cfg.limits else None
    if isinstance(cfg.valves, SimDevice) and (max_p is None or not names):
        from pycnoctl.sim.config import DEFAULT_CONFIG, load_sim_config

        found = sim_config_limits(cfg.valves.config)
        if max_p is None and found is not None:
            max_p = found[0].max_pressure
        if not names:
            path = DEFAULT_CONFIG if cfg.valves.config is None else Path(cfg.valves.config)
            names = list(load_sim_config(path).expansion_volumes().values())
    if max_p is None:
        raise UsageError("the instrument config gives no limits (limits.max_pressure): a sequence cannot be "
                         "checked against them")
    return names, max_p


def static_check(seq_ref: str, *, expansion_volumes: list[str], max_pressure: float,
                 gas: str | None, sample_period: float | None = None) -> tuple[Any, list[str]]:
    """Load the sequence and check it against the instrument's names, limits and sample period
    (ConfigError on problems)."""
    from pycnoctl.controller.domain.yamlio import ConfigError
    from pycnoctl.controller.run.sequence import check_against_instrument, load_sequence, resolve_sequence

    seq = load_sequence(resolve_sequence(seq_ref))
    problems, warnings = check_against_instrument(seq, expansion_volumes=expansion_volumes,
                                                  max_pressure=max_pressure, gas=gas, sample_period=sample_period)
    if problems:
        raise ConfigError(problems)
    return seq, warnings


def dry_run(seq_ref: str, make_instrument: Callable[[], Instrument], keep: Path | None = None, *,
            valve_sets: bool = False) -> dict[str, Any]:
    """Run the sequence on a fresh simulated instrument at full speed; the record goes to a temporary
    folder, or to the data folder ``keep`` (under its writer lock, like any run).  valve_sets: also the
    valves it opened together, read back from the record (forbidden_on_hardware)."""
    from pycnoctl.controller.cli.common import lock_data_folder
    from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
    from pycnoctl.controller.record.catalog import Catalog
    from pycnoctl.controller.run.control import Controller

    lock = lock_data_folder(keep, "check") if keep is not None else None
    instrument = make_instrument()
    try:
        prepared = prepare(RunRequest(seq_ref, sample_id="dry-run"), instrument)
        with tempfile.TemporaryDirectory(prefix="pycnoctl-check-") as tmp:
            root = keep if keep is not None else Path(tmp)
            catalog = Catalog(root / "catalog.sqlite")
            try:
                summary = execute(prepared, Controller(instrument), root=root / "runs", catalog=catalog)
            finally:
                catalog.close()
            if valve_sets:
                roles = instrument.roles
                summary["valve_sets"] = _open_together(root / "runs" / summary["run_id"],
                                                       [roles.inlet, roles.vent, *roles.expansion.values()])
        summary["sim_roles"] = instrument.roles
        sim = instrument.extras.get("sim")
        truth = getattr(getattr(getattr(sim, "config", None), "sample", None), "solid_volume", None)
        summary["sim_truth_cm3"] = truth * 1e6 if isinstance(truth, int | float) else None
        return summary
    finally:
        instrument.close()
        if lock is not None:
            lock.release()


def _open_together(folder: Path, valves: list[str]) -> list[tuple[str, frozenset[str]]]:
    """Each distinct (state, these valves open together) the dry run commanded, from its record's trace."""
    from pycnoctl.controller.record.runfolder import load_run

    run = load_run(folder, trace_columns=["state", *(f"valve_{v}" for v in valves)])
    cols = [c for c in run.trace if c.startswith("valve_")]
    seen: dict[tuple[str, frozenset[str]], None] = {}
    for i, state in enumerate(run.trace["state"]):
        opened = frozenset(c.removeprefix("valve_") for c in cols if float(run.trace[c][i]) > 0.5)
        seen.setdefault((str(state), opened), None)
    return list(seen)


def forbidden_on_hardware(summary: dict[str, Any], cfg: Any) -> list[str]:
    """The hardware config's forbidden valve pairs that the sequence's own commands would open together.

    The dry run of a hardware config runs on the built-in simulator, whose valves have other names: each
    set it opened is named again by role (inlet, vent, the expansion volume's valve) in the config.
    Found by a sweep: a pair every run opens (the inlet and the run's expansion valve, in every purge
    pulse) passed check, and the first real purge faulted on it."""
    from pycnoctl.drivers.guarded import violations

    forbidden, hw, sim = cfg.forbidden_sets(), cfg.valve_roles, summary.get("sim_roles")
    if not forbidden or hw is None or sim is None:
        return []
    name = {sim.inlet: hw.inlet, sim.vent: hw.vent}
    name.update({valve: hw.expansion[vol] for vol, valve in sim.expansion.items() if vol in hw.expansion})
    out = []
    for state, opened in summary.get("valve_sets") or []:
        mine = {name[v]: True for v in opened if v in name}
        for combo in violations(mine, forbidden):
            line = f"the sequence opens {' and '.join(sorted(combo))} together ({state}), which forbidden: lists"
            if line not in out:
                out.append(line)
    return out


def _off_the_specimen(summary: dict[str, Any]) -> str | None:
    """Why a completed dry run's volume cannot be the simulated specimen's, or None.

    Found by a sweep: an instrument config whose expansion valves were swapped against its simulator's
    passed check with 'simulated result: 9.1997 cm3' for a 5 cm3 specimen, and one listing an expansion
    valve under 'other' passed with its own dry run saying NOT A MEASUREMENT."""
    v, U, truth = summary.get("volume_cm3"), summary.get("volume_u_cm3"), summary.get("sim_truth_cm3")
    if summary.get("status") != "completed" or v is None or U is None or truth is None or abs(v - truth) <= U:
        return None
    return (f"the dry run measured {v:.4f} cm3 +/- {U:.4f} cm3 where the simulator's specimen is {truth:.4f} cm3: "
            "the instrument's chamber volumes or valve roles disagree with the simulator it runs on")


def _simulated_only(cfg: Any) -> bool:
    from pycnoctl.drivers.config import SimDevice

    return all(d is None or isinstance(d, SimDevice)
               for d in (cfg.valves, cfg.pressure, cfg.thermometer, cfg.barometer))


def _facts(inst: Instrument) -> tuple[list[str], float, str, float]:
    try:
        return list(inst.roles.expansion), inst.limits.max_pressure, inst.gas, inst.sample_period
    finally:
        inst.close()


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.run.sequence import SequenceNotFound, earliest_cycles, estimate_duration
    from pycnoctl.drivers.simulated import build_sim_instrument

    def make() -> Instrument:
        from pycnoctl.controller.cli.common import sim_seed

        return build_sim_instrument(args.sim or None, seed=sim_seed(args))

    factory: Callable[[], Instrument] | None = make
    where = str(args.sim) if args.sim else "built-in clean simulator"
    real_hardware = False
    try:
        if args.instrument:
            from pycnoctl.drivers.config import build_instrument, load_instrument_config

            cfg = load_instrument_config(args.instrument)
            if _simulated_only(cfg):
                def factory() -> Instrument:
                    return build_instrument(cfg)

                where = f"simulator of {args.instrument}"
                names, max_p, gas, period = _facts(factory())
            else:  # real hardware: read the config only, never open a port
                real_hardware = True
                names, max_p = _hardware_facts(cfg)
                gas = cfg.gas
                period = cfg.sample_period
        else:
            names, max_p, gas, period = _facts(make())
        seq, warnings = static_check(args.sequence, expansion_volumes=names, max_pressure=max_p, gas=gas,
                                     sample_period=period)
    except SequenceNotFound as exc:
        raise UsageError(str(exc)) from None
    earliest = earliest_cycles(seq)
    report: dict[str, Any] = {"sequence": seq.name, "file": str(seq.path), "kind": seq.kind, "problems": [],
                              "warnings": warnings, "static_estimate_s": estimate_duration(seq),
                              "static_estimate_earliest_s": estimate_duration(seq, cycles=earliest),
                              "cycles": seq.cycles.count if seq.expands else None,
                              "earliest_cycles": earliest if seq.expands else None}
    if real_hardware:
        sim_names = _facts(make())[0]
        if seq.expands and seq.expand.volume not in ("auto", *sim_names):
            report["warnings"].append(f"dry run skipped: the built-in simulator has no expansion volume "
                                      f"{seq.expand.volume!r}")
            factory = None
    code = 0
    if factory is not None and not args.no_dry_run:
        keep = None
        if args.data:
            from pycnoctl.controller.jobs.measurement import data_dir

            keep = data_dir(args.data)
        summary = dry_run(args.sequence, factory, keep, valve_sets=real_hardware)
        report["dry_run"] = {
            "simulator": where,
            "status": summary["status"], "expected_duration_s": summary["instrument_time_s"],
            "wall_time_s": summary["wall_time_s"], "cycles": len(summary["cycles"]),
            "volume_cm3": summary["volume_cm3"], "volume_u_cm3": summary["volume_u_cm3"],
            "fault": summary["fault"], "warnings": summary["warnings"],
            "record": str(keep / "runs" / summary["run_id"]) if keep is not None else None,
            "not_a_measurement": summary.get("impossible"), "simulated_specimen_cm3": summary.get("sim_truth_cm3"),
        }
        code = 0 if summary["status"] == "completed" else 3
        if real_hardware:
            clash = forbidden_on_hardware(summary, cfg)
            if clash:  # every run would fault there (the guard refuses the command): a fault before any
                report["dry_run"]["forbidden"] = clash
                report["dry_run"]["warnings"] = [*report["dry_run"]["warnings"],
                                                 *(f"{c}: every run would fault there" for c in clash)]
                code = 3
        off = _off_the_specimen(summary)
        if off:  # the simulator knows its specimen: a dry run that misses it says the configs disagree
            report["dry_run"]["warnings"] = [*report["dry_run"]["warnings"], off]
            code = code or 7
        if summary.get("impossible"):
            code = code or 7
    if args.json:
        print(json.dumps(report, indent=2))
    else:
        _print(report)
    return code


def _print(r: dict[str, Any]) -> None:
    print(f"{r['file']}: sequence {r['sequence']!r} ({r['kind']}) is valid")
    for w in r["warnings"]:
        print(f"warning: {w}")
    words = f"static estimate: {_dur(r['static_estimate_s'])}"
    if r["cycles"] is not None:
        words += f" for all {r['cycles']} cycle(s)"
        if r["earliest_cycles"] < r["cycles"]:
            words += (f"; {_dur(r['static_estimate_earliest_s'])} if it stops after {r['earliest_cycles']}, as "
                      "soon as its last cycles can agree")
    print(words)
    d = r.get("dry_run")
    if d:
        print(f"dry run on the {d['simulator']}: {d['status']} after {_dur(d['expected_duration_s'])} of "
              f"instrument time ({d['wall_time_s']:.2f} s wall), {d['cycles']} cycle(s)")
        if d["volume_cm3"] is not None:
            print(f"  simulated result: {d['volume_cm3']:.4f} cm3 +/- {d['volume_u_cm3']:.4f} cm3 (k=2)")
        if d["fault"]:
            print(f"  fault ({d['fault']['kind']}): {d['fault']['message']}")
        for w in d["warnings"]:
            print(f"  warning: {w}")
        print(f"expected duration: {_dur(d['expected_duration_s'])}")
        if d.get("record"):
            print(f"dry-run record: {d['record']}")


def _dur(s: float) -> str:
    m, sec = divmod(round(s), 60)
    return f"{m} min {sec:02d} s" if m else f"{sec} s"
