"""Helpers for tests and quick experiments: configs derived from the shipped clean bench."""

from __future__ import annotations

import copy
from typing import Any

import yaml

from pycnoctl.sim.bench import SimBench
from pycnoctl.sim.config import DEFAULT_CONFIG, SimConfig, config_from_dict

_BASE = yaml.safe_load(DEFAULT_CONFIG.read_text(encoding="utf-8"))
# Physics checks want a quick fill: a plain 0.25 mm inlet orifice instead of the shipped bench's
# metering restrictor, so a fill takes a fraction of a second of simulated time.
_BASE["valves"]["inlet"]["diameter"] = "0.25 mm"


def clean_dict() -> dict[str, Any]:
    """The shipped clean bench with a fast inlet (see above)."""
    return copy.deepcopy(_BASE)


def make(update: dict[str, Any] | None = None, **top: Any) -> SimConfig:
    """The clean config with nested updates merged in (dicts merge, other values replace)."""
    data = clean_dict()

    def merge(dst: dict[str, Any], src: dict[str, Any]) -> None:
        for k, v in src.items():
            if isinstance(v, dict) and isinstance(dst.get(k), dict):
                merge(dst[k], v)
            else:
                dst[k] = v

    merge(data, update or {})
    merge(data, top)
    return config_from_dict(data)


def closed(bench: SimBench) -> None:
    bench.set_valves(dict.fromkeys(bench.valve_names, False))


def fill(bench: SimBench, seconds: float = 3.0) -> None:
    """All valves closed, inlet open for ``seconds``, inlet closed."""
    closed(bench)
    bench.set_valves({"inlet": True})
    bench.advance(seconds)
    bench.set_valves({"inlet": False})
