"""What the command line prints, at 80 and 120 columns: no ID or figure cut, u and U named, why a cycle
was left out, convergence, the simulator said in one line; units for people; CSV with the record's fields."""

from __future__ import annotations

import csv
import io
import json
import re
from pathlib import Path

import pytest

from pycnoctl.controller.cli import main as cli
from pycnoctl.controller.cli.display import (
    DENSITY_UNITS,
    PRESSURE_UNITS,
    Column,
    Units,
    fit_columns,
    parse_units,
    print_table,
)
from pycnoctl.controller.cli.main import UsageError
from pycnoctl.controller.cli.result_view import result_lines, why

RUN_ID = re.compile(r"R\d{8}T\d{6}Z-[0-9a-f]{6}")


def test_unit_factors_match_pint_and_scipy() -> None:
    import pint
    from scipy import constants

    ureg = pint.UnitRegistry()
    for unit, factor in PRESSURE_UNITS.items():
        assert factor == pytest.approx(ureg.Quantity(1, unit).to("Pa").magnitude, rel=1e-12), unit
    assert PRESSURE_UNITS["psi"] == pytest.approx(constants.psi, rel=1e-12)  # scipy.constants.psi
    assert DENSITY_UNITS["g/cm3"] == pytest.approx(ureg.Quantity(1, "g/cm**3").to("kg/m**3").magnitude)


def test_units_setting() -> None:
    assert parse_units("kPa,kg/m3") == Units("kPa", "kg/m3")
    assert parse_units("KG/M^3 psi") == Units("psi", "kg/m3")
    assert parse_units("") == Units()
    with pytest.raises(UsageError, match="mmHg"):
        parse_units("mmHg")
    assert Units("kPa").p(109_688.0) == "109.688" and Units().p(None) == "-"


def test_fit_drops_the_least_important_columns_first() -> None:
    cols = [Column("run"), Column("created", priority=3), Column("sample"), Column("volume", True),
            Column("U", True, 1)]
    rows = [["R20261203T165143Z-96995c", "2026-12-03 16:51", "AL-0417", "4.99989", "0.00137"]]
    assert fit_columns(cols, rows, 200).dropped == []
    fitted = fit_columns(cols, rows, 60)
    assert fitted.dropped == ["created"] and fitted.keep == [0, 2, 3, 4]
    assert fit_columns(cols, rows, 20).dropped == ["created", "U"]  # the essential ones stay


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("data")
    for sample in ("AL-0417", "QZ-LONG-SAMPLE-ID-0001"):
        assert cli.main(["run", "grain-volume", "--sim", "--sample", sample, "--mass", "19.62 g",
                         "--operator", "tech-b", "--bulk-volume", "6 cm^3", "--data", str(root), "--quiet",
                         "--json"]) == 0
    return root


def _out(capsys: pytest.CaptureFixture[str], *argv: str) -> str:
    capsys.readouterr()
    assert cli.main(list(argv)) == 0
    return capsys.readouterr().out


@pytest.mark.parametrize("width", [80, 120])
def test_runs_never_cuts_an_id_or_a_figure(data: Path, capsys: pytest.CaptureFixture[str],
                                           monkeypatch: pytest.MonkeyPatch, width: int) -> None:
    monkeypatch.setenv("COLUMNS", str(width))
    rows = json.loads(_out(capsys, "runs", "--data", str(data), "--json"))
    text = _out(capsys, "runs", "--data", str(data))
    assert all(len(line) <= width for line in text.splitlines())
    for r in rows:
        assert r["run_id"] in text and r["sample_id"] in text  # whole, on one line
        assert f"{r['volume_cm3']:.5f}" in text
        if width >= 120:
            assert f"{r['U_volume_cm3']:.5f}" in text
    if width == 80:
        assert "left out to fit 80 columns" in text


def _runs_with_a_long_sample_id(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                monkeypatch: pytest.MonkeyPatch, width: int) -> tuple[str, list[dict], str]:
    """Two runs, one with a 190-character sample ID (the command line allows 200): (the ID, the runs as
    --json gives them, the runs table at ``width`` columns)."""
    long_id = "TILE-" + "0123456789" * 18 + "-END"
    for sample in ("AL-0417", long_id):
        assert cli.main(["run", "quick-demo", "--sim", "--sample", sample, "--data", str(tmp_path), "--quiet",
                         "--json"]) == 0
    monkeypatch.setenv("COLUMNS", str(width))
    rows = json.loads(_out(capsys, "runs", "--data", str(tmp_path), "--json"))
    return long_id, rows, _out(capsys, "runs", "--data", str(tmp_path))


