"""Tick statistics from a fixed histogram (checked against numpy.percentile within the stated
resolution) and an event bus that serialises each event once for every stream."""

from __future__ import annotations

import json

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from pycnoctl.controller.service.daemon import EventBus, LateHistogram, LoopStats

R = LateHistogram.RESOLUTION
LOW = LateHistogram.LOW
# lateness-like values: exact zeros, sub-microsecond noise, ordinary ms, rare long stalls
lateness = st.one_of(st.just(0.0), st.floats(0, 2e-6), st.floats(1e-5, 0.05), st.floats(0.05, 5.0))


def _check(window: list[float], summary: dict) -> None:
    vals = np.asarray(window)
    assert summary["n"] == len(window)
    assert summary["max_ms"] == max(window) * 1e3  # exact
    for key, p in (("p50_ms", 50), ("p99_ms", 99)):
        # the nearest-rank order statistic lies between numpy's 'lower' and 'higher' percentiles;
        # the histogram reports it within a factor R, or within LOW (1 us) below LOW
        lo = float(np.percentile(vals, p, method="lower"))
        hi = float(np.percentile(vals, p, method="higher"))
        got = summary[key] / 1e3
        assert lo / R - LOW <= got * (1 + 1e-12) and got <= hi * R * (1 + 1e-12) + LOW, (key, lo, hi, got)


@settings(max_examples=200, deadline=None)
@given(values=st.lists(lateness, min_size=1, max_size=400), maxlen=st.integers(1, 150))
def test_quantiles_match_numpy_within_the_resolution(values, maxlen):
    stats = LoopStats(maxlen=maxlen)
    for k, v in enumerate(values, 1):
        stats.add(v)
        if k % 37 == 0 or k == len(values):  # along the way too: the window slides, counts leave
            _check(values[max(0, k - maxlen):k], stats.summary())
    assert stats.ticks == len(values) and stats.values() == values[-maxlen:]


def test_resolution_is_what_the_docstring_says():
    assert abs(R - 1.05 ** 0.5) < 1e-12 and R - 1 < 0.025
    rng = np.random.default_rng(3)
    vals = rng.lognormal(mean=np.log(2e-3), sigma=1.5, size=20000)
    stats = LoopStats()
    for v in vals:
        stats.add(float(v))
    s = stats.summary()
    for key, p in (("p50_ms", 50), ("p99_ms", 99)):
        exact = float(np.percentile(vals, p, method="nearest"))
        assert abs(s[key] / 1e3 / exact - 1) <= R - 1


def test_cleared_and_empty():
    stats = LoopStats(maxlen=10)
    assert stats.summary() == {"ticks": 0, "n": 0, "p50_ms": None, "p99_ms": None, "max_ms": None}
    for v in (0.5, 0.1, 0.2):
        stats.add(v)
    stats.clear()
    assert stats.summary()["n"] == 0 and stats.summary()["ticks"] == 3
    stats.add(0.003)
    _check([0.003], stats.summary())


def test_bus_serialises_each_event_once_for_all_streams():
    bus = EventBus(maxlen=8)
    for i in range(5):
        bus.publish("sample", {"i": i, "t": 0.1 * i, "valves": {"inlet": True}})
    a, lost_a = bus.since_text(0)
    b, lost_b = bus.since_text(2)
    assert not lost_a and not lost_b
    assert [json.loads(t) for _, _, t in a] == [d for _, _, d in bus.since(0)[0]]
    assert [t for _, _, t in a] == [json.dumps(d, default=str) for _, _, d in bus.since(0)[0]]
    assert all(x[2] is y[2] for x, y in zip(a[2:], b, strict=True))  # the very same string object
    for i in range(5, 20):
        bus.publish("sample", {"i": i})
    items, lost = bus.since_text(3)
    assert lost and [json.loads(t)["i"] for _, _, t in items] == list(range(12, 20))
