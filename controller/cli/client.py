"""Verbs that talk to a running pycnoctl serve: submit, status, watch, abort, reset, queue.

They reach the daemon at --url, else $PYCNOCTL_URL, else http://127.0.0.1:8765; the token comes from
--token or $PYCNOCTL_TOKEN.  Exit codes: 0 done, 1 the daemon refused (409, 422 ...), 2 bad input,
6 the daemon cannot be reached.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from typing import Any

from pycnoctl.controller.cli.common import add_sample_args, note_arg
from pycnoctl.controller.cli.display import Units, add_output_args, add_units_arg, parse_units
from pycnoctl.controller.cli.main import UsageError
from pycnoctl.controller.service.client import DEFAULT_URL, DaemonClient, DaemonError

DESCRIPTIONS = {
    "submit": """Queue a run on the daemon.  SEQUENCE is the name of a shipped sequence, or a local file whose
text is sent (the daemon never reads our paths).  The answer gives the run ID and a first estimate of
its duration; follow it with pycnoctl watch, or on the dashboard.""",
    "status": """One look at the daemon and the instrument: what it is doing, the pressure (gauge), the valves,
a latched interlock, the active run with its finished cycles, the queue and the last result.""",
    "watch": """Follow the daemon live: the same view as pycnoctl run (state and phase, pressure with its recent
history, each finished cycle, convergence, progress and wall-clock time left).  When the output is
not a terminal (a pipe, a log file) it prints plain lines instead: one per phase change, finished
cycle, run start and end, and at most one every --every seconds in between.  Ctrl-C leaves the view;
the run goes on.""",
    "abort": """Abort the active run: the instrument goes to the safe state (inlet closed, vent and expansion
valves open), the record up to that moment is kept, and the queue pauses until resumed.""",
    "reset": """Operator reset of a latched interlock, after the cause has been dealt with.  The daemon refuses
it while the condition lasts (the pressure still too high, the gauge still silent); a reset never
restarts a run.""",
    "queue": """List the runs waiting on the daemon, or change the queue: --remove takes a queued run off it,
