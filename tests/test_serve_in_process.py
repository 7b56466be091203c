"""``pycnoctl serve`` run in a process that goes on afterwards (an embedding script, a test): on return it
leaves the process as it found it - the SIGINT/SIGTERM handlers it found, no log handler of its own -
and the instrument in the safe state. Before, a Ctrl-C after serve had returned was only noted by its
leftover handler and never stopped the process."""

from __future__ import annotations

import logging
import os
import signal
import socket
import threading
import time
from pathlib import Path
from typing import Any

from fault_matrix import captured_bench

from pycnoctl.controller.cli.main import main


def test_serve_stopped_by_sigterm_puts_back_what_it_found(tmp_path: Path, monkeypatch: Any) -> None:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    before = {sig: signal.getsignal(sig) for sig in (signal.SIGINT, signal.SIGTERM)}
    handlers = list(logging.getLogger("pycnoctl").handlers)

    def stop_when_listening() -> None:
        deadline = time.monotonic() + 30.0
        while time.monotonic() < deadline:
            try:
                with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                    break
            except OSError:
                time.sleep(0.05)
        os.kill(os.getpid(), signal.SIGTERM)

    threading.Thread(target=stop_when_listening, daemon=True).start()
    try:
        with captured_bench(monkeypatch) as seen:
            rc = main(["serve", "--sim", "--data", str(tmp_path / "data"), "--port", str(port)])
    finally:
        after = {sig: signal.getsignal(sig) for sig in before}
        for sig, h in before.items():
            signal.signal(sig, h)
    assert rc == 0
    assert after == before
    assert logging.getLogger("pycnoctl").handlers == handlers
    v = seen["sim"].actual_valves()
    assert v["inlet"] is False and v["vent"] is True


def test_serve_on_a_taken_port_touches_nothing(tmp_path: Path, capsys: Any) -> None:
    """Bound before the data folder's lock is taken: no runs marked interrupted, no instrument opened."""
    from pycnoctl.controller.record.catalog import Catalog

    data = tmp_path / "data"
    data.mkdir()
    with Catalog(data / "catalog.sqlite") as cat:
        running = cat.create_run(kind="measure", status="running")  # as a live writer would leave it
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        rc = main(["serve", "--sim", "--data", str(data), "--port", str(port)])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2
    assert len(err) == 1 and f"127.0.0.1:{port}" in err[0] and "in use" in err[0]
    with Catalog(data / "catalog.sqlite") as cat:
        assert cat.get_run(running).status == "running"
    assert not (data / "daemon.log.jsonl").exists() and not (data / "pycnoctl.lock").exists()
