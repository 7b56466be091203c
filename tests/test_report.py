"""The run report: the PNG read back and measured (phase shading in the right proportions, the trace
line drawn), the HTML's cycle rows and budget; and the sample-set summary."""

from __future__ import annotations

import re
import statistics
from pathlib import Path

import numpy as np
import pytest
from matplotlib import colors
from matplotlib.image import imread

from pycnoctl.controller.domain.states import RunState
from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.report import (
    DPI,
    FIGSIZE,
    TRACE_AXES,
    TRACE_COLOUR,
    gauge_trace,
    phase_look,
    phase_segments,
    render_report,
    render_sample_set,
    report_html,
    sample_set,
)
from pycnoctl.controller.record.runfolder import load_run
from pycnoctl.controller.run.control import Controller
from pycnoctl.drivers.simulated import build_sim_instrument


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("rep")
    cat = Catalog(d / "catalog.sqlite")
    inst = build_sim_instrument(None)
    s = execute(prepare(RunRequest("quick-demo", sample_id="TILE-7", mass=13.2e-3, bulk_volume=5.5e-6), inst),
                Controller(inst), root=d / "runs", catalog=cat)
    cat.close()
    assert s["status"] == "completed"
    return d / "runs" / s["run_id"]


def _axes_pixels(img: np.ndarray) -> np.ndarray:
    h, w = img.shape[:2]
    left, bottom, width, height = TRACE_AXES
    x0, x1 = int(left * w) + 3, int((left + width) * w) - 3
    y0, y1 = int((1 - bottom - height) * h) + 3, int((1 - bottom) * h) - 3
    return img[y0:y1, x0:x1, :3]


def test_png_shows_phases_in_proportion_and_the_trace(run_folder: Path) -> None:
    html = render_report(run_folder)
    png = html.with_suffix(".png")
    img = imread(png)
    assert img.shape[:2] == (int(FIGSIZE[1] * DPI), int(FIGSIZE[0] * DPI))
    px = _axes_pixels(img)
    assert px.std() > 0.05  # not blank
    run = load_run(run_folder)
    t, _ = gauge_trace(run)
    total = t[-1] - t[0]
    share_t: dict[str, float] = {}
    for state, a, b in phase_segments(t, list(run.trace["state"])):
        share_t[state] = share_t.get(state, 0.0) + (b - a) / total
    flat = px.reshape(-1, 3)
    counts = {}
    shading = {s.value: look.colour for s in RunState if (look := phase_look(s.value)) is not None}
    assert len(set(shading.values())) == len(shading)  # one colour per state, or the count below is void
    for state, hexc in shading.items():
        rgb = np.array(colors.to_rgb(hexc))
        counts[state] = int(np.sum(np.all(np.abs(flat - rgb) < 0.01, axis=1)))
    shaded = sum(counts.values())
    assert shaded > 0.6 * len(flat)  # most of the axes is phase shading (the rest: trace line, edges)
    for state in ("purge_fill", "purge_vent", "vent", "baseline", "settle_filled", "settle_expanded"):
        assert state in share_t
        # the share of shaded pixels equals the share of time within 2 percentage points
        assert counts[state] / shaded == pytest.approx(share_t[state], abs=0.02), state
    line = np.array(colors.to_rgb(TRACE_COLOUR))
    n_line = int(np.sum(np.all(np.abs(flat - line) < 0.08, axis=1)))
    assert n_line > px.shape[1]  # a line at least the width of the axes


def test_html_has_cycle_rows_budget_and_result(run_folder: Path) -> None:
    html = render_report(run_folder, run_folder.parent.parent / "out" / "r.html")
    text = html.read_text()
    doc = load_run(run_folder).summary
    res = doc["results"]
    for c in res["cycles"]:
        assert re.search(rf"<tr><td>{c['index']}</td><td>{c['p1_gauge_pa'] / 1e5:.5f}</td>", text)
    for b in res["budget"]:
        assert b["name"] in text
    assert f"{res['volume_cm3']:.5f} cm³" in text and f"{res['density_g_cm3']:.5f} g/cm³" in text
    assert "porosity" in text and "chosen automatically by the advisor" in text
    assert "UNCALIBRATED: no calibration" in text  # the warning of an uncalibrated instrument
    assert "SIMULATED: this result came from the gas-system simulator" in text
    assert "UNCALIBRATED: computed with the nominal volumes" in text
    assert "each known to 0.5 % (k = 1)" in text  # the simulated build's stated nominal uncertainty
    assert "data:image/png;base64," in text and (html.parent / "r.png").exists()
    assert "<link" not in text and "<script" not in text  # self-contained


def test_sample_set_mean_and_spread(tmp_path: Path) -> None:
    cat = Catalog(tmp_path / "c.sqlite")
    data = {"AL-1": [3.9412, 3.9431, 3.9398], "AL-2": [3.9520], "QZ-1": [2.6480, 2.6502]}
    for sample, rhos in data.items():
        for rho in rhos:
            rid = cat.create_run(kind="measure", sample_id=sample, status="running")
            cat.finish_run(rid, "completed", volume_m3=5e-6, u_volume_m3=1e-9, density=rho * 1e3, mass=rho * 5e-3)
    rid = cat.create_run(kind="measure", sample_id="AL-1", status="running")
    cat.finish_run(rid, "fault", message="trip")  # not counted
    stats = {s.sample_id: s.as_dict() for s in sample_set(cat, prefix="AL-")}
    assert set(stats) == {"AL-1", "AL-2"}
    assert stats["AL-1"]["n_runs"] == 3
    assert stats["AL-1"]["mean_density_g_cm3"] == pytest.approx(statistics.fmean(data["AL-1"]))
    assert stats["AL-1"]["sd_density_g_cm3"] == pytest.approx(np.std(data["AL-1"], ddof=1))  # sample s.d.
    assert stats["AL-2"]["sd_density_g_cm3"] is None
    ids = [r.id for r in cat.list_runs(sample="QZ-1")]
    (qz,) = sample_set(cat, run_ids=ids)
    assert qz.n == 2
    out = render_sample_set(sample_set(cat), tmp_path / "set.html")
    text = out.read_text()
    assert "AL-1" in text and "QZ-1" in text and f"{statistics.fmean(data['QZ-1']):.5f}" in text
    assert "(no record to check)" in text  # catalog rows only here: their figures stand, said unchecked


def test_record_text_is_escaped_never_markup(run_folder: Path, tmp_path: Path) -> None:
    # A sample ID or warning is text from an operator or a file: the templates autoescape it.
    run = load_run(run_folder)
    res = dict(run.summary["results"], sample_id="<script>alert(1)</script>", warnings=["a & b <i>"])
    run.summary = dict(run.summary, results=res)
    text = report_html(run, "r.png", b"png")
    assert "<script>" not in text and "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "a &amp; b &lt;i&gt;" in text