--pause stops it after the active run, --resume starts it again (after a fault or an abort the queue
pauses by itself).""",
}

EPILOG = """The daemon is at --url, else $PYCNOCTL_URL, else http://127.0.0.1:8765; the token comes from
--token or $PYCNOCTL_TOKEN.  Exit codes: 0 done, 1 the daemon refused, 2 bad input, 6 the daemon
cannot be reached."""

VERBS = ("submit", "status", "watch", "abort", "reset", "queue")


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--url", default=None,
                   help=f"daemon address (default $PYCNOCTL_URL, else {DEFAULT_URL})")
    p.add_argument("--token", help="API token (default $PYCNOCTL_TOKEN)")


def _verb(sub: argparse._SubParsersAction, verb: str) -> argparse.ArgumentParser:
    from pycnoctl.controller.cli.main import VERB_TABLE

    return sub.add_parser(verb, help=VERB_TABLE[verb][1], description=DESCRIPTIONS[verb], epilog=EPILOG,
                          formatter_class=argparse.RawDescriptionHelpFormatter)


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = _verb(sub, "submit")
    p.add_argument("sequence", help="name of a shipped sequence, or a local sequence file whose text is sent")
    add_sample_args(p, u_mass_default=None)  # the daemon takes 0.1 mg when none is sent
    p.add_argument("--note", default="", type=note_arg, help="free text for the record")
    p.add_argument("--json", action="store_true", help="print the daemon's answer as JSON")
    _common(p)
    p.set_defaults(func=submit)

    p = _verb(sub, "status")
    p.add_argument("--json", action="store_true", help="print the full status as JSON")
    add_units_arg(p)
    _common(p)
    p.set_defaults(func=status)

    p = _verb(sub, "watch")
    p.add_argument("--seconds", type=float, help="stop watching after this many seconds (default: until Ctrl-C)")
    p.add_argument("--every", type=float, default=10.0, metavar="SECONDS",
                   help="without a terminal: at most one progress line this often between events (default 10)")
    add_units_arg(p)
    _common(p)
    p.set_defaults(func=watch)

    p = _verb(sub, "abort")
    _common(p)
    p.set_defaults(func=abort)

    p = _verb(sub, "reset")
    _common(p)
    p.set_defaults(func=reset)

    p = _verb(sub, "queue")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--remove", metavar="RUN_ID", help="take a queued run off the queue")
    g.add_argument("--resume", action="store_true", help="resume a paused queue")
    g.add_argument("--pause", action="store_true", help="pause the queue (the active run goes on)")
    add_output_args(p, what="the waiting runs")
    _common(p)
    p.set_defaults(func=queue)


def _client(args: argparse.Namespace) -> DaemonClient:
    return DaemonClient(args.url, args.token)


def _fail(exc: DaemonError) -> int:
    print(f"pycnoctl: {exc}", file=sys.stderr)
    for p in exc.body.get("problems") or []:
        print(p, file=sys.stderr)
    return 6 if exc.status == 0 else 1


def submit(args: argparse.Namespace) -> int:
    from pathlib import Path

    req: dict[str, Any] = {"sample_id": args.sample, "mass": args.mass, "u_mass": args.u_mass,
                           "bulk_volume": args.bulk_volume, "u_bulk_volume": args.u_bulk_volume,
                           "operator": args.operator,
                           "expansion_volume": args.expansion_volume, "note": args.note or None}
    from pycnoctl.controller.domain.units import UnitError, parse_mass, parse_volume

    try:  # read here as `run` reads them: a value that is no quantity is bad input (exit 2), not a refusal
        for text, parse in ((args.mass, parse_mass), (args.u_mass, parse_mass), (args.bulk_volume, parse_volume),
                            (args.u_bulk_volume, parse_volume)):
            if text:
                parse(text)
    except UnitError as exc:
        raise UsageError(f"--mass/--u-mass/--bulk-volume/--u-bulk-volume: {exc}") from None
    path = Path(args.sequence)
    if path.is_file():  # a local file: its text travels, the daemon never sees our path
        try:
            req["sequence_text"] = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise UsageError(f"{path}: {exc}") from None
    elif "/" in args.sequence or "\\" in args.sequence:
        raise UsageError(f"no sequence file {args.sequence!r}")
    else:
        req["sequence"] = args.sequence
    with _client(args) as c:
        try:
            out = c.submit(**req)
        except DaemonError as exc:
            field = exc.body.get("field")
            if exc.status in (400, 422) and field == "sequence":
                if "no shipped sequence" in str(exc):  # neither a file here nor shipped there
                    raise UsageError(f"no sequence file {args.sequence!r}, and the daemon says: {exc}") from None
                raise UsageError(f"{args.sequence}: {exc}") from None  # e.g. a calibration sequence
            if exc.status in (400, 422) and field:  # one value the daemon cannot take: bad input, as for `run`
                raise UsageError(f"--{str(field).replace('_', '-')}: {exc}") from None
            if exc.status == 422 and "sequence_text" in req and exc.body.get("problems"):
                # the local file's problems, each at its line in it: bad input (exit 2), as `run` says them
                print(f"pycnoctl: {exc}", file=sys.stderr)
                for line in exc.body["problems"]:
                    print(str(line).replace("<submitted>", str(path), 1), file=sys.stderr)
                return 2
            return _fail(exc)
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        from pycnoctl.controller.cli.live import duration

        print(f"queued {out['run_id']} ({out['sequence']}, expansion volume {out['expansion_volume']}); "
              f"static estimate {duration(out['expected_s'])} of instrument time, longer while settles are "
              "slow: pycnoctl watch shows the time left from the run's own pace")
        for w in out.get("warnings") or []:
            print(f"warning: {w}")
    return 0


def status_lines(s: dict[str, Any], units: Units | None = None, *, with_run: bool = True) -> list[str]:
    """The status as a few readable lines (shared by status and watch; watch draws the run itself)."""
    units = units or Units()

    def _fmt_p(pa: float | None) -> str:
        return "invalid" if pa is None else f"{units.p(pa)} {units.p_label}"

    lines = []
    inst = s.get("instrument", {})
    lines.append(f"{inst.get('name', '?')} - {s['activity']} (state {s['state']})")
    p = s.get("pressure", {})
    lines.append(f"pressure {_fmt_p(p.get('gauge_pa'))}"
                 + (f", gas {p['temperature_k'] - 273.15:.2f} degC" if p.get("temperature_k") else ""))
    valves = s.get("valves", {})
    lines.append("valves   " + "  ".join(f"{n} {'OPEN' if o else 'closed'}" for n, o in valves.items()))
    il = s.get("interlock", {})
    if il.get("latched"):
        lines.append(f"INTERLOCK LATCHED: {il.get('kind')}: {il.get('message')} (reset when safe)")
    cur = s.get("current_run")
    if cur and with_run:
        lines.append(f"run      {cur['run_id']} {cur['sequence']} sample {cur.get('sample_id') or '-'}: "
                     f"cycle {cur.get('cycle', 0)} of {cur.get('cycles_total', 0)}, "
                     f"{cur.get('elapsed_s', 0):.0f} s in")
        for c in cur.get("cycles") or []:
            if c.get("volume_cm3") is not None:
                lines.append(f"         cycle {c['cycle']}: {c['volume_cm3']:.5f} cm3"
                             f"{'' if c.get('kept') else ' (discarded)'}")
    q = s.get("queue", {})
    lines.append(f"queue    {q.get('length', 0)} waiting" + (f" - PAUSED: {q.get('paused_reason')}"
                                                             if q.get("paused") else ""))
    last = s.get("last_run")
    if last:
        res = ""
        if last.get("volume_cm3") is not None:
            res = f": {last['volume_cm3']:.5f} +/- {last['volume_u_cm3']:.5f} cm3 (k={last.get('k') or 2:g})"
            if last.get("density_g_cm3") is not None:
                res += (f", {units.rho(last['density_g_cm3'] * 1e3)} +/- "
                        f"{units.rho((last.get('density_u_g_cm3') or 0.0) * 1e3)} {units.density}")
        lines.append(f"last     {last['run_id']} {last['status']}{res}"
                     + (f" - {last['message']}" if last.get("message") else ""))
    return lines


def status(args: argparse.Namespace) -> int:
    with _client(args) as c:
        try:
            s = c.status()
        except DaemonError as exc:
            return _fail(exc)
    if args.json:
        print(json.dumps(s, indent=2))
    else:
        print("\n".join(status_lines(s, parse_units(args.units))))
    return 0


def _model_for(cur: dict[str, Any], snap: dict[str, Any], wall: float) -> Any:
    """A live model for the daemon's active run, seeded with what the status already knows."""
    from pycnoctl.controller.cli.live import LiveModel, Plan

    inst = snap.get("instrument") or {}
    model = LiveModel(Plan.from_brief(cur), run_id=str(cur.get("run_id") or ""),
                      simulated=bool(inst.get("simulated")))
    if isinstance(cur.get("t_start"), (int, float)):
        model.t_first = float(cur["t_start"])
    model.cycle = int(cur.get("cycle") or 0)
    for c in cur.get("cycles") or []:
        model.apply("cycle_done", {"cycle": c.get("cycle"), "result": {"index": c.get("cycle"), **c}}, wall)
    return model


