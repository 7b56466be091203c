"""A guard around any valve bank: forbidden combinations are refused before a byte is sent.

The guard is the one place that decides whether a valve command is allowed, whatever board
sits below it.  It merges a partial command with the commanded state, refuses the result if it
would open a forbidden set of valves together (inlet with vent, by default), then applies the
closing commands before the opening ones, so no intermediate state is worse than the start or
the end.  Where the board reports its relays, the read-back is compared with the command.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Iterable, Mapping
from typing import Any

from pycnoctl.controller.domain.devices import DeviceError, ForbiddenValveState, ValveBank
from pycnoctl.controller.domain.gaspath import ValveRoles

log = logging.getLogger(__name__)

DEFAULT_FORBIDDEN: tuple[frozenset[str], ...] = (frozenset({"inlet", "vent"}),)

#: Seconds the whole safe-state attempt may take: a silent board must not stall the loop for one
#: time-out per valve.  Commands still pending at the deadline go on in the background.
SAFE_STATE_DEADLINE = 1.0


def forbidden_for_roles(roles: ValveRoles) -> tuple[frozenset[str], ...]:
    """The default rule in role terms: the inlet must never be open with the vent."""
    return (frozenset({roles.inlet, roles.vent}),)


def violations(state: Mapping[str, bool], forbidden: Iterable[frozenset[str]]) -> list[frozenset[str]]:
    """The forbidden sets whose valves would all be open in state."""
    open_now = {name for name, is_open in state.items() if is_open}
    return [combo for combo in forbidden if combo <= open_now]


class GuardedValveBank:
    """Wraps a ValveBank; itself a ValveBank."""

    def __init__(self, inner: ValveBank, forbidden: Iterable[Iterable[str]] | None = None, *,
                 roles: ValveRoles | None = None, verify: bool = True) -> None:
        self.inner = inner
        names = set(inner.valve_names)
        if forbidden is None:
            combos = forbidden_for_roles(roles) if roles is not None else DEFAULT_FORBIDDEN
            combos = tuple(c for c in combos if c <= names)
        else:
            combos = tuple(frozenset(c) for c in forbidden)
        for combo in combos:
            unknown = combo - names
            if unknown:
                raise ValueError(f"forbidden combination names unknown valves {sorted(unknown)}")
            if len(combo) < 2:
                raise ValueError(f"a forbidden combination needs two or more valves, got {sorted(combo)}")
        self.forbidden: tuple[frozenset[str], ...] = combos
        self.roles = roles
        self.verify = verify
        self.safe_deadline = SAFE_STATE_DEADLINE

    @property
    def valve_names(self) -> tuple[str, ...]:
        return tuple(self.inner.valve_names)

    def commanded(self) -> dict[str, bool]:
        return self.inner.commanded()

    def read_back(self) -> dict[str, bool] | None:
        return self.inner.read_back()

    def check(self, states: Mapping[str, bool]) -> dict[str, bool]:
        """The merged target state, or ForbiddenValveState; sends nothing."""
        unknown = sorted(set(states) - set(self.inner.valve_names))
        if unknown:
            raise ForbiddenValveState(f"unknown valve(s) {unknown}; this bank has {list(self.valve_names)}")
        target = {**self.inner.commanded(), **{k: bool(v) for k, v in states.items()}}
        bad = violations(target, self.forbidden)
        if bad:
            combos = ", ".join("+".join(sorted(c)) for c in bad)
            raise ForbiddenValveState(f"refused {dict(states)}: would open {combos} together")
        return target

    def set_valves(self, states: Mapping[str, bool]) -> None:
        target = self.check(states)
        if self.roles is not None and dict(states) == self.roles.safe_state():
            self._apply_best_effort(safe_order(states, self.roles))
        else:
            closes = {k: False for k, v in states.items() if not v}
            opens = {k: True for k, v in states.items() if v}
            if closes:
                self.inner.set_valves(closes)
            if opens:
                self.inner.set_valves(opens)
        if self.verify:
            self._verify(target)

    def _apply_best_effort(self, steps: list[tuple[str, bool]]) -> None:
        """Try every step whatever each raises (a busy board may still take the vent), then raise."""
        failures = apply_steps(self.inner, steps, self.safe_deadline)
        if failures:
            detail = "; ".join(f"{name} -> {'open' if is_open else 'closed'}: {why}"
                               for name, is_open, why in failures)
            message = f"safe state incomplete ({len(failures)} of {len(steps)} command(s) failed): {detail}"
            raise DeviceError(getattr(self.inner, "name", "valves"), message)

    def _verify(self, target: Mapping[str, bool]) -> None:
        seen = self.inner.read_back()
        if seen is None:
            return
        wrong = {k: (target[k], seen[k]) for k in target if seen.get(k) is not None and seen[k] != target[k]}
        if wrong:
            word = {True: "open", False: "closed"}
            detail = ", ".join(f"{k}: commanded {word[c]}, reads {word[s]}" for k, (c, s) in wrong.items())
            raise DeviceError(getattr(self.inner, "name", "valves"), f"read-back mismatch ({detail})")

    def safe_state(self) -> dict[str, bool]:
        if self.roles is None:
            raise ValueError("this guard was built without valve roles")
        return safe_state(self, self.roles)

    def reconnect(self) -> None:
        fn = getattr(self.inner, "reconnect", None)
        if fn is not None:
            fn()

    def close(self) -> None:
        self.inner.close()

    def __getattr__(self, item: str) -> Any:  # expose driver extras (ping, name, ...) of the inner bank
        if item == "inner":
            raise AttributeError(item)
        return getattr(self.inner, item)


def safe_state(bank: ValveBank, roles: ValveRoles) -> dict[str, bool]:
    """Assert the safe state (inlet closed first, then every path to vent open); idempotent.

    Every command is tried even if an earlier one fails; DeviceError is raised at the end if any
    did.  Returns the state the board reports (or the commanded state where it cannot tell).
    """
    target = roles.safe_state()
    if isinstance(bank, GuardedValveBank):
        bank.check(target)
        bank._apply_best_effort(safe_order(target, roles))
        if bank.verify:
            bank._verify({**bank.commanded(), **target})
    else:
        failures = apply_steps(bank, safe_order(target, roles), SAFE_STATE_DEADLINE)
        if failures:
            raise DeviceError(getattr(bank, "name", "valves"), f"safe state incomplete: {failures[0][2]}")
    seen = bank.read_back()
    return seen if seen is not None else bank.commanded()


_pending: dict[int, threading.Thread] = {}  # id(bank) -> its latest safe-state worker
_pending_lock = threading.Lock()


def apply_steps(bank: ValveBank, steps: list[tuple[str, bool]], deadline: float) -> list[tuple[str, bool, str]]:
    """Send each (valve, open) step in order, trying every one whatever the one before raised.

    The steps run in a worker thread and the caller waits at most ``deadline`` seconds for all of
    them (not per command): a silent board costs one deadline, not one time-out per valve.  Steps
    the worker has not finished by then are reported as failed and still go on in the background.
    Returns (valve, open, why) for every step that failed or did not finish in time.
    """
    outcome: list[str | None] = ["not attempted before the deadline"] * len(steps)
    t0 = time.monotonic()
    with _pending_lock:
        busy = _pending.get(id(bank))
    if busy is not None and busy.is_alive():  # an earlier attempt still waits on this board: no pile-up
        busy.join(deadline)
        if busy.is_alive():
            return [(name, is_open, "an earlier safe-state attempt is still waiting for the board")
                    for name, is_open in steps]

    def work() -> None:
        for i, (name, is_open) in enumerate(steps):
            outcome[i] = "still waiting for the board at the deadline"
            try:
                bank.set_valves({name: is_open})
            except Exception as exc:  # any failure: log it and go on to the next valve
                log.error("safe state: %s -> %s failed: %s: %s", name, "open" if is_open else "closed",
                          type(exc).__name__, exc)
                outcome[i] = f"{type(exc).__name__}: {exc}"
            else:
                outcome[i] = None

    worker = threading.Thread(target=work, name="safe-state", daemon=True)
    with _pending_lock:
        _pending[id(bank)] = worker
    worker.start()
    worker.join(max(deadline - (time.monotonic() - t0), 0.0))
    if worker.is_alive():
        log.error("safe state: board did not take every command within %.3g s", time.monotonic() - t0)
    return [(name, is_open, why) for (name, is_open), why in zip(steps, list(outcome), strict=True)
            if why is not None]


def safe_order(states: Mapping[str, bool], roles: ValveRoles) -> list[tuple[str, bool]]:
    """Inlet closed first, then the vent opened, then the rest."""
    first = [roles.inlet, roles.vent]
    order = [k for k in first if k in states] + [k for k in states if k not in first]
    return [(k, bool(states[k])) for k in order]
