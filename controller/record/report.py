"""Run reports a colleague can open without the software: one HTML file (inline CSS, figure embedded)
with the figure beside it as a PNG; and a summary across the runs of a sample set.

Why from the run folder alone: the folder is the record (records.py); a report made from it shows
what was measured and computed then, not what the catalog says now.

Figure layout is fixed (TRACE_AXES, CYCLE_AXES in figure fractions) and the phase colours are solid,
so tests - and anyone checking a report - can measure the figure itself.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import math
import statistics
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pycnoctl.controller.record.decimate import decimate_minmax
from pycnoctl.controller.record.runfolder import StoredRun, load_run

#: Phase (engine state) -> solid shading colour of the trace plot.
PHASE_COLOURS: dict[str, str] = {
    "purge": "#e6d5f2",
    "vent": "#d9d9d9",
    "baseline": "#f2f2c2",
    "fill": "#f7c9b6",
    "settle_filled": "#fbe3c0",
    "expand": "#bfe3f5",
    "settle_expanded": "#cde9d3",
    "leak_hold": "#f5c6dc",
}
PHASE_LABELS = {"purge": "purge", "vent": "vent", "baseline": "baseline (zero)", "fill": "fill",
                "settle_filled": "settle after fill (P1)", "expand": "expand",
                "settle_expanded": "settle after expansion (P2)", "leak_hold": "leak hold"}
TRACE_COLOUR = "#1f1f7a"
FIGSIZE = (10.0, 6.0)  # inches
DPI = 100
TRACE_AXES = (0.08, 0.40, 0.66, 0.54)  # left, bottom, width, height (figure fractions)
CYCLE_AXES = (0.08, 0.08, 0.66, 0.22)
#: The trace columns the report uses: the others are not kept in memory.
FIGURE_COLUMNS = ("t", "state", "pressure_pa", "pressure_valid", "ambient_pa")
#: Pixel columns of the trace axes: the trace is drawn as min/max per column of this width.
PLOT_COLUMNS = round(FIGSIZE[0] * DPI * TRACE_AXES[2])


# ----------------------------------------------------------------------------- figure


def phase_breaks(states: Sequence[str]) -> np.ndarray:
    """Row indices where a new state begins (after row 0), found in numpy rather than a Python loop."""
    arr = np.asarray(states, dtype=object)
    return np.flatnonzero(arr[1:] != arr[:-1]) + 1


def phase_segments(t: np.ndarray, states: Sequence[str]) -> list[tuple[str, float, float]]:
    """Contiguous runs of one state as (state, start, end); a segment ends where the next begins."""
    out: list[tuple[str, float, float]] = []
    if len(t) == 0:
        return out
    starts = [0, *phase_breaks(states).tolist()]
    stops = [*starts[1:], len(t)]
    for a, b in zip(starts, stops, strict=True):
        end = float(t[b]) if b < len(t) else float(t[-1])
        out.append((str(states[a]), float(t[a]), end))
    return out


def gauge_trace(run: StoredRun) -> tuple[np.ndarray, np.ndarray]:
    """Time (s from the first sample) and gauge pressure (Pa) of the recorded trace."""
    tr = run.trace
    if "t" not in tr or tr["t"].size == 0:
        return np.array([]), np.array([])
    inst = ((run.summary or {}).get("instrument") or {})
    # a new array either way: the record is never changed
    p = tr["pressure_pa"] - tr["ambient_pa"] if inst.get("pressure_is_gauge") is False else tr["pressure_pa"].copy()
    p[tr["pressure_valid"] != "valid"] = np.nan
    return tr["t"] - tr["t"][0], p


def render_figure(run: StoredRun, png: Path) -> Path:
    """The pressure trace shaded by phase, and the cycle volumes with their uncertainties."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    fig = Figure(figsize=FIGSIZE, dpi=DPI)
    ax = fig.add_axes(TRACE_AXES)
    t, p = gauge_trace(run)
    seen: list[str] = []
    if t.size:
        for state, a, b in phase_segments(t, run.trace["state"]):
            colour = PHASE_COLOURS.get(state)
            if colour is None or b <= a:
                continue
            ax.axvspan(a, b, facecolor=colour, edgecolor="none", linewidth=0)
            if state not in seen:
                seen.append(state)
        # min/max per pixel column: the same picture as every sample, at a cost set by the plot's width
        breaks = phase_breaks(run.trace["state"])
        shown = decimate_minmax(t, p, PLOT_COLUMNS, keep=np.concatenate((breaks - 1, breaks)))
        ax.plot(t[shown], p[shown] / 1e5, color=TRACE_COLOUR, linewidth=1.2)
        ax.set_xlim(float(t[0]), float(t[-1]))
        finite = p[np.isfinite(p)]
        if finite.size:
            lo, hi = float(finite.min()) / 1e5, float(finite.max()) / 1e5
            pad = 0.05 * (hi - lo or 1.0)
            ax.set_ylim(lo - pad, hi + pad)
    ax.set_ylabel("pressure / bar (gauge)")
    ax.set_xlabel("time / s")
    res = (run.summary or {}).get("results") or {}
    ax.set_title(f"run {run.meta.get('run_id', '')}  sample {res.get('sample_id') or '-'}", fontsize=10)
    handles = [Patch(facecolor=PHASE_COLOURS[s], edgecolor="#888888", label=PHASE_LABELS.get(s, s)) for s in seen]
    if handles:
        fig.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.76, 0.94), fontsize=8, frameon=False,
                   title="phase", title_fontsize=8)
    cx = fig.add_axes(CYCLE_AXES)
    cycles = res.get("cycles") or []
    pts = [(c["index"], c.get("volume_cm3"), c.get("u_volume_cm3"), c.get("kept")) for c in cycles
           if c.get("volume_cm3") is not None]
    if pts:
        kept = [q for q in pts if q[3]]
        drop = [q for q in pts if not q[3]]
        for group, face, label in ((kept, TRACE_COLOUR, "kept"), (drop, "white", "discarded")):
            if group:
                cx.errorbar([q[0] for q in group], [q[1] for q in group], yerr=[q[2] or 0.0 for q in group],
                            fmt="o", mfc=face, mec=TRACE_COLOUR, ecolor=TRACE_COLOUR, capsize=3, label=label)
        if res.get("volume_cm3") is not None:
            v, u = res["volume_cm3"], res.get("volume_u_cm3") or 0.0
            cx.axhline(v, color="#b03030", linewidth=1, label="run mean")
            cx.axhspan(v - u, v + u, color="#b03030", alpha=0.12, linewidth=0,
                       label=f"± U (k = {res.get('k') or 2:g})")
            lo = min(v - u, *(q[1] - (q[2] or 0.0) for q in pts))
            hi = max(v + u, *(q[1] + (q[2] or 0.0) for q in pts))
            cx.set_ylim(lo - 0.15 * (hi - lo), hi + 0.15 * (hi - lo))
        cx.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)
    from matplotlib.ticker import MaxNLocator

    cx.xaxis.set_major_locator(MaxNLocator(integer=True))
    cx.set_xlabel("cycle")
    cx.set_ylabel("volume / cm³")
    png.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(png, dpi=DPI)
    return png