class WatchView:
    """The daemon's state as the watch verb shows it: the status lines, and the live run view while a
    run is active.  ``feed`` takes one event; ``lines`` is what a pipe gets (empty when nothing worth a
    line happened)."""

    def __init__(self, snap: dict[str, Any], units: Units, every: float = 10.0) -> None:
        self.snap, self.units, self.every = snap, units, every
        self.model: Any = None
        self._last_line = -1e18
        cur = snap.get("current_run")
        if cur:
            self.model = _model_for(cur, snap, time.monotonic())

    def feed(self, kind: str, data: Any, wall: float, refresh: Any = None) -> list[str]:
        """Apply one event; returns plain lines for a pipe.  refresh() re-reads the daemon's status."""
        from pycnoctl.controller.cli.live import cycle_line, frame_line

        data = data if isinstance(data, dict) else {}
        out: list[str] = []
        if kind == "sample":
            self.snap["pressure"] = {**self.snap.get("pressure", {}), "gauge_pa": data.get("gauge_pa")}
            self.snap["valves"] = data.get("valves") or self.snap.get("valves", {})
            self.snap["state"] = data.get("state", self.snap.get("state"))
        if kind == "run_started":
            self.model = _model_for({**data, "cycles": []}, self.snap, wall)
            out.append(f"run {data.get('run_id')} started: {data.get('sequence')}, sample "
                       f"{data.get('sample_id') or '-'}, expansion volume {data.get('expansion_volume')}")
        if self.model is not None:
            before = (self.model.state, len(self.model.cycles))
            self.model.apply(kind, data, wall)
            if len(self.model.cycles) > before[1]:
                out.append(cycle_line(self.model.cycles[-1], self.units))
            if self.model.state != before[0] or kind in ("trip",) or (
                    kind == "sample" and wall - self._last_line >= self.every):
                out.append(frame_line(self.model, self.units))
        if kind == "run_finished":
            out.append(_finished_line(data, self.units))
            self.model = None
        if kind in ("trip", "reset", "queue", "daemon", "run_finished") and refresh is not None:
            self.snap = refresh() or self.snap
        if kind == "trip" and self.model is None:
            out.append(f"INTERLOCK {data.get('interlock')}: {data.get('message')}")
        if out:
            self._last_line = wall
        return out

    def renderable(self) -> Any:
        from rich.console import Group
        from rich.text import Text

        from pycnoctl.controller.cli.live import render

        parts: list[Any] = [Text("\n".join(status_lines(self.snap, self.units, with_run=False)))]
        if self.model is not None:
            parts.append(render(self.model, self.units))
        return Group(*parts)


