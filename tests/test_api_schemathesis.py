"""The API keeps its published contract under an outside property-based tester.

Schemathesis reads /api/openapi.json from a simulated daemon served on 127.0.0.1 and sends the
requests it derives from it (examples, boundary cases, random and schema-breaking data, stateful
chains), checking each reply against the document: status declared, body and headers as
described, schema-breaking data refused, schema-valid data taken, 405 with the right Allow.
Settings (seed, examples per operation, the two refusals a schema cannot state) are in
tests/schemathesis.toml; the same command runs by hand against `pycnoctl serve --sim`.
"""

from __future__ import annotations

import re
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

from pycnoctl.controller.service.api import serve_in_thread
from pycnoctl.controller.service.client import DaemonClient
from pycnoctl.controller.service.daemon import Daemon
from pycnoctl.drivers.simulated import build_sim_instrument

CONFIG = Path(__file__).with_name("schemathesis.toml")


@pytest.fixture
def served(tmp_path: Path) -> Iterator[tuple[Daemon, str]]:
    d = Daemon(build_sim_instrument(None), tmp_path / "data")
    with serve_in_thread(d) as url:
        assert url.startswith("http://127.0.0.1:")  # loopback only
        yield d, url


def test_schemathesis_finds_no_contract_failure(served: tuple[Daemon, str], tmp_path: Path) -> None:
    _, url = served
    cmd = [sys.executable, "-m", "schemathesis.cli", "--config-file", str(CONFIG), "run",
           f"{url}/api/openapi.json", "--no-color"]
    out = subprocess.run(cmd, capture_output=True, text=True, timeout=180, check=False,
                         cwd=tmp_path)  # its replay store goes there, not into the work tree
    report = out.stdout + out.stderr
    counts = re.search(r"(\d+) generated, (\d+) (passed|found)", report)
    assert counts is not None, report[-3000:]
    assert int(counts.group(1)) >= 100, report[-3000:]  # a real run, not an empty one
    assert out.returncode == 0 and "failure" not in report.split("SUMMARY")[-1].lower(), report[-6000:]


def test_client_reads_the_event_stream(served: tuple[Daemon, str]) -> None:
    _, url = served
    with DaemonClient(url) as c:
        seen = []
        for ev in c.events(timeout=10):
            seen.append(ev)
            if ev.kind == "status":
                c.pause()  # the daemon publishes a queue event for it
            if ev.kind == "queue":
                break
    first = seen[0]
    assert first.kind == "status" and isinstance(first.data, dict) and first.data["queue"]["length"] == 0
    assert first.id is not None and int(first.id) >= 0
    assert seen[-1].data["paused"] is True and int(seen[-1].id) > int(first.id)
