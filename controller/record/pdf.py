"""The run report and the sample-set summary as PDF, for the lab notebook and for mail.

Drawn with matplotlib's PDF backend (already a dependency for the figures): page 1 says the result
with its expanded U, what may be wrong with it (warnings, SIMULATED, UNCALIBRATED, not converged),
the calibration and where the record lives; page 2 is the phase-shaded trace; then the cycles and the
uncertainty budget as tables.  Text is embedded as TrueType (pdf.fonttype 42), so it can be searched
and extracted.  The HTML report stays the richer one; the PDF carries the same figures.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from pycnoctl.controller.record.runfolder import DamagedFile, load_run

A4 = (8.27, 11.69)  # inches
_WRAP = 96  # characters per line of body text at 9 pt


def _figure() -> Any:
    import matplotlib

    matplotlib.use("Agg")
    matplotlib.rcParams["pdf.fonttype"] = 42  # TrueType: the text stays text
    from matplotlib.figure import Figure

    return Figure(figsize=A4)


class _Page:
    """Lines of text down an A4 page, wrapped; a new page when this one is full."""

    def __init__(self, pdf: Any) -> None:
        self.pdf = pdf
        self.fig = _figure()
        self.y = 0.95

    def line(self, text: str, *, size: float = 9.0, bold: bool = False, color: str = "black",
             indent: float = 0.0) -> None:
        for part in textwrap.wrap(text, int(_WRAP * 9.0 / size) - int(indent * 100)) or [""]:
            if self.y < 0.05:
                self.flush()
            self.fig.text(0.07 + indent, self.y, part, fontsize=size, fontweight="bold" if bold else "normal",
                          color=color, family="DejaVu Sans", va="top")
            self.y -= size / 72.0 / A4[1] * 1.45

    def gap(self, lines: float = 0.6) -> None:
        self.y -= lines * 9.0 / 72.0 / A4[1] * 1.45

    def table(self, header: Sequence[str], rows: Sequence[Sequence[str]], widths: Sequence[float]) -> None:
        for row, bold in [(header, True), *[(r, False) for r in rows]]:
            if self.y < 0.05:
                self.flush()
            x = 0.07
            for cell, w in zip(row, widths, strict=False):
                self.fig.text(x, self.y, str(cell), fontsize=7.5, fontweight="bold" if bold else "normal",
                              family="DejaVu Sans Mono", va="top")
                x += w
            self.y -= 7.5 / 72.0 / A4[1] * 1.5

    def flush(self) -> None:
        self.pdf.savefig(self.fig)
        self.fig = _figure()
        self.y = 0.95


def run_report_pdf(run_folder: Path, out: Path | None = None) -> Path:
    """Write the run's PDF report (default report.pdf in the run folder); returns its path."""
    from matplotlib.backends.backend_pdf import PdfPages

    from pycnoctl.controller.record.report import (
        FIGURE_COLUMNS,
        _calibration_rows,
        _choice_text,
        _cycle_rows,
        budget_rows,
        not_drawn,
        render_figure,
    )

    run_folder = Path(run_folder)
    run = load_run(run_folder, trace_columns=FIGURE_COLUMNS)
    if not run.meta:
        # the record is not there, which is not a place the report cannot be written (found by a sweep)
        raise DamagedFile(run_folder / "meta.json", "missing: this is not a run folder")
    out = Path(out) if out is not None else run_folder / "report.pdf"
    doc = run.summary or {}
    res = {**doc, **(doc.get("results") or {})}
    seq = doc.get("sequence") or {}
    k = res.get("k") or 2
    with PdfPages(out, metadata={"Title": f"pycnoctl run {res.get('run_id')}", "Creator": "pycnoctl"}) as pdf:
        page = _Page(pdf)
        page.line(f"Run {res.get('run_id') or run.meta.get('run_id')} - sample {res.get('sample_id') or '-'}",
                  size=15, bold=True)
        page.line(f"status {res.get('status')}; sequence {seq.get('name')} ({seq.get('kind')}); gas {res.get('gas')}; "
                  f"started {res.get('started_utc')}; operator {res.get('operator') or '-'}")
        page.gap()
        from pycnoctl.controller.record.integrity import disagreement_line, folder_disagreements

        disagrees = disagreement_line(folder_disagreements(run_folder, doc)) if run.summary is not None else None
        if disagrees is not None:
            page.line(disagrees, bold=True, color="darkred")
        if res.get("simulated"):
            page.line("SIMULATED: this result came from the gas-system simulator, not from a specimen", bold=True,
                      color="darkred")
        if res.get("calibrated") is False and res.get("volume_cm3") is not None:
            page.line("UNCALIBRATED: computed with the nominal volumes of the instrument config", bold=True,
                      color="darkred")
        page.line("Result", size=12, bold=True)
        if res.get("volume_cm3") is not None:
            page.line(f"skeletal volume {res['volume_cm3']:.5f} cm3 +/- {res['volume_u_cm3']:.5f} cm3 "
                      f"(expanded U, k = {k:g}; standard u {res['volume_u_std_cm3']:.5f} cm3)", size=10.5)
            if res.get("density_g_cm3") is not None:
                page.line(f"skeletal density {res['density_g_cm3']:.5f} g/cm3 +/- {res['density_u_g_cm3']:.5f} g/cm3 "
                          f"(expanded U, k = {k:g}; mass {res.get('mass_g')} g)", size=10.5)
            if res.get("porosity") is not None:
                page.line(f"porosity {100 * res['porosity']:.2f} % +/- {100 * (res.get('porosity_u') or 0):.2f} % "
                          f"(expanded U, k = {k:g})", size=10.5)
            conv = {True: "yes", False: "NO"}.get(res.get("converged"), "not judged")
            rsd = res.get("rsd")
            page.line(f"{res.get('n_kept')} cycles kept; repeatability RSD "
                      f"{'-' if rsd is None else format(100 * rsd, '.4f')} %; converged: {conv}")
        elif res.get("leak_rate_pa_s") is not None:
            page.line(f"leak check {'passed' if res.get('leak_ok') else 'FAILED'}: {res['leak_rate_pa_s']:.3f} Pa/s")
        else:
            page.line("no volume (no kept cycle)")
        if res.get("fault"):
            page.line(f"fault ({res['fault'].get('kind')}): {res['fault'].get('message')}", color="darkred")
        if res.get("abort_reason"):
            page.line(f"aborted: {res['abort_reason']}", color="darkred")
        page.line(f"expansion volume {res.get('expansion_volume')}: {_choice_text(res, seq)}")
        page.gap()
        page.line("Warnings", size=12, bold=True)
        for w in res.get("warnings") or ["none"]:
            page.line(w, color="darkorange" if w != "none" else "black")
        page.gap()
        page.line("Calibration used", size=12, bold=True)
        cal = doc.get("calibration") or {}
        rec = cal.get("record")
        if rec:
            for key, value in _calibration_rows(rec):
                page.line(f"{key}: {value}")
        elif cal:
            cov, vc = cal.get("cov"), cal.get("vc")
            rel = f", each known to {100 * math.sqrt(cov[0][0]) / vc:.3g} % (k = 1) as the config states" \
                if cov and vc else ""
            page.line(f"none (UNCALIBRATED): nominal volumes Vc {cal.get('vc', math.nan) * 1e6:.5f} cm3, Vr "
                      f"{cal.get('vr', math.nan) * 1e6:.5f} cm3 from the instrument config{rel}")
        page.gap()
        page.line("Links", size=12, bold=True)
        page.line(f"run record: {run_folder.absolute()}")
        page.line(f"HTML report: {(run_folder / 'report.html').absolute()} (pycnoctl show "
                  f"{res.get('run_id')} --report)")
        page.flush()

        png = out.with_suffix(".png")
        render_figure(run, png)
        import matplotlib.image as mpimg

        fig = _figure()
        ax = fig.add_axes((0.05, 0.35, 0.9, 0.6))
        ax.imshow(mpimg.imread(png))
        ax.set_axis_off()
        fig.text(0.07, 0.31, "pressure trace shaded by phase; cycle volumes with their u", fontsize=9)
        for i, line in enumerate(not_drawn(doc.get("results") or {})):
            fig.text(0.07, 0.28 - 0.025 * i, f"NOT DRAWN: {line}", fontsize=9, color="darkorange")
        pdf.savefig(fig)

        page = _Page(pdf)
        page.line("Cycles", size=12, bold=True)
        page.table(["cycle", "P1/bar g", "P2/bar g", "T1/degC", "V/cm3", "u/cm3", "kept", "flags"],
                   _cycle_rows(res.get("cycles") or []), [0.06, 0.11, 0.11, 0.09, 0.11, 0.1, 0.06, 0.2])
        page.gap()
        page.line("Uncertainty budget (standard uncertainties; GUM, JCGM 100:2008)", size=12, bold=True)
        page.table(["input", "value", "u", "sensitivity", "contrib/cm3", "share"], budget_rows(res.get("budget") or []),
                   [0.34, 0.14, 0.11, 0.11, 0.1, 0.08])
        page.flush()
    return out


