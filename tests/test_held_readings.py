"""A transducer read faster than it updates is refused at its first fill, however slowly the fill rises;
a coarse transducer that repeats because the fill moves less than its step per sample is not.

Instruments invented for these checks (none is a shipped config): the clean simulated bench with its
inlet restrictor narrowed from 0.05 to 0.01 mm (a metered fill of about 90 Pa a sample at 10 Hz, under the
100 Pa a sample the first sign needs), its gauge given 8 Pa of noise or a 500 Pa resolution, and its
update rate set from 1 to 100 Hz.  The synthetic fills below are the same shapes without the simulator.
"""

from __future__ import annotations

import math
import random
from pathlib import Path

import pytest
import yaml

from pycnoctl.controller.run.heldwatch import HELD_RISE, FillWatch
from pycnoctl.sim.config import config_from_dict, shipped_configs
from tests.test_engine_acceptance import measure, truth_cm3

SLOW_FILL = Path(__file__).parents[1] / "sequences" / "quick-demo.yaml"


def _fill(values: list[float]) -> FillWatch:
    w = FillWatch()
    for v in values:
        w.add(v, v)
    return w


def _held(k: int, rise_per_sample: float, noise: float, n: int = 1500, seed: int = 3) -> list[float]:
    """A constant-rate fill read every sample from a transducer that updates every k samples."""
    rng = random.Random(seed)
    out, value = [], 0.0
    for i in range(n):
        if i % k == 0:
            value = i * rise_per_sample + rng.gauss(0.0, noise)
        out.append(value)
    return out


@pytest.mark.parametrize(("k", "noise"), [(10, 8.0), (10, 20.0), (10, 0.5), (2, 8.0), (4, 30.0)])
def test_a_held_transducer_on_a_fill_slower_than_the_first_sign_is_refused(k, noise):
    # 60 Pa a sample: under HELD_RISE, so only the rhythm of the changes can tell (found by a sweep: a 1 Hz
    # gauge read every 0.1 s on a slow metered fill got through); a nearly noise-free one on a fill of
    # constant rate changes in equal steps, as a coarse one does, but on the beat of its updates
    assert HELD_RISE > 60.0
    values = _held(k, 60.0, noise)
    why = _fill(values).verdict(values[-1], 0.1)
    assert why is not None and f"a new reading about every {k * 0.1:.2g} s" in why


@pytest.mark.parametrize(("k", "step", "noise"), [(2, 100.0, 10.0), (10, 500.0, 100.0), (5, 500.0, 10.0)])
def test_a_coarse_transducer_that_also_holds_its_readings_is_refused(k, step, noise):
    # found by a sweep: a 1 mbar (100 Pa) display gauge updating at 5 Hz, read at 10 Hz on a slow fill, passed:
    # its changes are whole steps of its resolution, as a coarse one's are, but they keep the beat of its updates
    rng = random.Random(7)
    values, value = [], 0.0
    for i in range(1500):
        if i % k == 0:
            value = step * round((45.0 * i + rng.gauss(0.0, noise)) / step)
        values.append(value)
    why = _fill(values).verdict(values[-1], 0.1)
    assert why is not None and "as updates do" in why and "a new reading about every" in why


def test_a_coarse_transducer_on_a_slow_fill_is_not_taken_for_a_held_one():
    # every sample read anew, rounded to 500 Pa: it repeats most samples of a 60 Pa a sample fill, and
    # changes by whole steps of 500 Pa (quantisation, GUM F.2.2.1), with or without a little noise
    rng = random.Random(5)
    for noise in (0.0, 100.0, 200.0):
        values = [500.0 * round((60.0 * i + rng.gauss(0.0, noise)) / 500.0) for i in range(1500)]
        w = _fill(values)
        assert w.repeats > 0.4 * w.n
        assert w.verdict(values[-1], 0.1) is None, noise


def test_a_fine_transducer_that_levels_off_is_not_taken_for_a_held_one():
    # a noise-free simulated fill that reaches its supply exactly repeats its last reading for the rest of
    # the fill, but it changed on every sample before that
    values = [min(1.3e5, 200.0 * i) for i in range(650)] + [1.3e5] * 900
    assert _fill(values).verdict(values[-1], 0.1) is None


