"""Verbs that talk to a running ``pycnoctl serve``: submit, status, watch, abort, reset, queue.

They reach the daemon at http://127.0.0.1:8765 unless --url says otherwise; the token comes from
--token or $PYCNOCTL_TOKEN.  Exit codes: 0 done, 1 the daemon refused (409, 422 ...), 2 bad input,
6 the daemon cannot be reached.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from typing import Any

from pycnoctl.controller.cli.common import add_sample_args
from pycnoctl.controller.cli.main import UsageError
from pycnoctl.controller.service.client import DEFAULT_URL, DaemonClient, DaemonError

VERBS = ("submit", "status", "watch", "abort", "reset", "queue")


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--url", default=DEFAULT_URL, help=f"daemon address (default {DEFAULT_URL})")
    p.add_argument("--token", help="API token (default $PYCNOCTL_TOKEN)")


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("submit", help="queue a run on the daemon", description=__doc__,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("sequence", help="name of a shipped sequence, or a local sequence file whose text is sent")
    add_sample_args(p, u_mass_default=None)  # the daemon takes 0.1 mg when none is sent
    p.add_argument("--note", default="", help="free text for the record")
    p.add_argument("--json", action="store_true", help="print the daemon's answer as JSON")
    _common(p)
    p.set_defaults(func=submit)

    p = sub.add_parser("status", help="one-shot status of the daemon and the instrument")
    p.add_argument("--json", action="store_true", help="print the full status as JSON")
    _common(p)
    p.set_defaults(func=status)

    p = sub.add_parser("watch", help="live terminal view of the daemon (Ctrl-C to leave; the run goes on)")
    p.add_argument("--seconds", type=float, help="stop watching after this many seconds")
    _common(p)
    p.set_defaults(func=watch)

    p = sub.add_parser("abort", help="abort the active run (safe state); the queue pauses")
    _common(p)
    p.set_defaults(func=abort)

    p = sub.add_parser("reset", help="operator reset of a latched interlock (refused while the condition lasts)")
    _common(p)
    p.set_defaults(func=reset)

    p = sub.add_parser("queue", help="list the run queue; remove a run; resume or pause")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--remove", metavar="RUN_ID", help="take a queued run off the queue")
    g.add_argument("--resume", action="store_true", help="resume a paused queue")
    g.add_argument("--pause", action="store_true", help="pause the queue (the active run goes on)")
    p.add_argument("--json", action="store_true")
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
                           "bulk_volume": args.bulk_volume, "operator": args.operator,
                           "expansion_volume": args.expansion_volume, "note": args.note or None}
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
            return _fail(exc)
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        print(f"queued {out['run_id']} ({out['sequence']}, expansion volume {out['expansion_volume']}, "
              f"about {out['expected_s'] / 60:.0f} min or more)")
        for w in out.get("warnings") or []:
            print(f"warning: {w}")
    return 0


def _fmt_p(pa: float | None) -> str:
    return "invalid" if pa is None else f"{pa / 1e5:+.5f} bar g"


def status_lines(s: dict[str, Any]) -> list[str]:
    """The status as a few readable lines (shared by status and watch)."""
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
    if cur:
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
                res += f", {last['density_g_cm3']:.4f} +/- {last['density_u_g_cm3']:.4f} g/cm3"
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
        print("\n".join(status_lines(s)))
    return 0


def watch(args: argparse.Namespace) -> int:
    from rich.console import Console
    from rich.live import Live
    from rich.text import Text

    console = Console(stderr=False)
    t_end = time.monotonic() + args.seconds if args.seconds else None
    with _client(args) as c:
        try:
            snap = c.status()
        except DaemonError as exc:
            return _fail(exc)
        trace: list[float] = []
        try:
            with Live(Text("\n".join(status_lines(snap))), console=console, refresh_per_second=4) as live:
                for ev in c.events(timeout=30):
                    if ev.kind == "sample" and isinstance(ev.data, dict):
                        snap["pressure"] = {**snap.get("pressure", {}), "gauge_pa": ev.data.get("gauge_pa")}
                        snap["valves"] = ev.data.get("valves") or snap.get("valves", {})
                        snap["state"] = ev.data.get("state", snap["state"])
                        if ev.data.get("gauge_pa") is not None:
                            trace = [*trace[-59:], ev.data["gauge_pa"]]
                    elif ev.kind in ("run_started", "run_finished", "trip", "reset", "queue", "cycle_done",
                                     "daemon", "status"):
                        snap = c.status()
                    text = "\n".join([*status_lines(snap), "trace    " + _spark(trace)])
                    live.update(Text(text))
                    if t_end is not None and time.monotonic() > t_end:
                        break
        except DaemonError as exc:
            return _fail(exc)
        except KeyboardInterrupt:
            pass
    return 0


def _spark(values: list[float]) -> str:
    if not values:
        return ""
    bars = " .:-=+*#%@"
    lo, hi = min(values), max(values)
    span = hi - lo or 1.0
    return "".join(bars[int((v - lo) / span * (len(bars) - 1))] for v in values) + f"  (max {hi / 1e5:.3f} bar g)"


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
    head = "queue paused: " + str(q.get("paused_reason")) if q.get("paused") else "queue running"
    print(f"{head}; {len(q['items'])} waiting")
    for it in q["items"]:
        mass = f"{it['mass_g']:.4f} g" if it.get("mass_g") else "-"
        print(f"  {it['run_id']}  {it['sequence']:<16} sample {it.get('sample_id') or '-':<12} mass {mass}")
    return 0
