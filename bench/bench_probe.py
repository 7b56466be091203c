"""Probe latency through the real serial drivers against fake devices on a pty pair and on TCP.

The shipped USB relay board + serial gauge example config is pointed at fake byte-level devices
(sim/fakedev.py) backed by the simulator, then `probe` reads the gauge 200 times and walks the
valves: the figures are per exchange through pyserial, the drivers and the fake firmware.

Run: python bench/bench_probe.py
"""

from __future__ import annotations

import statistics
import tempfile
from importlib.resources import files
from pathlib import Path

from pycnoctl.controller.cli.probe import probe
from pycnoctl.drivers.config import build_instrument, load_instrument_config
from pycnoctl.drivers.relay_ascii import Channel
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.fakedev import FakeDevice, GaugeFirmware, RelayFirmware

EXAMPLE = Path(str(files("pycnoctl.drivers") / "instruments" / "usb-relay-serial-gauge.yaml"))
RELAY_PORT = "/dev/serial/by-id/usb-relay8-ascii-if00"
GAUGE_PORT = "/dev/serial/by-id/usb-gauge-ascii-if00"
EXAMPLE_VALVES = ["inlet", "vent", "small", "large"]  # channels 1-4 of the example board


def main() -> None:
    for link in ("pty", "tcp"):
        sim = build_sim_instrument()
        sim_names = dict(zip(EXAMPLE_VALVES, sim.valves.valve_names, strict=True))
        chans = {sim_names[k]: Channel(i + 1, k == "vent") for i, k in enumerate(EXAMPLE_VALVES)}
        relay = FakeDevice(RelayFirmware.for_board(sim.valves, chans), link=link)
        gauge = FakeDevice(GaugeFirmware(sim.pressure, unit="kPa"), link=link)
        text = EXAMPLE.read_text().replace(RELAY_PORT, relay.url).replace(GAUGE_PORT, gauge.url)
        cfg_path = Path(tempfile.mkdtemp()) / "bench.yaml"
        cfg_path.write_text(text)
        inst = build_instrument(load_instrument_config(cfg_path), clock=sim.clock)
        try:
            rep = probe(inst, count=200, exercise=True)
        finally:
            inst.close()
            relay.close()
            gauge.close()
        s = rep["sensors"]["pressure"]
        walk = [st["ms"] for st in rep["valves"]["exercise"] if "ms" in st]
        print(f"{link}: pressure query mean {s['latency_mean_ms']:.3f} ms, max {s['latency_max_ms']:.3f} ms "
              f"over {s['reads']} reads ({s['valid']} valid); valve command + ack mean "
              f"{statistics.fmean(walk):.3f} ms over {len(walk)} steps; "
              f"read-back {rep['valves']['read_back_ms']:.3f} ms")


if __name__ == "__main__":
    main()
