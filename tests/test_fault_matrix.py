"""Fault matrix (issue: fail safe on every path): every injected fault in every phase where it matters,
on the simulator, end to end through `pycnoctl run`. Each must end with the simulator's TRUE valves in
the safe state (bar a valve the fault itself holds), the trip latched with the right rule, the record
complete, the catalog row closed, and no traceback. Reaction (fault to trip, samples and ms of
instrument time) is printed per case: run with -s to see the table."""

from __future__ import annotations

import pytest
from fault_matrix import Case, cases, execute, phases, problems

CASES = cases()
_spans: dict[str, dict[str, tuple[float, float]]] = {}


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_fault_matrix(case: Case, monkeypatch: pytest.MonkeyPatch, tmp_path_factory: pytest.TempPathFactory) -> None:
    if case.sequence not in _spans:  # the phases of the same run without a fault, once per sequence
        _spans[case.sequence] = phases(case.sequence, monkeypatch, tmp_path_factory.mktemp("clean"))
    out = execute(case, _spans[case.sequence], monkeypatch, tmp_path_factory.mktemp("fault"))
    print("\n" + out.line())
    assert problems(out) == []


def test_the_matrix_covers_every_fault_of_the_issue() -> None:
    names = {c.name for c in CASES}
    assert names >= {"overpressure ramp", "regulator failure", "frozen sensor", "silent sensor", "nan reading",
                     "garbled reading", "inlet stuck open", "vent stuck closed", "expansion valve leak",
                     "inlet leak in leak check", "unplugged gauge", "unplugged relay board"}