def test_a_transducer_updating_every_one_and_two_thirds_samples_measures():
    # 6 Hz read at 10 Hz: a third of its changes come on consecutive samples; its settles count 1.67 samples
    # a reading, which the rules tolerate (on the bench below it measures within its U)
    rng = random.Random(2)
    values, value = [], 0.0
    for i in range(1500):
        if math.floor(i * 0.6) != math.floor((i - 1) * 0.6):
            value = 60.0 * i + rng.gauss(0.0, 8.0)
        values.append(value)
    assert _fill(values).verdict(values[-1], 0.1) is None


def _bench(update_rate: float, *, noise: str = "8 Pa", resolution: str | None = None):
    data = yaml.safe_load(shipped_configs()["clean"].read_text(encoding="utf-8"))
    pressure = data["instruments"]["pressure"]
    pressure.update(update_rate=update_rate, noise=noise)
    if resolution is not None:
        pressure["resolution"] = resolution
    data["valves"]["inlet"]["diameter"] = "0.01 mm"
    return config_from_dict(data)


@pytest.fixture(scope="module")
def slow_fill(tmp_path_factory) -> Path:
    text = SLOW_FILL.read_text(encoding="utf-8").replace("target: 1.30 bar\n  timeout: 30 s",
                                                         "target: 1.30 bar\n  timeout: 600 s")
    assert "timeout: 600 s" in text
    path = tmp_path_factory.mktemp("seq") / "slow-fill.yaml"
    path.write_text(text.replace("name: quick-demo", "name: slow-fill"), encoding="utf-8")
    return path


@pytest.mark.parametrize(("rate", "noise"), [(1.0, "8 Pa"), (1.0, "0 Pa"), (5.0, "8 Pa")])
def test_a_slow_metered_fill_does_not_hide_a_held_transducer(tmp_path, slow_fill, rate, noise):
    summary, bench, _, _ = measure(tmp_path, str(slow_fill), _bench(rate, noise=noise))
    assert summary["status"] == "fault" and summary["fault"]["kind"] == "held_readings", summary.get("fault")
    assert f"a new reading about every {1 / rate:.2g} s" in summary["fault"]["message"]
    assert not summary["cycles"] and bench.actual_valves()["inlet"] is False


@pytest.mark.parametrize(("rate", "resolution"), [(100.0, None), (6.0, None), (100.0, "500 Pa")])
def test_a_slow_metered_fill_measures_on_a_transducer_read_as_fast_as_it_updates(tmp_path, slow_fill, rate,
                                                                                  resolution):
    summary, bench, _, _ = measure(tmp_path, str(slow_fill), _bench(rate, resolution=resolution))
    assert summary["status"] == "completed", summary.get("fault")
    assert abs(summary["volume_cm3"] - truth_cm3(bench)) <= summary["volume_u_cm3"]


@pytest.mark.parametrize(("rate", "refused"), [(5.0, True), (6.0, False)])
def test_the_verdict_near_its_threshold_does_not_depend_on_the_noise(tmp_path, rate, refused):
    # found by a sweep: 6 Hz read at 10 Hz with 10 Pa of noise was refused at the first fill, the second or
    # not at all, by seed (its repeats sat at the threshold); every second sample repeating is refused
    seen = []
    for seed in range(1, 5):
        data = yaml.safe_load(shipped_configs()["clean"].read_text(encoding="utf-8"))
        data["instruments"]["pressure"].update(update_rate=rate, noise="10 Pa")
        data["seed"] = seed
        summary, *_ = measure(tmp_path / str(seed), "quick-demo", config_from_dict(data))
        seen.append((summary["status"], (summary.get("fault") or {}).get("kind"), len(summary["cycles"])))
    assert seen == [("fault", "held_readings", 0) if refused else ("completed", None, 3)] * 4


def test_a_coarse_transducer_on_a_fast_fill_is_told_its_resolution_not_a_sample_period():
    # found by a sweep: a 50 Hz gauge in 5 mbar steps on a fill of 190 Pa a sample was refused and told to be
    # read every 0.21 s; its changes are whole steps, often on consecutive samples, on no beat: too coarse
    rng = random.Random(11)
    values = [500.0 * round((190.0 * i + rng.gauss(0.0, 200.0)) / 500.0) for i in range(528)]
    w = _fill(values)
    assert w.repeats >= 0.45 * w.n
    why = w.verdict(values[-1], 0.1)
    assert why is not None and "every change was a whole step of 500 Pa" in why
    assert "sample_period" not in why and "finer resolution" in why
