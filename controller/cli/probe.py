"""pycnoctl probe: open every device of an instrument and say how each one answers.

The first thing to run on a new build: it reads each sensor N times and reports the mean,
the noise (standard deviation) and the latency of one exchange, and the valve bank's read-back.
It switches no valve unless asked (--exercise-valves); then it walks each valve with the inlet
held closed - the probe never opens the inlet - and puts the instrument in the safe state at the
end, also when something fails on the way.
"""

from __future__ import annotations

import argparse
import json
import math
import statistics
import sys
import time
from collections import Counter
from typing import Any

from pycnoctl.controller.domain.devices import DeviceError, ForbiddenValveState
from pycnoctl.drivers.guarded import safe_state
from pycnoctl.drivers.instrument import Instrument


def add_parser(subparsers: Any) -> None:
    p = subparsers.add_parser("probe", help="open every device of an instrument and report how it answers",
                              description=__doc__.split("\n\n")[0])
    p.add_argument("--instrument", required=True, metavar="CONFIG", help="instrument config (YAML)")
    p.add_argument("-n", "--count", type=int, default=10, help="reads per sensor (default 10)")
    p.add_argument("--exercise-valves", action="store_true",
                   help="switch each valve once (inlet kept closed), then assert the safe state")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=run)


def probe_sensor(inst: Instrument, sensor: Any, count: int) -> dict[str, Any]:
    """Read `count` times, one sample period apart on the instrument clock."""
    values: list[float] = []
    latencies: list[float] = []
    reasons: Counter[str] = Counter()
    unit = ""
    for i in range(count):
        t0 = time.perf_counter()
        r = sensor.read()
        latencies.append(time.perf_counter() - t0)
        unit = r.unit
        if r.valid:
            values.append(r.value)
        else:
            reasons[r.validity.value] += 1
        if i + 1 < count:
            inst.clock.sleep(inst.sample_period)
    return {
        "name": getattr(sensor, "name", type(sensor).__name__),
        "driver": type(sensor).__name__,
        "unit": unit,
        "reads": count,
        "valid": len(values),
        "invalid": dict(reasons),
        "mean": statistics.fmean(values) if values else None,
        "sd": statistics.stdev(values) if len(values) > 1 else None,
        "latency_mean_ms": 1e3 * statistics.fmean(latencies),
        "latency_max_ms": 1e3 * max(latencies),
    }


def probe_valves(inst: Instrument, exercise: bool) -> dict[str, Any]:
    bank = inst.valves
    out: dict[str, Any] = {"driver": type(getattr(bank, "inner", bank)).__name__,
                           "valves": list(bank.valve_names), "commanded": bank.commanded()}
    t0 = time.perf_counter()
    try:
        seen = bank.read_back()
        out["read_back"] = seen
        out["read_back_ms"] = 1e3 * (time.perf_counter() - t0) if seen is not None else None
    except DeviceError as exc:
        out["read_back"] = None
        out["error"] = str(exc)
    if exercise:
        out["exercise"] = exercise_valves(inst)
    return out


def exercise_valves(inst: Instrument) -> list[dict[str, Any]]:
    """Toggle every valve but the inlet away from the safe state and back; safe state at the end."""
    roles = inst.roles
    steps: list[dict[str, Any]] = []
    try:
        safe = safe_state(inst.valves, roles)
        steps.append({"step": "safe state", "ok": True, "read_back": safe})
        for valve in inst.valves.valve_names:
            if valve == roles.inlet:
                steps.append({"valve": valve, "skipped": "the probe never opens the inlet"})
                continue
            target = not roles.safe_state().get(valve, False)
            step: dict[str, Any] = {"valve": valve, "to": "open" if target else "closed"}
            try:
                t0 = time.perf_counter()
                inst.valves.set_valves({roles.inlet: False, valve: target})
                step["ms"] = round(1e3 * (time.perf_counter() - t0), 3)
                seen = inst.valves.read_back()
                step["read_back"] = None if seen is None else seen.get(valve)
                inst.valves.set_valves({valve: not target})
                step["ok"] = True
            except ForbiddenValveState as exc:
                step.update(ok=False, refused=str(exc))
            except DeviceError as exc:  # stop walking; the safe state below still runs
                step.update(ok=False, error=str(exc))
                steps.append(step)
                break
            steps.append(step)
    finally:
        try:
            final = safe_state(inst.valves, roles)
            steps.append({"step": "safe state", "ok": True, "read_back": final})
        except DeviceError as exc:
            steps.append({"step": "safe state", "ok": False, "error": str(exc)})
    return steps


def probe(inst: Instrument, count: int = 10, exercise: bool = False) -> dict[str, Any]:
    report: dict[str, Any] = {"instrument": inst.name, "sensors": {}}
    report["valves"] = probe_valves(inst, exercise)
    for role in ("pressure", "thermometer", "barometer"):
        dev = getattr(inst, role)
        if dev is not None:
            report["sensors"][role] = probe_sensor(inst, dev, count)
    return report


def _fmt(x: float | None, scale: float = 1.0, digits: int = 6) -> str:
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{x * scale:.{digits}g}"


def render(report: dict[str, Any]) -> str:
    lines = [f"instrument {report['instrument']}"]
    v = report["valves"]
    lines.append(f"valves ({v['driver']}): {', '.join(v['valves'])}")
    lines.append(f"  commanded: {v['commanded']}")
    rb = v.get("read_back")
    lines.append(f"  read-back: {rb if rb is not None else 'not supported'}"
                 + (f" ({v['read_back_ms']:.2f} ms)" if v.get("read_back_ms") else ""))
    if "error" in v:
        lines.append(f"  ERROR: {v['error']}")
    for step in v.get("exercise", []):
        lines.append(f"  {step}")
    lines.append(f"{'role':<12}{'driver':<22}{'valid':>7}{'mean':>14}{'sd':>12}{'unit':>5}"
                 f"{'lat ms':>9}{'max ms':>9}  invalid")
    for role, s in report["sensors"].items():
        lines.append(f"{role:<12}{s['driver']:<22}{s['valid']:>4}/{s['reads']:<2}{_fmt(s['mean']):>14}"
                     f"{_fmt(s['sd'], digits=3):>12}{s['unit']:>5}{s['latency_mean_ms']:>9.3f}"
                     f"{s['latency_max_ms']:>9.3f}  {s['invalid'] or ''}")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    from pycnoctl.controller.cli.main import UsageError
    from pycnoctl.controller.domain.yamlio import ConfigError
    from pycnoctl.drivers.config import build_instrument, load_instrument_config

    if args.count < 1:
        raise UsageError("--count must be at least 1")
    try:
        cfg = load_instrument_config(args.instrument)
    except ConfigError as exc:
        print(exc, file=sys.stderr)
        return 2
    try:
        inst = build_instrument(cfg)
    except (DeviceError, ValueError) as exc:
        print(f"pycnoctl probe: cannot open the instrument: {exc}", file=sys.stderr)
        return 1
    try:
        report = probe(inst, args.count, args.exercise_valves)
    finally:
        inst.close()
    print(json.dumps(report, indent=2, default=str) if args.json else render(report))
    failed = any(s.get("ok") is False for s in report["valves"].get("exercise", []))
    failed |= "error" in report["valves"]
    failed |= any(s["valid"] == 0 for s in report["sensors"].values())
    return 1 if failed else 0