@pytest.mark.parametrize("width", [80, 100])
def test_a_long_sample_id_is_folded_and_never_cuts_the_run_ids(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                                monkeypatch: pytest.MonkeyPatch, width: int) -> None:
    """A 190-character sample ID (the command line allows 200) took the table's width: rich then split
    every run ID over two lines and squeezed the status and volume out.  It is folded at its own column's
    width, every character kept."""
    long_id, rows, text = _runs_with_a_long_sample_id(tmp_path, capsys, monkeypatch, width)
    assert all(len(line) <= width for line in text.splitlines())
    for r in rows:
        assert r["run_id"] in text and f"{r['volume_cm3']:.5f}" in text and "completed" in text
    # the folded ID, read down its column, is the whole ID
    start = next(line for line in text.splitlines() if "TILE-" in line).index("TILE-")
    folded = "".join(line[start:].split(" ")[0] for line in text.splitlines()
                     if len(line) > start and line[start] != " " and "run" not in line[:start] and
                     not line.startswith("(") and line[start - 1] == " ")
    assert long_id in folded


@pytest.mark.parametrize("width", [40, 50, 60])
def test_a_terminal_too_narrow_for_the_table_gets_each_run_as_a_block(tmp_path: Path,
                                                                      capsys: pytest.CaptureFixture[str],
                                                                      monkeypatch: pytest.MonkeyPatch,
                                                                      width: int) -> None:
    """Found by a sweep: at 40-60 columns with a long sample ID the runs table folded run IDs and figures
    ('4.' over '99' over '99'). Where even the essential columns cannot fit, each run is a block of
    'header: value' lines: an ID or a figure whole on its line, a long name folded, nothing left out."""
    long_id, rows, text = _runs_with_a_long_sample_id(tmp_path, capsys, monkeypatch, width)
    lines = text.splitlines()
    assert all(len(line) <= width for line in lines)
    for r in rows:
        assert f"run: {r['run_id']}" in lines
        assert f"volume / cm3: {r['volume_cm3']:.5f}" in lines
    assert lines.count("status: completed") == 2
    assert long_id in "".join(line.strip() for line in lines if ":" not in line or line.startswith("sample:"))


def _stacked(width: int, columns: list[Column], rows: list[list[str]]) -> list[str]:
    from rich.console import Console

    buf = io.StringIO()
    print_table(columns, rows, title="calibrations", con=Console(file=buf, width=width, highlight=False))
    return buf.getvalue().splitlines()


CAL_COLUMNS = [Column("id"), Column("created (UTC)"), Column("Vc / cm3", True), Column("u(Vc)", True),
               Column("retired", priority=5, wrap=True), Column("source", fold=24)]


@pytest.mark.parametrize("width", [30, 40])
def test_a_line_break_in_a_stacked_value_cannot_pass_for_a_figure_or_a_row_end(width: int) -> None:
    """Found by a sweep: in the narrow-terminal blocks an old retire reason 'valve swapped' + line break +
    'Vc / cm3: 99.99999' printed a line just like the row's own Vc figure (and a blank line inside a value
    looked like the next row). Only a header starts at the left margin; a value's line breaks show escaped."""
    rows = [["C0007", "2026-12-05 22:42", "12.34567", "0.00120", "valve swapped\nVc / cm3: 99.99999",
             "OLD-7\nid: C0001"],
            ["C0008", "2026-12-05 22:43", "12.34561", "0.00118", "two lines\n\nthen a gap", "S-8"]]
    lines = _stacked(width, CAL_COLUMNS, rows)
    assert all(len(line) <= width for line in lines)
    headers = tuple(f"{c.header}:" for c in CAL_COLUMNS)
    body = lines[1:]  # after the title
    assert [line for line in body if line.startswith("Vc / cm3:")] == ["Vc / cm3: 12.34567",
                                                                        "Vc / cm3: 12.34561"]
    assert [line for line in body if line.startswith("id:")] == ["id: C0007", "id: C0008"]
    for line in body:  # a value's own lines are indented: no header starts with a space
        assert line == "" or line.startswith(headers) or line.startswith("  "), line
    assert body.count("") == 1  # the one row boundary
    text = "".join(line.strip() for line in body)
    assert "valve swapped\\nVc / cm3: 99.99999".replace(" ", "") in text.replace(" ", "")
    assert "OLD-7\\nid: C0001".replace(" ", "") in text.replace(" ", "")


