"""Messages that tell the operator what to do (found by a robustness sweep; each was misleading):
a report that cannot be written in the data folder points to --out; --data naming a file says so;
a vent tolerance below 1 Pa is printed as given, not rounded to '0 Pa'."""

from __future__ import annotations

import errno
import json
from pathlib import Path

import pytest

from pycnoctl.controller.cli import main as cli
from pycnoctl.controller.run.sequence import resolve_sequence


@pytest.fixture
def data(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> Path:
    assert cli.main(["run", "quick-demo", "--sim", "--quiet", "--data", str(tmp_path)]) == 0
    capsys.readouterr()
    return tmp_path


@pytest.mark.parametrize(("err", "code"), [(errno.EROFS, 6), (errno.EACCES, 6), (errno.EISDIR, 2)],
                         ids=["read-only", "no-permission", "a-folder-in-the-way"])
def test_a_report_that_cannot_be_written_beside_the_run_points_to_out(
        data: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch, err: int, code: int) -> None:
    from pycnoctl.controller.record import report

    def refuse(folder: Path, out: Path | None = None) -> Path:
        raise OSError(err, "refused", str(folder / "report.html"))

    monkeypatch.setattr(report, "render_report", refuse)
    run_id = next((data / "runs").iterdir()).name
    for pdf in ([], ["--pdf"]):  # the PDF's default place is beside the run too
        assert cli.main(["report", run_id, "--data", str(data), *pdf]) == code
        message = capsys.readouterr().err
        assert "give --out FILE to write it elsewhere" in message and "report.html" in message


def test_data_naming_a_file_says_so(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    afile = tmp_path / "notes.txt"
    afile.write_text("not a data folder")
    for argv in (["run", "quick-demo", "--sim", "--quiet"], ["runs"], ["calibrations", "list", "--sim"]):
        with pytest.raises(SystemExit) as exc:
            cli.main([*argv, "--data", str(afile)])
        assert exc.value.code == 2
        assert "is a file, not a folder" in capsys.readouterr().err  # was 'File exists' or a traceback


def test_a_vent_tolerance_under_1_pa_is_printed_as_given(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    text = Path(resolve_sequence("quick-demo")).read_text()
    seq = tmp_path / "tight.yaml"
    seq.write_text(text.replace("baseline_tolerance: ", "baseline_tolerance: 0.001 Pa #", 1))
    assert "0.001 Pa" in seq.read_text()
    assert cli.main(["run", str(seq), "--sim", "--quiet", "--json", "--data", str(tmp_path / "d")]) == 3
    summary = json.loads(capsys.readouterr().out)
    assert "tolerance 0.001 Pa" in summary["fault"]["message"]  # was 'tolerance 0 Pa'


def test_a_report_out_place_that_cannot_be_written_is_one_line(data: Path, tmp_path: Path,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    # found by a sweep: each ended "failed: NotADirectoryError / IsADirectoryError" (exit 3)
    run_id = next((data / "runs").iterdir()).name
    afile = tmp_path / "afile"
    afile.write_text("x")
    (tmp_path / "adir").mkdir()
    for out in (afile / "r.html", tmp_path / "adir"):
        assert cli.main(["report", run_id, "--data", str(data), "--out", str(out)]) == 2
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1 and "choose another place" in err, err


def test_show_report_beside_the_run_points_to_its_option(data: Path, capsys: pytest.CaptureFixture[str],
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    from pycnoctl.controller.record import report

    def refuse(folder: Path, out: Path | None = None) -> Path:
        raise OSError(errno.EROFS, "refused", str(folder / "report.png"))

    monkeypatch.setattr(report, "render_report", refuse)
    run_id = next((data / "runs").iterdir()).name
    assert cli.main(["show", run_id, "--data", str(data), "--report"]) == 6
    assert "give --report PATH to write it elsewhere" in capsys.readouterr().err
