"""What `calibrations import`, `select` and `retire` take: a gas the project knows, by its own name, and
a note or reason that says something.

Found by a sweep: `import --gas xenon` was stored though `select --gas xenon` is refused; `import --gas
He` was stored as 'He' and never matched a helium run; `retire --reason ''` and `import --note ''` were
taken though both are required.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from pycnoctl.controller.cli.main import main
from pycnoctl.controller.record.catalog import Catalog

VOLUMES = ["--expansion-volume", "small", "--cell-volume", "12.003 cm3", "--u-cell-volume", "0.002 cm3",
           "--volume", "8.004 cm3", "--u-volume", "0.002 cm3"]


def _import(data: Path, *extra: str) -> int:
    return main(["calibrations", "import", "--sim", *VOLUMES, "--data", str(data), *extra])


def _stored(data: Path) -> list:
    if not (data / "catalog.sqlite").exists():
        return []
    with Catalog.for_reading(data / "catalog.sqlite") as cat:
        return cat.list_calibrations(include_retired=True)


def test_an_unknown_gas_is_refused_at_import_and_nothing_is_stored(tmp_path, capsys):
    assert _import(tmp_path, "--gas", "xenon", "--note", "test volumes") == 2
    err = capsys.readouterr().err
    assert "--gas: unknown gas 'xenon'" in err and len(err.strip().splitlines()) == 1
    assert _stored(tmp_path) == []


def test_a_gas_given_by_its_symbol_is_stored_by_its_name_and_used_by_runs_in_it(tmp_path, capsys):
    assert _import(tmp_path, "--gas", "He", "--note", "test volumes") == 0
    (rec,) = _stored(tmp_path)
    assert rec.gas == "helium"
    capsys.readouterr()
    assert main(["run", "quick-demo", "--sim", "--expansion-volume", "small", "--data", str(tmp_path), "--quiet",
                 "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["calibration"]["record_id"] == rec.id


def test_select_stores_the_gas_by_its_name(tmp_path, capsys):
    assert _import(tmp_path, "--note", "test volumes") == 0
    (rec,) = _stored(tmp_path)
    assert main(["calibrations", "select", rec.id, "--sim", "--gas", "N2", "--data", str(tmp_path)]) == 0
    assert "in nitrogen" in capsys.readouterr().out
    with Catalog.for_reading(tmp_path / "catalog.sqlite") as cat:
        chosen = cat.chosen_calibration(rec.instrument, "small", "nitrogen")
    assert chosen is not None and chosen.id == rec.id
    assert main(["calibrations", "select", rec.id, "--sim", "--gas", "xenon", "--data", str(tmp_path)]) == 2


@pytest.mark.parametrize("blank", ["", "   ", "\t"])
def test_a_blank_note_or_reason_is_refused(tmp_path, capsys, blank):
    with pytest.raises(SystemExit) as caught:
        _import(tmp_path, "--note", blank)
    assert caught.value.code == 2 and "--note: must not be blank" in capsys.readouterr().err
    assert _stored(tmp_path) == []
    assert _import(tmp_path, "--note", "test volumes") == 0
    (rec,) = _stored(tmp_path)
    with pytest.raises(SystemExit) as caught:
        main(["calibrations", "retire", rec.id, "--reason", blank, "--data", str(tmp_path)])
    assert caught.value.code == 2 and "--reason: must not be blank" in capsys.readouterr().err
    assert _stored(tmp_path)[0].retired is None
    assert main(["calibrations", "retire", rec.id, "--reason", "valve replaced", "--data", str(tmp_path)]) == 0
    assert "valve replaced" in _stored(tmp_path)[0].retired