@pytest.mark.parametrize("width", [18, 24, 30])
def test_a_short_stacked_value_is_never_split(width: int) -> None:
    """Found by a sweep: at 30 columns 'created (UTC): 2026-12-05 22:42' was folded between the date and
    the time. A value that does not fit beside its header goes whole on its own indented line."""
    rows = [["C0007", "2026-12-05 22:42", "12.34567", "0.00120", "", "TILE-" + "0123456789" * 4]]
    lines = _stacked(width, CAL_COLUMNS, rows)
    assert all(len(line) <= width for line in lines)
    i = lines.index("created (UTC):")
    assert lines[i + 1] == "  2026-12-05 22:42"
    assert "Vc / cm3: 12.34567" in lines
    j = lines.index("source:")  # longer than a line: folded, indented, every character kept
    assert "".join(line.strip() for line in lines[j + 1:]) == rows[0][5]


@pytest.mark.parametrize("width", [80, 120])
def test_show_at_terminal_widths(data: Path, capsys: pytest.CaptureFixture[str],
                                 monkeypatch: pytest.MonkeyPatch, width: int) -> None:
    monkeypatch.setenv("COLUMNS", str(width))
    rid = json.loads(_out(capsys, "runs", "--data", str(data), "--json"))[0]["run_id"]
    text = _out(capsys, "show", rid, "--data", str(data))
    lines = [line for line in text.splitlines() if not line.startswith("record: ")]
    assert all(len(line) <= width for line in lines)
    # grain-volume ends once three cycles agree; on the clean bench the first three do, all kept
    assert "warm-up" not in text and len(re.findall(r"^\s+\d+ .* yes\s*$", text, re.M)) == 3
    assert "expanded U, k = 2" in text and "standard u = " in text and "u / cm3" in text
    assert "converged: yes (last 3 kept cycles within 0.1 % of their mean)" in " ".join(text.split())
    assert "porosity:" in text


