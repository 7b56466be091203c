"""Checks on a real instrument, opt-in: ``pytest --hardware`` with PYCNOCTL_INSTRUMENT naming its config.

They never pressurise anything: they open the devices, assert the safe state, read every sensor and
check the vented system reads near ambient. A leak check and a measurement on hardware are runs, not
tests: use ``pycnoctl run leak-check --instrument ...``.
"""

from __future__ import annotations

import math
import os

import pytest

pytestmark = pytest.mark.hardware


@pytest.fixture
def instrument():
    path = os.environ.get("PYCNOCTL_INSTRUMENT")
    if not path:
        pytest.skip("set PYCNOCTL_INSTRUMENT to the instrument config of the attached hardware")
    from pycnoctl.drivers.config import build_instrument, load_instrument_config

    inst = build_instrument(load_instrument_config(path))
    yield inst
    inst.close()


def test_safe_state_is_accepted_and_read_back(instrument):
    assert instrument.safe_state()
    back = instrument.valves.read_back()
    if back is not None:  # boards that can report their relays must report the safe state
        assert all(back[v] == want for v, want in instrument.roles.safe_state().items())


def test_vented_transducer_reads_ambient(instrument):
    instrument.safe_state()
    instrument.clock.sleep(5.0)
    readings = [instrument.pressure.read() for _ in range(10)]
    assert all(r.valid for r in readings), [r.validity for r in readings]
    gauge = [r.value if instrument.pressure_is_gauge else r.value - instrument.ambient_nominal for r in readings]
    assert max(abs(g) for g in gauge) < instrument.limits.vent_baseline_tolerance
    assert all(math.isfinite(g) for g in gauge)
