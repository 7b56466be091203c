"""Hardware tests are opt-in: tests marked `hardware` run only with --hardware."""

from __future__ import annotations

from collections.abc import Iterator

import pytest


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--hardware", action="store_true", default=False,
                     help="run tests marked 'hardware' (need a real instrument attached)")


@pytest.fixture(scope="session", autouse=True)
def _suite_environment(tmp_path_factory: pytest.TempPathFactory) -> Iterator[None]:
    """Set for the whole session, before any module- or class-scoped fixture runs (a function-scoped
    fixture comes too late for those: a module fixture that calibrated on the simulator drew fresh
    noise and failed one run in twenty).

    The simulator draws fresh noise for every instrument unless pinned; the suite pins it, so its
    figures are the same on every run (tests/test_sim_seed.py checks the fresh draws themselves).
    No test writes into the user's real data folder (~/.local/share/pycnoctl), nor claims a device
    in the user's runtime folder (drivers/claims.py)."""
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("PYCNOCTL_SIM_SEED", "1")
        mp.setenv("PYCNOCTL_CLAIMS", str(tmp_path_factory.mktemp("device-claims")))
        mp.setenv("XDG_DATA_HOME", str(tmp_path_factory.mktemp("xdg-data-session")))
        yield


@pytest.fixture(autouse=True)
def _own_data_folder(tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> None:
    """Each test's default data folder is a fresh temporary one unless it sets --data or PYCNOCTL_DATA."""
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path_factory.mktemp("xdg-data")))


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("--hardware"):
        return
    skip = pytest.mark.skip(reason="needs real hardware; run with --hardware")
    for item in items:
        if "hardware" in item.keywords:
            item.add_marker(skip)