# ----------------------------------------------------------------------------- HTML

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:2em auto;max-width:70em;color:#222}
h1{font-size:1.4em;margin-bottom:.2em} h2{font-size:1.1em;margin-top:1.6em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;margin:.5em 0} td,th{padding:.2em .7em;border-bottom:1px solid #e4e4e4;
text-align:right} th{background:#f4f4f4} td.l,th.l{text-align:left}
.result{font-size:1.25em;font-weight:600} .warn{background:#fff4d6;border-left:4px solid #e0a800;
padding:.4em .8em;margin:.3em 0} .muted{color:#777} img{max-width:100%}
.status-completed{color:#17682e} .status-fault,.status-aborted,.status-interrupted{color:#a11}
"""


def _e(x: Any) -> str:
    return html.escape("" if x is None else str(x))


def _num(x: Any, fmt: str = ".5f") -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return format(float(x), fmt)


def _table(head: Sequence[str], rows: Iterable[Sequence[str]], left: int = 1) -> str:
    th = "".join(f"<th class='l'>{_e(h)}</th>" if i < left else f"<th>{_e(h)}</th>" for i, h in enumerate(head))
    body = []
    for r in rows:
        body.append("<tr>" + "".join(f"<td class='l'>{c}</td>" if i < left else f"<td>{c}</td>"
                                     for i, c in enumerate(r)) + "</tr>")
    return f"<table><tr>{th}</tr>{''.join(body)}</table>"


_BUDGET_UNITS = {"pressure": ("Pa", 1.0, ".2f"), "temperature": ("K", 1.0, ".3f"),
                 "calibration": ("cm³", 1e6, ".5f"), "repeatability": ("cm³", 1e6, ".5f")}


def budget_rows(budget: Sequence[dict[str, Any]]) -> list[list[str]]:
    """Uncertainty budget rows: input, value, u, sensitivity, contribution (cm3), share of u_c^2."""
    rows = []
    for b in budget:
        unit, scale, fmt = _BUDGET_UNITS.get(b.get("kind", ""), ("", 1.0, ".4g"))
        val = b.get("value")
        is_cov = b.get("std_u") is None and b.get("kind") == "calibration"
        value = _num(val * scale * (1e6 if is_cov else 1.0), ".4g") + " cm⁶" if is_cov and val is not None else (
            f"{_num(val * scale if val is not None else None, fmt)} {unit}")
        u = "-" if b.get("std_u") is None else f"{_num(b['std_u'] * scale, '.3g')} {unit}"
        share = b.get("share")
        rows.append([_e(b.get("name")), value, u, _num(b.get("sensitivity"), ".4g"),
                     _num((b.get("contribution") or 0.0) * 1e6, ".3g"),
                     "-" if share is None else f"{100 * share:.1f} %"])
    return rows


def _choice_text(res: dict[str, Any], seq: dict[str, Any]) -> str:
    choice = res.get("expansion_volume_choice")
    parsed = (seq or {}).get("parsed") or {}
    est = ((parsed.get("expand") or {}).get("sample_estimate"))
    if choice == "auto":
        return ("chosen automatically by the advisor" +
                (f" for an estimated sample volume of {est * 1e6:.3g} cm³" if est else ""))
    if choice == "sequence":
        return "fixed by the sequence"
    if choice == "request":
        return "set for this run (overriding the sequence)"
    return "-"


def report_html(run: StoredRun, png_name: str, png_bytes: bytes) -> str:
    doc = run.summary or {}
    res = doc.get("results") or {}
    seq = doc.get("sequence") or {}
    cal = doc.get("calibration") or {}
    status = res.get("status", "unknown")
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>pycnoctl run "
             f"{_e(doc.get('run_id'))}</title><style>{_CSS}</style></head><body>"]
    parts.append(f"<h1>Run {_e(doc.get('run_id') or run.meta.get('run_id'))} — sample {_e(res.get('sample_id') or '-')}"
                 "</h1>")
    parts.append(f"<p>status <b class='status-{_e(status)}'>{_e(status)}</b> · sequence <b>{_e(seq.get('name'))}</b>"
                 f" ({_e(seq.get('kind'))}) · gas {_e(res.get('gas'))} · started {_e(res.get('started_utc'))} · "
                 f"operator {_e(res.get('operator') or '-')} · software {_e(doc.get('software_version'))}</p>")
    if res.get("note"):
        parts.append(f"<p class='muted'>{_e(res['note'])}</p>")
    parts.append("<h2>Result</h2>")
    if res.get("volume_cm3") is not None:
        k = res.get("k") or 2
        parts.append(f"<p class='result'>skeletal volume {_num(res['volume_cm3'])} cm³ ± "
                     f"{_num(res.get('volume_u_cm3'))} cm³ <span class='muted'>(expanded, k = {k:g}; standard "
                     f"{_num(res.get('volume_u_std_cm3'))} cm³)</span></p>")
        if res.get("density_g_cm3") is not None:
            parts.append(f"<p class='result'>skeletal density {_num(res['density_g_cm3'])} g/cm³ ± "
                         f"{_num(res.get('density_u_g_cm3'))} g/cm³ <span class='muted'>(k = {k:g}; mass "
                         f"{_num(res.get('mass_g'), '.5g')} g)</span></p>")
        if res.get("porosity") is not None:
            parts.append(f"<p class='result'>porosity {100 * res['porosity']:.2f} % ± "
                         f"{100 * (res.get('porosity_u') or 0):.2f} % <span class='muted'>(k = {k:g})</span></p>")
        rsd = res.get("rsd")
        parts.append(f"<p>{res.get('n_kept', '-')} cycles kept; repeatability RSD "
                     f"{_num(100 * rsd if rsd is not None else None, '.4f')} %; converged: "
                     f"{_e(res.get('converged'))}; outliers: {_e(res.get('outliers') or 'none')}</p>")
    elif res.get("leak_rate_pa_s") is not None:
        verdict = "passed" if res.get("leak_ok") else "FAILED"
        parts.append(f"<p class='result'>leak check {verdict}: {_num(res['leak_rate_pa_s'], '.3f')} Pa/s</p>")
    else:
        parts.append("<p>no volume (no kept cycle)</p>")
    if res.get("fault"):
        parts.append(f"<p class='warn'>fault ({_e(res['fault'].get('kind'))}): {_e(res['fault'].get('message'))}</p>")
    if res.get("abort_reason"):
        parts.append(f"<p class='warn'>aborted: {_e(res['abort_reason'])}</p>")
    parts.append(f"<p>expansion volume <b>{_e(res.get('expansion_volume'))}</b>: {_e(_choice_text(res, seq))}</p>")
    parts.append("<h2>Warnings</h2>")
    warnings = res.get("warnings") or []
    parts.append("".join(f"<div class='warn'>{_e(w)}</div>" for w in warnings) or "<p class='muted'>none</p>")
    parts.append("<h2>Pressure trace and cycles</h2>")
    data = base64.b64encode(png_bytes).decode("ascii")
    parts.append(f"<img alt='pressure trace shaded by phase; cycle volumes' src='data:image/png;base64,{data}'>"
                 f"<p class='muted'>figure also saved as {_e(png_name)}</p>")
    cycles = res.get("cycles") or []
    parts.append("<h2>Cycles</h2>")
    parts.append(_table(
        ["cycle", "P1 / bar g", "P2 / bar g", "T1 / °C", "volume / cm³", "u / cm³", "kept", "flags"],
        ([str(c["index"]), _num((c.get("p1_gauge_pa") or math.nan) / 1e5),
          _num((c.get("p2_gauge_pa") or math.nan) / 1e5),
          _num(c["t1_k"] - 273.15 if c.get("t1_k") is not None else None, ".2f"), _num(c.get("volume_cm3")),
          _num(c.get("u_volume_cm3")), "yes" if c.get("kept") else "no", _e(", ".join(c.get("flags") or [])) or "-"]
         for c in cycles), left=0) if cycles else "<p class='muted'>no cycles</p>")
    parts.append("<h2>Uncertainty budget</h2>")
    budget = res.get("budget") or []
    if budget:
        parts.append(_table(["input", "value", "standard u", "sensitivity", "contribution / cm³", "share of u²"],
                            budget_rows(budget)))
        parts.append("<p class='muted'>shares are of the combined variance (a covariance term may be negative); "
                     "GUM, JCGM 100:2008</p>")
    else:
        parts.append("<p class='muted'>no budget</p>")
    parts.append("<h2>Calibration used</h2>")
    rec = cal.get("record")
    if rec:
        spheres = ", ".join(f"{s.get('label')} ({s.get('spec')})" for s in rec.get("spheres") or [] if s.get("volume"))
        parts.append(_table(["", ""], [
            ["record", _e(rec.get("id"))], ["made", _e(rec.get("created"))],
            ["operator", _e(rec.get("operator") or "-")],
            ["gas", _e(rec.get("gas"))],
            ["fill pressure", f"{_num((rec.get('fill_pressure_gauge_pa') or math.nan) / 1e5, '.4f')} bar g"],
            ["temperature", f"{_num((rec.get('temperature_k') or math.nan) - 273.15, '.2f')} °C"],
            ["spheres", _e(spheres or "-")],
            ["cell volume Vc", f"{_num(rec['vc_m3'] * 1e6)} ± {_num(rec['u_vc_m3'] * 1e6)} cm³ (standard)"],
            ["expansion volume Vr", f"{_num(rec['vr_m3'] * 1e6)} ± {_num(rec['u_vr_m3'] * 1e6)} cm³ (standard)"],
            ["fit", f"chi-square {_num(rec.get('chi2'), '.3g')} on {_e(rec.get('dof'))} degrees of freedom"],
        ]))
    elif cal:
        parts.append(f"<p class='warn'>nominal volumes (no calibration record): Vc {_num(cal.get('vc', 0) * 1e6)} cm³, "
                     f"Vr {_num(cal.get('vr', 0) * 1e6)} cm³</p>")
    parts.append("<p class='muted'>made by pycnoctl from the run record</p></body></html>")
    return "".join(parts)


def render_report(run_folder: Path, out: Path | None = None) -> Path:
    """Write the run's HTML report (figure embedded, and saved beside it as PNG); returns the HTML path."""
    run_folder = Path(run_folder)
    run = load_run(run_folder, trace_columns=FIGURE_COLUMNS)
    if not run.meta:
        raise FileNotFoundError(f"{run_folder}: not a run folder (no meta.json)")
    out = Path(out) if out is not None else run_folder / "report.html"
    png = out.with_suffix(".png")
    render_figure(run, png)
    out.write_text(report_html(run, png.name, png.read_bytes()), encoding="utf-8")
    return out


# ----------------------------------------------------------------------------- sample sets


@dataclass
class SampleStats:
    """Completed runs of one sample: mean density and volume and their spread (sample standard deviation)."""

    sample_id: str
    run_ids: list[str] = field(default_factory=list)
    densities: list[float] = field(default_factory=list)  # g/cm3
    volumes: list[float] = field(default_factory=list)  # cm3

    @property
    def n(self) -> int:
        return len(self.run_ids)

    @staticmethod
    def _mean(xs: list[float]) -> float | None:
        return statistics.fmean(xs) if xs else None

    @staticmethod
    def _sd(xs: list[float]) -> float | None:
        return statistics.stdev(xs) if len(xs) >= 2 else None

    def as_dict(self) -> dict[str, Any]:
        d, v = self.densities, self.volumes
        return {"sample_id": self.sample_id, "n_runs": self.n, "run_ids": self.run_ids,
                "mean_density_g_cm3": self._mean(d), "sd_density_g_cm3": self._sd(d),
                "range_density_g_cm3": (max(d) - min(d)) if d else None,
                "mean_volume_cm3": self._mean(v), "sd_volume_cm3": self._sd(v)}


def sample_set(catalog: Any, *, prefix: str | None = None, run_ids: Sequence[str] | None = None) -> list[SampleStats]:
    """Completed measurement runs grouped by sample: those whose sample ID starts with ``prefix``, or
    the runs listed."""
    if run_ids is not None:
        rows = [r for r in (catalog.get_run(i) for i in run_ids) if r is not None]
    else:
        rows = catalog.list_runs(status="completed", kind="measure", sample_prefix=prefix or None, limit=None)
    groups: dict[str, SampleStats] = {}
    for r in sorted(rows, key=lambda r: r.created):
        if r.status != "completed" or r.kind != "measure":
            continue
        g = groups.setdefault(r.sample_id or "", SampleStats(r.sample_id or ""))
        g.run_ids.append(r.id)
        if r.density is not None:
            g.densities.append(r.density / 1e3)
        if r.volume_m3 is not None:
            g.volumes.append(r.volume_m3 * 1e6)
    return [groups[k] for k in sorted(groups)]


def render_sample_set(stats: Sequence[SampleStats], out: Path, *, title: str = "sample set") -> Path:
    """An HTML table of the sample set (mean density per sample and its spread)."""
    rows = []
    for s in stats:
        d = s.as_dict()
        rows.append([_e(s.sample_id or "(none)"), str(s.n), _num(d["mean_density_g_cm3"]), _num(d["sd_density_g_cm3"]),
                     _num(d["range_density_g_cm3"]), _num(d["mean_volume_cm3"]), _num(d["sd_volume_cm3"]),
                     _e(", ".join(s.run_ids))])
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    body = _table(["sample", "runs", "mean density / g/cm³", "s.d. / g/cm³", "range / g/cm³", "mean volume / cm³",
                   "s.d. / cm³", "run IDs"], rows) if rows else "<p class='muted'>no completed runs</p>"
    text = (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{_e(title)}</title>"
            f"<style>{_CSS}</style></head><body><h1>{_e(title)}</h1><p class='muted'>completed measurement runs; "
            f"s.d. is the sample standard deviation across runs; made {stamp}</p>{body}</body></html>")
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    return out