def sample_set_pdf(rows: Sequence[dict[str, Any]], points: Sequence[dict[str, Any]], out: Path, *,
                   title: str, png: Path) -> Path:
    """The sample-set summary as PDF: its table and the plot of each sample's results with their U."""
    from matplotlib.backends.backend_pdf import PdfPages

    with PdfPages(out, metadata={"Title": title, "Creator": "pycnoctl"}) as pdf:
        page = _Page(pdf)
        page.line(title, size=15, bold=True)
        page.line("completed measurement runs; s.d. is the sample standard deviation across runs; each run's "
                  "density with its expanded U (k = 2)")
        page.gap()
        page.table(["sample", "runs", "mean g/cm3", "s.d.", "mean V/cm3", "s.d."],
                   [[r["sample"], r["runs"], r["mean_density"], r["sd_density"], r["mean_volume"], r["sd_volume"]]
                    for r in rows], [0.22, 0.06, 0.14, 0.12, 0.14, 0.12])
        page.gap()
        page.line("Runs", size=12, bold=True)
        page.table(["run", "sample", "density g/cm3", "U g/cm3", "volume cm3", "U cm3"],
                   [[p["run_id"], p["sample_id"], _f(p["density"]), _f(p["U_density"]), _f(p["volume"]),
                     _f(p["U_volume"])] for p in points], [0.27, 0.17, 0.13, 0.11, 0.12, 0.1])
        page.flush()
        import matplotlib.image as mpimg

        fig = _figure()
        ax = fig.add_axes((0.05, 0.45, 0.9, 0.5))
        ax.imshow(mpimg.imread(png))
        ax.set_axis_off()
        pdf.savefig(fig)
    return out


def _f(x: float | None) -> str:
    return "-" if x is None else f"{x:.5f}"