def _finished_line(data: dict[str, Any], units: Units) -> str:
    res = ""
    if data.get("volume_cm3") is not None:
        res = (f": volume {data['volume_cm3']:.5f} +/- {data.get('volume_u_cm3') or 0.0:.5f} cm3 "
               f"(expanded U, k = {data.get('k') or 2:g})")
    msg = f" - {data['message']}" if data.get("message") else ""
    return f"run {data.get('run_id')} ended {data.get('status')}{res}{msg}"


def watch(args: argparse.Namespace) -> int:
    units = parse_units(args.units)
    t_end = time.monotonic() + args.seconds if args.seconds else None
    tty = sys.stdout.isatty()
    with _client(args) as c:
        try:
            snap = c.status()
        except DaemonError as exc:
            return _fail(exc)
        view = WatchView(snap, units, every=args.every)

        def refresh() -> dict[str, Any] | None:
            try:
                return c.status()
            except DaemonError:
                return None

        try:
            if tty:
                _watch_live(c, view, refresh, t_end)
            else:
                print("\n".join(status_lines(snap, units)), flush=True)
                for ev in c.events(timeout=30):
                    for line in view.feed(ev.kind, ev.data, time.monotonic(), refresh):
                        print(f"{time.strftime('%H:%M:%S')} {line}", flush=True)
                    if t_end is not None and time.monotonic() > t_end:
                        break
        except DaemonError as exc:
            return _fail(exc)
        except KeyboardInterrupt:
            pass
    return 0


def _watch_live(c: DaemonClient, view: WatchView, refresh: Any, t_end: float | None) -> None:
    from rich.live import Live

    from pycnoctl.controller.cli.display import console

    next_draw = 0.0
    with Live(view.renderable(), console=console(), refresh_per_second=4) as live:
        for ev in c.events(timeout=30):
            now = time.monotonic()
            view.feed(ev.kind, ev.data, now, refresh)
            if now >= next_draw or ev.kind != "sample":
                next_draw = now + 0.2
                live.update(view.renderable())
            if t_end is not None and now > t_end:
                break


def abort(args: argparse.Namespace) -> int:
    with _client(args) as c:
        try:
            c.abort()
        except DaemonError as exc:
            return _fail(exc)
    print("aborting the active run; the instrument goes to the safe state and the queue pauses")
    return 0


def reset(args: argparse.Namespace) -> int:
    with _client(args) as c:
        try:
            out = c.reset()
        except DaemonError as exc:
            return _fail(exc)
    print(f"interlock reset: {out.get('message')}")
    return 0


def queue(args: argparse.Namespace) -> int:
    with _client(args) as c:
        try:
            if args.remove:
                c.remove(args.remove)
                print(f"removed {args.remove} from the queue")
                return 0
            if args.resume:
                c.resume()
                print("queue resumed")
                return 0
            if args.pause:
                c.pause()
                print("queue paused")
                return 0
            q = c.queue()
        except DaemonError as exc:
            return _fail(exc)
    if args.json:
        print(json.dumps(q, indent=2))
        return 0
    if args.csv:
        from pycnoctl.controller.cli.display import write_csv

        write_csv(q["items"], ["position", "run_id", "sequence", "sample_id", "operator", "mass_g"], sys.stdout)
        return 0
    head = "queue paused: " + str(q.get("paused_reason")) if q.get("paused") else "queue running"
    print(f"{head}; {len(q['items'])} waiting")
    for it in q["items"]:
        mass = f"{it['mass_g']:.4f} g" if it.get("mass_g") else "-"
        print(f"  {it['run_id']}  {it['sequence']:<16} sample {it.get('sample_id') or '-':<12} mass {mass}")
    return 0