def test_run_final_table_at_80_columns(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                       monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("COLUMNS", "80")
    text = _out(capsys, "run", "grain-volume", "--sim", "--sample", "AL-0417", "--mass", "19.62 g",
                "--data", str(tmp_path), "--units", "kPa,kg/m3")
    assert all(len(line) <= 80 for line in text.splitlines() if not line.startswith("record: "))
    assert f"record: {tmp_path}" in text  # the path whole, on one line (the terminal may wrap it)
    flat = " ".join(text.split())
    assert "SIMULATED: this result came from the gas-system simulator, not from a specimen" in flat
    assert "P1 / P2 / kPa kPa" in flat and re.search(r" 10\d\.\d{3} ", text)  # P1 of ~1.1 bar shown in kPa
    assert re.search(r"density: 392\d\.\d\d kg/m3 \+/- \d+\.\d\d kg/m3 \(expanded U, k = 2", flat)
    assert "3 of 3 kept; spread" in flat and "warm-up" not in flat  # the first three agreed
    assert RUN_ID.search(text)


def test_result_words_for_a_run_that_did_not_converge() -> None:
    summary = {"status": "completed", "expansion_volume": "small", "gas": "helium", "k": 2.0,
               "volume_cm3": 5.0012, "volume_u_cm3": 0.004, "volume_u_std_cm3": 0.002, "n_kept": 4,
               "rsd": 0.003, "converged": False, "outliers": [5],
               "sequence": {"parsed": {"cycles": {"discard": 2, "converge": {"last": 3, "within": 0.001}}}},
               "cycles": [{"index": i, "kept": i > 2, "volume_cm3": 5.0, "flags": []} for i in range(1, 7)],
               "warnings": ["w1"], "calibration": {"record": None}}
    lines = result_lines(summary, Units(), simulated=False)
    text = "\n".join(lines)
    assert "converged: NO: the sequence asks for the last 3 kept cycles within 0.1 % of their mean, and they " \
           "were not" in text
    assert "outliers: cycle(s) 5" in text and "SIMULATED" not in text
    assert "calibration: NONE - uncalibrated" in text and "warning: w1" in text


def test_result_words_for_cycles_left_out_before_the_agreeing_ones() -> None:
    summary = {"status": "completed", "expansion_volume": "small", "gas": "helium", "k": 2.0,
               "volume_cm3": 5.0012, "volume_u_cm3": 0.004, "volume_u_std_cm3": 0.002, "n_kept": 3,
               "rsd": 0.0003, "converged": True,
               "sequence": {"parsed": {"cycles": {"discard": 0, "converge": {"last": 3, "within": 0.001}}}},
               "cycles": [{"index": i, "kept": i > 2, "volume_cm3": 5.0,
                           "flags": [] if i > 2 else ["warm-up: before the agreeing cycles"]} for i in range(1, 6)],
               "calibration": {"record": None}}
    text = " ".join("\n".join(result_lines(summary, Units(), simulated=False)).split())
    assert "cycles: 3 of 5 kept (cycles 1, 2 left out as warm-up: the cycles after agreed and they had not)" in text
    assert [why(c, 0, []) for c in summary["cycles"]] == ["no (warm-up)"] * 2 + ["yes"] * 3


def test_result_words_for_a_run_whose_cycles_were_all_left_out() -> None:
    # noticed in a sweep: such a run said only "(discarded)" per cycle and nothing where the volume goes
    summary = {"status": "completed", "expansion_volume": "small", "gas": "helium", "k": 2.0,
               "volume_cm3": None, "n_kept": 0,
               "sequence": {"parsed": {"cycles": {"discard": 1}}},
               "cycles": [{"index": 1, "kept": False, "volume_cm3": 5.0, "flags": []},
                          {"index": 2, "kept": False, "volume_cm3": None, "flags": ["unsettled_p2"]}],
               "calibration": {"record": None}}
    text = " ".join("\n".join(result_lines(summary, Units(), simulated=False)).split())
    assert "volume: NONE - none of the 2 cycles was kept (the cycles table says why each was left out), so " \
           "this run gives no result" in text
    assert [why(c, 1, []) for c in summary["cycles"]] == ["no (warm-up)", "no (no volume); unsettled_p2"]
    summary["status"] = "fault"  # a run that stopped early says why in its fault line instead
    assert "volume: NONE" not in " ".join(result_lines(summary, Units(), simulated=False))


def test_runs_csv_carries_the_record(data: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rows = list(csv.DictReader(io.StringIO(_out(capsys, "runs", "--data", str(data), "--csv"))))
    assert len(rows) == 2
    for r in rows:
        assert r["gas"] == "helium" and r["instrument"] and r["operator"] == "tech-b"
        assert r["expansion_volume"] == "small" and r["cycles"] == "3" and r["cycles_kept"] == "3"
        assert r["converged"] == "yes" and 0 < float(r["porosity"]) < 1 and float(r["rsd"]) >= 0
        assert "UNCALIBRATED" in r["warnings"] and r["calibrated"] == "no"
        assert {"simulated", "calibration_id", "U_porosity"} <= set(r)


def test_csv_and_json_of_a_run(data: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rid = json.loads(_out(capsys, "runs", "--data", str(data), "--json"))[0]["run_id"]
    rows = list(csv.DictReader(io.StringIO(_out(capsys, "show", rid, "--data", str(data), "--csv",
                                                "--units", "psi"))))
    assert [r["cycle"] for r in rows] == [str(i) for i in range(1, 4)]  # stopped once three agreed
    assert rows[0]["kept"] == "yes" and rows[0]["note"] == "yes"
    p1 = float(rows[-1]["p1_gauge_psi"])
    in_kpa = list(csv.DictReader(io.StringIO(_out(capsys, "show", rid, "--data", str(data), "--csv",
                                                  "--units", "kPa"))))
    psi = 6894.757293168361  # Pa, scipy.constants.psi
    assert p1 == pytest.approx(float(in_kpa[-1]["p1_gauge_kPa"]) * 1e3 / psi, rel=1e-5)


def test_readme_quick_start_output_is_what_run_prints(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """The README shows the Quick start's output as printed: same lines and words (figures and IDs masked,
    so a better simulator or settle rule changes no README)."""
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    block = readme.split("## Quick start", 1)[1].split("```text\n", 1)[1].split("\n```", 1)[0]
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("PYCNOCTL_DATA", raising=False)
    monkeypatch.delenv("PYCNOCTL_UNITS", raising=False)
    monkeypatch.setenv("COLUMNS", "100")
    text = _out(capsys, "run", "grain-volume", "--sim", "--sample", "AL-0417", "--mass", "19.62g")

    def masked(t: str) -> list[str]:
        t = RUN_ID.sub("RUN", t)
        t = re.sub(r"record: \S*/pycnoctl/runs/", "record: DATA/runs/", t)  # the user's data folder
        return [re.sub(r"\d+(\.\d+)?", "#", line).rstrip() for line in t.splitlines() if line.strip()]

    assert masked(block) == masked(text)
