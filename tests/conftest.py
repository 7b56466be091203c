"""Hardware tests are opt-in: tests marked `hardware` run only with --hardware."""

from __future__ import annotations

import pytest


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--hardware", action="store_true", default=False,
                     help="run tests marked 'hardware' (need a real instrument attached)")


@pytest.fixture(autouse=True)
def _own_data_folder(tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> None:
    """No test writes into the user's real data folder (~/.local/share/pycnoctl): the default data
    folder of every test is a fresh temporary one unless the test sets --data or PYCNOCTL_DATA."""
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path_factory.mktemp("xdg-data")))


@pytest.fixture(autouse=True)
def _pinned_simulator_noise(monkeypatch: pytest.MonkeyPatch) -> None:
    """The simulator draws fresh noise for every instrument unless pinned; the suite pins it, so its
    figures are the same on every run (tests/test_sim_seed.py checks the fresh draws themselves)."""
    monkeypatch.setenv("PYCNOCTL_SIM_SEED", "1")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if config.getoption("--hardware"):
        return
    skip = pytest.mark.skip(reason="needs real hardware; run with --hardware")
    for item in items:
        if "hardware" in item.keywords:
            item.add_marker(skip)
