"""Reports and exports an operator reads: the grouped calibration row of the budget, porosity with the
bulk volume's uncertainty, comparing runs (difference, U and En), and the PDF reports.

References: GUM (JCGM 100:2008) propagation, checked against the `uncertainties` package (an outside
implementation of linear propagation with correlations); the En number as ISO 13528 defines it,
|x1 - x2| / U(x1 - x2)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest
from uncertainties import correlated_values, ufloat

from pycnoctl.controller.cli import main as cli
from pycnoctl.controller.cli.compare import shared_covariance


def _out(capsys: pytest.CaptureFixture[str], *argv: str) -> str:
    capsys.readouterr()
    assert cli.main(list(argv)) == 0
    return capsys.readouterr().out


@pytest.fixture
def data(tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> Path:
    """A data folder with a calibration of the simulator (imported, strongly correlated, as a sphere fit
    gives) and three quick-demo runs: two of sample AL-1 on that calibration, one of AL-2."""
    monkeypatch.setenv("COLUMNS", "80")
    d = tmp_path / "data"
    _out(capsys, "calibrations", "import", "--sim", "--expansion-volume", "small", "--cell-volume", "12.0 cm3",
         "--u-cell-volume", "0.006 cm3", "--volume", "8.0 cm3", "--u-volume", "0.005 cm3", "--correlation", "0.95",
         "--note", "test volumes", "--data", str(d))
    for sample, bulk in (("AL-1", None), ("AL-1", None), ("AL-2", "6.0 cm3")):
        args = ["run", "quick-demo", "--sim", "--quiet", "--sample", sample, "--mass", "19.62 g", "--data", str(d)]
        if bulk:
            args += ["--bulk-volume", bulk, "--u-bulk-volume", "0.05 cm3"]
        _out(capsys, *args)
    return d


def _ids(capsys: pytest.CaptureFixture[str], d: Path) -> list[str]:
    rows = json.loads(_out(capsys, "runs", "--data", str(d), "--json"))
    return [r["run_id"] for r in sorted(rows, key=lambda r: r["created"])]


def _summary(d: Path, run_id: str) -> dict:
    doc = json.loads((d / "runs" / run_id / "summary.json").read_text())
    return {**doc, **(doc.get("results") or {})}


def test_the_budget_shows_the_calibration_as_one_row(data: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from pycnoctl.controller.record.report import grouped_budget

    rid = _ids(capsys, data)[0]
    s = _summary(data, rid)
    rows = grouped_budget(s["budget"])
    group = next(r for r in rows if r["kind"] == "calibration_group")
    members = [r for r in rows if r.get("detail")]
    assert [m["name"] for m in members] == ["cell volume Vc", "expansion volume Vr", "covariance Vc, Vr"]
    assert group["share"] == pytest.approx(sum(m["share"] for m in members))
    assert 0.0 < group["share"] < 1.0  # what the calibration costs, unlike its members' shares
    assert max(abs(m["share"]) for m in members) > 1.0  # the members alone baffle (a strong correlation)
    top = [r for r in rows if not r.get("detail")]
    assert sum(r["share"] for r in top if r["share"] is not None) == pytest.approx(1.0, abs=1e-9)
    text = _out(capsys, "show", rid, "--data", str(data))  # at 80 columns the label wraps inside its cell
    assert "calibration (Vc, Vr" in text and "covariance)" in text and "  - cell volume Vc" in text


def test_porosity_carries_the_bulk_volume_uncertainty(data: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rid = _ids(capsys, data)[2]
    s = _summary(data, rid)
    vb = ufloat(6.0e-6, 0.05e-6)  # the bulk volume as given
    vs = ufloat(s["volume_cm3"] * 1e-6, s["volume_u_std_cm3"] * 1e-6)  # the run's skeletal volume, standard u
    phi = 1 - vs / vb
    assert s["porosity"] == pytest.approx(phi.nominal_value, rel=1e-12)
    assert s["porosity_u"] == pytest.approx(2 * phi.std_dev, rel=1e-9)  # expanded, k = 2
    assert s["porosity_u"] > 2 * (vs / 6.0e-6).std_dev  # the bulk volume's u now counts
    text = " ".join(_out(capsys, "show", rid, "--data", str(data)).split())
    assert "bulk volume 6 cm3 +/- 0.05 cm3 (standard u)" in text
    assert cli.main(["run", "quick-demo", "--sim", "--quiet", "--u-bulk-volume", "0.1 cm3", "--data",
                     str(data)]) == 2


def test_the_shared_calibration_covariance_is_what_gum_propagation_gives() -> None:
    # two results Vs = Vc - Vr * y on one calibration: covariance from the shared, correlated Vc and Vr
    u_vc, u_vr, r = 6e-9, 5e-9, 0.95
    vc, vr = correlated_values([12e-6, 8e-6], [[u_vc ** 2, r * u_vc * u_vr], [r * u_vc * u_vr, u_vr ** 2]])
    y1, y2 = 0.8751, 0.8763

    def doc(y: float) -> dict:
        return {"calibration": {"record_id": "C20261204T000000Z-aaaaaa"}, "results": {"budget": [
            {"name": "cell volume Vc", "sensitivity": 1.0, "std_u": u_vc},
            {"name": "expansion volume Vr", "sensitivity": -y, "std_u": u_vr},
            {"name": "covariance Vc, Vr", "value": r * u_vc * u_vr, "std_u": None}]}}

    from uncertainties import covariance_matrix

    expected = covariance_matrix([vc - vr * y1, vc - vr * y2])[0][1]
    assert shared_covariance(doc(y1), doc(y2)) == pytest.approx(expected, rel=1e-12)
    other = doc(y2)
    other["calibration"]["record_id"] = "C20261204T000000Z-bbbbbb"
    assert shared_covariance(doc(y1), other) == 0.0  # different calibrations share nothing here


def test_compare_runs(data: Path, capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    a, b, c = _ids(capsys, data)
    rows = json.loads(_out(capsys, "compare", a, b, c, "--data", str(data), "--json"))
    sa, sb = _summary(data, a), _summary(data, b)
    d = sb["volume_cm3"] - sa["volume_cm3"]
    assert rows[1]["difference_cm3"] == pytest.approx(d, rel=1e-12, abs=1e-15)
    independent = 2 * math.hypot(sa["volume_u_std_cm3"], sb["volume_u_std_cm3"])
    assert rows[1]["shared_calibration"] is True
    assert rows[1]["U_difference_cm3"] < 0.5 * independent  # the shared calibration cancels in d
    assert rows[1]["En"] == pytest.approx(abs(d) / rows[1]["U_difference_cm3"])
    png = tmp_path / "overlay.png"
    text = _out(capsys, "compare", a, b, c, "--data", str(data), "--plot", str(png))
    assert png.stat().st_size > 10_000
    for rid in (a, b, c):
        assert rid in text  # never cut at 80 columns
    assert "En = |d| / U(d)" in " ".join(text.split()) and "(reference)" in text
    assert cli.main(["compare", a, "--data", str(data)]) == 2


def _pdf_text(path: Path) -> str:
    from pypdf import PdfReader

    return " ".join(page.extract_text() for page in PdfReader(str(path)).pages)


def test_pdf_reports_carry_the_result_its_u_and_the_warnings(data: Path, capsys: pytest.CaptureFixture[str],
                                                             tmp_path: Path) -> None:
    rid = _ids(capsys, data)[0]
    s = _summary(data, rid)
    out = Path(_out(capsys, "report", rid, "--pdf", "--data", str(data)).strip())
    assert out.suffix == ".pdf" and out.exists()
    text = " ".join(_pdf_text(out).split())
    assert f"skeletal volume {s['volume_cm3']:.5f} cm3 +/- {s['volume_u_cm3']:.5f} cm3" in text
    assert "SIMULATED" in text and s["calibration"]["record_id"] in text
    assert "Uncertainty budget" in text and "calibration (Vc, Vr and their covariance)" in text
    for w in s["warnings"]:
        assert " ".join(w.split())[:40] in text
    sset = tmp_path / "set.pdf"
    _out(capsys, "report", "--samples", "AL-", "--out", str(sset), "--data", str(data))
    text = " ".join(_pdf_text(sset).split())
    assert "AL-1" in text and "AL-2" in text and "each run's density with its expanded U" in text
    html = Path(_out(capsys, "report", "--samples", "AL-", "--data", str(data)).strip())
    assert "data:image/png;base64," in html.read_text()


def test_a_correlation_row_shows_its_coefficient_without_a_unit() -> None:
    from pycnoctl.controller.record.report import budget_rows

    row = {"name": "correlation T1, T2", "kind": "temperature", "value": 0.716, "std_u": None,
           "sensitivity": None, "contribution": -2e-11, "variance": -4e-22, "share": -0.01}
    (text,) = budget_rows([row])
    assert text[0] == "correlation T1, T2" and text[1].strip() == "0.716" and text[2] == "-"
