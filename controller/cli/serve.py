"""pycnoctl serve: run the instrument service (control loop, run queue, local API, dashboard).

One process owns the instrument.  The control loop runs in its own thread and keeps ticking
while idle so the interlocks watch the pressure between runs; the HTTP side only asks it.
The safe state is asserted at start, on SIGTERM/SIGINT and on any unhandled error.

Binds 127.0.0.1 by default.  Any other address needs a token (--token-file, or the
PYCNOCTL_TOKEN environment variable), which every request must then carry.
With --sim the simulator runs in real time (--speed 10 runs it ten times faster than the clock).
"""

from __future__ import annotations

import argparse
import logging
import signal
import socket
import sys
import threading
import time
from typing import Any

from pycnoctl.controller.cli.common import (
    add_data_arg,
    add_instrument_args,
    lock_data_folder,
    open_instrument,
    sim_pace,
    sim_seed,
)
from pycnoctl.controller.cli.main import UsageError

DEFAULT_PORT = 8765


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("serve", help="run the instrument service with its local API and dashboard",
                       description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    add_instrument_args(p, always_realtime=True)
    add_data_arg(p)
    p.add_argument("--host", default="127.0.0.1", help="address to bind (default 127.0.0.1; others need a token)")
    p.add_argument("--port", type=int, default=DEFAULT_PORT, help=f"TCP port (default {DEFAULT_PORT})")
    p.add_argument("--token-file", metavar="FILE", help="file holding the API token (mode 600)")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    from pycnoctl.controller.jobs.measurement import data_dir
    from pycnoctl.controller.service.security import Policy, TokenError, load_token

    sim_pace(args)  # --speed/--realtime without --sim, or a speed out of range: refused as every verb does
    if not 0 < args.port < 65536:
        raise UsageError("--port must be 1..65535")
    try:
        policy = Policy(bind_host=args.host, port=args.port, token=load_token(args.token_file))
    except TokenError as exc:
        raise UsageError(str(exc)) from None
    root = data_dir(args.data)
    # the port first: a daemon that cannot listen must leave the data folder, its runs and the valves alone
    sock = _bind(args.host, args.port)
    try:
        lock = lock_data_folder(root, "serve", mark_interrupted=False)  # the daemon marks them and pauses
        try:
            return _serve(args, root, policy, sock)
        finally:
            lock.release()
    finally:
        sock.close()


def _bind(host: str, port: int) -> socket.socket:
    """The listening address, bound before anything else is touched (uvicorn is handed this socket)."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # as uvicorn does: no wait after a restart
        sock.bind((host, port))
    except OSError as exc:
        sock.close()
        why = exc.strerror or str(exc)
        raise UsageError(f"cannot listen on {_url_host(host)}:{port}: {why[:1].lower() + why[1:]}"
                         " (another daemon on that port? --port chooses another); nothing was started") from None
    return sock


def _serve(args: argparse.Namespace, root: Any, policy: Any, sock: socket.socket) -> int:
    import uvicorn

    from pycnoctl.controller.service.api import close_workers, create_app
    from pycnoctl.controller.service.daemon import Daemon, attach_json_log, sd_notify

    handler = attach_json_log(root / "daemon.log.jsonl")
    if args.sim is not None:
        from pycnoctl.drivers.simulated import build_sim_instrument

        try:
            instrument = build_sim_instrument(args.sim or None, realtime=True, speed=sim_pace(args)[1],
                                              seed=sim_seed(args))
        except FileNotFoundError as exc:
            raise UsageError(str(exc)) from None
    else:
        instrument = open_instrument(args)
    server: dict[str, Any] = {}
    caught: list[int] = []
    previous: dict[int, Any] = {}  # the handlers found, put back on return (serve may run in a process that goes on)
    failure: dict[str, BaseException] = {}

    def on_fatal(exc: BaseException) -> None:
        failure["exc"] = exc
        if "server" in server:
            server["server"].should_exit = True

    try:
        daemon = Daemon(instrument, root, on_fatal=on_fatal)
        app = create_app(daemon, policy)
        config = uvicorn.Config(app, host=args.host, port=args.port, log_level="warning", access_log=False,
                                lifespan="off", timeout_graceful_shutdown=2)
        srv = uvicorn.Server(config)
        server["server"] = srv
        daemon.start()

        def announce() -> None:
            while not srv.started and not srv.should_exit:
                time.sleep(0.05)
            if srv.started:
                print(f"pycnoctl serve: listening on http://{_url_host(args.host)}:{args.port}/ "
                      f"(instrument {instrument.name}, data {root})", file=sys.stderr, flush=True)
                for line in _held_on_start(daemon.snapshot()):
                    print(f"pycnoctl serve: {line}", file=sys.stderr, flush=True)
                sd_notify("READY=1")

        threading.Thread(target=announce, name="announce", daemon=True).start()
        # uvicorn restores the handlers it found and re-raises the signal it caught after its own
        # shutdown; ours only note it, so the safe-state shutdown below always runs.
        for sig in (signal.SIGTERM, signal.SIGINT):
            previous[sig] = signal.signal(sig, lambda signum, frame: caught.append(signum))
        srv.run(sockets=[sock])
        close_workers(app)
        daemon.stop(reason=_shutdown_reason(caught, failure.get("exc")))
        daemon.catalog.close()
    finally:
        instrument.close()  # safe state, then release the devices
        logging.getLogger("pycnoctl").removeHandler(handler)
        handler.close()
        for sig, old in previous.items():  # only now: a second Ctrl-C must not cut the safe-state shutdown short
            signal.signal(sig, old)
    if failure:
        print(f"pycnoctl serve: control loop failed: {failure['exc']!r}; instrument left in the safe state",
              file=sys.stderr)
        return 1
    return 130 if signal.SIGINT in caught else 0


def _shutdown_reason(caught: list[int], failed: BaseException | None) -> str:
    """Why the daemon stops, for an active run's abort reason and the log: the signal, else the failure."""
    if caught:
        name = signal.Signals(caught[0]).name
        return f"the daemon shut down on {name}" + (" (Ctrl-C)" if name == "SIGINT" else "")
    if failed is not None:
        return f"the daemon shut down: control loop failed ({type(failed).__name__})"
    return "the daemon shut down"


def _held_on_start(snap: dict[str, Any]) -> list[str]:
    """What keeps the daemon from starting the next run, said once at start (the operator clears it)."""
    out = []
    il = snap.get("interlock") or {}
    if il.get("latched"):
        out.append(f"interlock {il.get('kind')} latched: {il.get('message')}; "
                   "an operator reset (pycnoctl reset) clears it")
    q = snap.get("queue") or {}
    if q.get("paused"):
        out.append(f"queue paused: {q.get('paused_reason')}; pycnoctl queue --resume starts it")
    return out


def _url_host(host: str) -> str:
    return f"[{host}]" if ":" in host else host
