"""The run-state vocabulary: one list of states, their labels and shading colours, for every layer.

The engine steps through these states, the trace records them by name, replay reads them back, and the
report and the dashboard shade the pressure trace with their colours. Keeping them here, in one enum,
means a new step is named, labelled and coloured once; the dashboard is served this table instead of
keeping its own copy.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass


@dataclass(frozen=True)
class StateLook:
    """How people see a state: a short label and a solid shading colour (#rrggbb)."""

    label: str
    colour: str


class RunState(enum.StrEnum):
    """States of one run. The value is the name written to the trace (stable: records are re-read)."""

    IDLE = "idle"
    PURGE = "purge"  # the whole purge, as records written before its pulses were states name it
    PURGE_FILL = "purge_fill"  # a purge pulse filling to its pressure
    PURGE_HOLD = "purge_hold"  # ... holding, closed
    PURGE_VENT = "purge_vent"  # ... venting
    VENT = "vent"
    BASELINE = "baseline"
    FILL = "fill"
    SETTLE_FILLED = "settle_filled"
    EXPAND = "expand"
    SETTLE_EXPANDED = "settle_expanded"
    LEAK_HOLD = "leak_hold"
    DONE = "done"
    FAULT = "fault"
    ABORTED = "aborted"

    @property
    def look(self) -> StateLook:
        return LOOKS[self]

    @property
    def terminal(self) -> bool:
        return self in TERMINAL

    @property
    def purging(self) -> bool:
        """A purge state (a pulse's fill, hold or vent, or the whole purge of an older record)."""
        return self in PURGING


TERMINAL: frozenset[RunState] = frozenset({RunState.DONE, RunState.FAULT, RunState.ABORTED})

PURGING: frozenset[RunState] = frozenset({RunState.PURGE, RunState.PURGE_FILL, RunState.PURGE_HOLD,
                                          RunState.PURGE_VENT})

LOOKS: dict[RunState, StateLook] = {
    RunState.IDLE: StateLook("idle", "#ffffff"),
    RunState.PURGE: StateLook("purge (older records)", "#e6d5f2"),
    RunState.PURGE_FILL: StateLook("purge pulse: fill", "#d9c2ec"),
    RunState.PURGE_HOLD: StateLook("purge pulse: hold", "#e0cdf0"),
    RunState.PURGE_VENT: StateLook("purge pulse: vent", "#efe6f7"),
    RunState.VENT: StateLook("vent", "#d9d9d9"),
    RunState.BASELINE: StateLook("baseline (zero)", "#f2f2c2"),
    RunState.FILL: StateLook("fill", "#f7c9b6"),
    RunState.SETTLE_FILLED: StateLook("settle after fill (P1)", "#fbe3c0"),
    RunState.EXPAND: StateLook("expand", "#bfe3f5"),
    RunState.SETTLE_EXPANDED: StateLook("settle after expansion (P2)", "#cde9d3"),
    RunState.LEAK_HOLD: StateLook("leak hold", "#f5c6dc"),
    RunState.DONE: StateLook("done", "#ffffff"),
    RunState.FAULT: StateLook("fault", "#f4b6ae"),
    RunState.ABORTED: StateLook("aborted", "#f6d3a6"),
}


def vocabulary() -> list[dict[str, object]]:
    """The table served to the dashboard: name, label, colour and whether the state ends a run."""
    return [{"name": s.value, "label": s.look.label, "colour": s.look.colour, "terminal": s.terminal}
            for s in RunState]
