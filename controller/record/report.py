"""Run reports a colleague can open without the software: one HTML file (inline CSS, figure embedded)
with the figure beside it as a PNG; and a summary across the runs of a sample set.

Why from the run folder alone: the folder is the record (records.py); a report made from it shows
what was measured and computed then, not what the catalog says now.

Figure layout is fixed (TRACE_AXES, CYCLE_AXES in figure fractions) and the phase colours are solid,
so tests - and anyone checking a report - can measure the figure itself.
"""

from __future__ import annotations

import base64
import collections
import datetime as _dt
import math
import statistics
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import jinja2
import numpy as np

from pycnoctl.controller.domain.figures import is_number
from pycnoctl.controller.domain.states import RunState, StateLook
from pycnoctl.controller.maths.results import is_not_a_measurement
from pycnoctl.controller.record.decimate import decimate_minmax
from pycnoctl.controller.record.runfolder import DamagedFile, StoredRun, load_run, read_summary

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


def phase_look(state: str) -> StateLook | None:
    """How a recorded state is shaded (RunState's look); None for idle, the end states and unknown names."""
    try:
        s = RunState(state)
    except ValueError:
        return None
    return None if s.terminal or s is RunState.IDLE else s.look


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


def not_drawn(res: dict[str, Any]) -> list[str]:
    """The volumes of the results block that are there but are not finite numbers, and so are left out of
    the figure (a NaN volume in summary.json ended the report in matplotlib's 'Axis limits cannot be NaN
    or Inf'): said on the report, never dropped without a word."""
    out = []
    v, u = res.get("volume_cm3"), res.get("volume_u_cm3")
    if v is not None and not is_number(v):
        out.append(f"the run's volume is not a finite number ({v!r}): it is not drawn")
    elif v is not None and u is not None and not is_number(u):
        out.append(f"the run's expanded U is not a finite number ({u!r}): the mean is drawn without its band")
    for c in res.get("cycles") or []:
        cv, cu = c.get("volume_cm3"), c.get("u_volume_cm3")
        if cv is not None and not is_number(cv):
            out.append(f"cycle {c.get('index')}: its volume is not a finite number ({cv!r}): it is not drawn")
        elif cv is not None and cu is not None and not is_number(cu):
            out.append(f"cycle {c.get('index')}: its u is not a finite number ({cu!r}): drawn without its error bar")
    return out


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
            look = phase_look(state)
            if look is None or b <= a:
                continue
            ax.axvspan(a, b, facecolor=look.colour, edgecolor="none", linewidth=0)
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
    looks = [RunState(s).look for s in seen]
    handles = [Patch(facecolor=k.colour, edgecolor="#888888", label=k.label) for k in looks]
    if handles:
        fig.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.76, 0.94), fontsize=8, frameon=False,
                   title="phase", title_fontsize=8)
    cx = fig.add_axes(CYCLE_AXES)
    cycles = res.get("cycles") or []
    # only finite numbers are drawn (not_drawn says which are left out); a u that is not one draws no bar
    pts = [(c.get("index"), c["volume_cm3"], c.get("u_volume_cm3") if is_number(c.get("u_volume_cm3")) else 0.0,
            c.get("kept")) for c in cycles if is_number(c.get("volume_cm3"))]
    if pts:
        kept = [q for q in pts if q[3]]
        drop = [q for q in pts if not q[3]]
        for group, face, label in ((kept, TRACE_COLOUR, "kept"), (drop, "white", "discarded")):
            if group:
                cx.errorbar([q[0] for q in group], [q[1] for q in group], yerr=[q[2] or 0.0 for q in group],
                            fmt="o", mfc=face, mec=TRACE_COLOUR, ecolor=TRACE_COLOUR, capsize=3, label=label)
        if is_number(res.get("volume_cm3")):
            v, u = res["volume_cm3"], res.get("volume_u_cm3") if is_number(res.get("volume_u_cm3")) else 0.0
            cx.axhline(v, color="#b03030", linewidth=1, label="run mean")
            cx.axhspan(v - u, v + u, color="#b03030", alpha=0.12, linewidth=0,
                       label=f"± U (k = {res.get('k') or 2:g})")
            lo = min(v - u, *(q[1] - (q[2] or 0.0) for q in pts))
            hi = max(v + u, *(q[1] + (q[2] or 0.0) for q in pts))
            cx.set_ylim(lo - 0.15 * (hi - lo), hi + 0.15 * (hi - lo))
        cx.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)
    from matplotlib.ticker import MaxNLocator

    cx.xaxis.set_major_locator(MaxNLocator(integer=True))
    left_out = not_drawn(res)
    if left_out:  # the PNG is also read on its own, beside the report
        fig.text(0.76, 0.04, f"not drawn: {len(left_out)} volume(s) or u\nthat are not finite numbers",
                 fontsize=8, color="darkorange")
    cx.set_xlabel("cycle")
    cx.set_ylabel("volume / cm³")
    png.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(png, dpi=DPI)
    return png


# ----------------------------------------------------------------------------- HTML

#: Templates with autoescape: every value from a record is text to be escaped, never markup.
_TEMPLATES = jinja2.Environment(
    loader=jinja2.PackageLoader("pycnoctl.controller.record", "templates"),
    autoescape=True,
    undefined=jinja2.StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
)


def _num(x: Any, fmt: str = ".5f") -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return format(float(x), fmt)


_TEMPLATES.filters["num"] = _num

_BUDGET_UNITS = {"pressure": ("Pa", 1.0, ".2f"), "temperature": ("K", 1.0, ".3f"),
                 "calibration": ("cm³", 1e6, ".5f"), "repeatability": ("cm³", 1e6, ".5f")}


def grouped_budget(budget: Sequence[dict[str, Any]]) -> list[dict[str, Any]]:
    """The budget with the calibration's Vc, Vr and their covariance gathered under one row.

    Why: Vc and Vr enter with sensitivities of opposite sign and a strong correlation, so their own
    shares of u^2 can read 380 % and -447 % with the covariance taking most of it back; only their sum
    says what the calibration costs.  The group row carries that sum (its variance and share); the
    members follow it, marked ``detail``, for whoever wants them."""
    members = [b for b in budget if b.get("kind") == "calibration"]
    if len(members) < 2:
        return [dict(b) for b in budget]
    var = sum(float(b.get("variance") if b.get("variance") is not None else (b.get("contribution") or 0.0) ** 2)
              for b in members)
    shares = [b.get("share") for b in members]
    group = {"name": "calibration (Vc, Vr and their covariance)", "kind": "calibration_group", "value": None,
             "std_u": None, "sensitivity": None, "contribution": math.sqrt(max(var, 0.0)), "variance": var,
             "share": sum(x for x in shares if x is not None) if all(x is not None for x in shares) else None}
    out: list[dict[str, Any]] = []
    for b in budget:
        if b is members[0]:
            out.append(group)
            out.extend({**m, "detail": True} for m in members)
        elif b.get("kind") != "calibration":
            out.append(dict(b))
    return out


def budget_rows(budget: Sequence[dict[str, Any]]) -> list[list[str]]:
    """Uncertainty budget rows as text: input, value, u, sensitivity, contribution (cm3), share of u_c^2;
    the calibration's inputs as one group row with its members indented below it."""
    rows = []
    for b in grouped_budget(budget):
        if b.get("kind") == "calibration_group":
            share = b.get("share")
            rows.append([str(b["name"]), "-", "-", "-", _num(b["contribution"] * 1e6, ".3g"),
                         "-" if share is None else f"{100 * share:.1f} %"])
            continue
        unit, scale, fmt = _BUDGET_UNITS.get(b.get("kind", ""), ("", 1.0, ".4g"))
        val = b.get("value")
        is_cov = b.get("std_u") is None and b.get("kind") == "calibration"
        if str(b.get("name", "")).startswith("correlation "):  # a correlation coefficient: no unit
            unit, scale, fmt = "", 1.0, ".3f"
        value = _num(val * scale * (1e6 if is_cov else 1.0), ".4g") + " cm⁶" if is_cov and val is not None else (
            f"{_num(val * scale if val is not None else None, fmt)} {unit}")
        u = "-" if b.get("std_u") is None else f"{_num(b['std_u'] * scale, '.3g')} {unit}"
        share = b.get("share")
        name = ("  - " if b.get("detail") else "") + str(b.get("name"))
        rows.append([name, value, u, _num(b.get("sensitivity"), ".4g"),
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


def _cycle_rows(cycles: Sequence[dict[str, Any]]) -> list[list[str]]:
    return [[str(c["index"]), _num((c.get("p1_gauge_pa") or math.nan) / 1e5),
             _num((c.get("p2_gauge_pa") or math.nan) / 1e5),
             _num(c["t1_k"] - 273.15 if c.get("t1_k") is not None else None, ".2f"), _num(c.get("volume_cm3")),
             _num(c.get("u_volume_cm3")), "yes" if c.get("kept") else "no", ", ".join(c.get("flags") or []) or "-"]
            for c in cycles]


def _calibration_rows(rec: dict[str, Any]) -> list[list[str]]:
    spheres = ", ".join(f"{s.get('label')} ({s.get('spec')})" for s in rec.get("spheres") or [] if s.get("volume"))
    return [
        ["record", str(rec.get("id"))], ["made", str(rec.get("created"))],
        ["operator", str(rec.get("operator") or "-")],
        ["gas", str(rec.get("gas"))],
        ["fill pressure", f"{_num((rec.get('fill_pressure_gauge_pa') or math.nan) / 1e5, '.4f')} bar g"],
        ["temperature", f"{_num((rec.get('temperature_k') or math.nan) - 273.15, '.2f')} °C"],
        ["spheres", spheres or "-"],
        ["cell volume Vc", f"{_num(rec['vc_m3'] * 1e6)} ± {_num(rec['u_vc_m3'] * 1e6)} cm³ (standard)"],
        ["expansion volume Vr", f"{_num(rec['vr_m3'] * 1e6)} ± {_num(rec['u_vr_m3'] * 1e6)} cm³ (standard)"],
        ["fit", f"chi-square {_num(rec.get('chi2'), '.3g')} on {rec.get('dof')} degrees of freedom"],
    ]


def record_problems(run: StoredRun) -> list[str]:
    """What the run folder lacks that the report would show: said on the report, never drawn as empty."""
    out = []
    if not (run.folder / "trace.csv").exists():
        out.append("trace.csv is missing from the run folder: there is no pressure trace to draw")
    elif run.n_samples == 0:
        out.append("trace.csv holds no samples: there is no pressure trace to draw")
    if run.torn_tail:
        out.append("the trace's last line was cut short (the run was stopped mid-write) and is left out")
    if run.summary is not None:
        from pycnoctl.controller.record.integrity import disagreement_line, folder_disagreements

        line = disagreement_line(folder_disagreements(run.folder, run.summary))
        if line is not None:
            out.append(line)
    return out


def report_html(run: StoredRun, png_name: str, png_bytes: bytes) -> str:
    """The run report as one HTML page (the figure embedded)."""
    doc = run.summary or {}
    res = collections.defaultdict(lambda: None, doc.get("results") or {})
    seq = collections.defaultdict(lambda: None, doc.get("sequence") or {})
    cal = doc.get("calibration") or {}
    rec = cal.get("record")
    rsd = res["rsd"]
    return _TEMPLATES.get_template("run_report.html.j2").render(
        run_id=doc.get("run_id") or run.meta.get("run_id"), res=res, seq=seq, status=res["status"] or "unknown",
        software=doc.get("software_version"), k=format(res["k"] or 2, "g"),
        rsd_percent=100 * rsd if rsd is not None else None, choice=_choice_text(res, seq),
        warnings=res["warnings"] or [], png_name=png_name,
        png_data=base64.b64encode(png_bytes).decode("ascii"), cycles=_cycle_rows(res["cycles"] or []),
        record_problems=record_problems(run), not_drawn=not_drawn(doc.get("results") or {}),
        budget=budget_rows(res["budget"] or []), calibration=_calibration_rows(rec) if rec else None,
        nominal={"vc": cal.get("vc", 0) * 1e6, "vr": cal.get("vr", 0) * 1e6,
                 "u_percent": 100 * (cal["cov"][0][0] ** 0.5) / cal["vc"] if cal.get("cov") and cal.get("vc") else None}
        if cal and not rec else None,
    )


def render_report(run_folder: Path, out: Path | None = None) -> Path:
    """Write the run's HTML report (figure embedded, and saved beside it as PNG), or its PDF report when
    ``out`` ends in .pdf; returns the path written."""
    run_folder = Path(run_folder)
    if out is not None and Path(out).suffix.lower() == ".pdf":
        from pycnoctl.controller.record.pdf import run_report_pdf

        return run_report_pdf(run_folder, Path(out))
    run = load_run(run_folder, trace_columns=FIGURE_COLUMNS)
    if not run.meta:
        # the record is not there, which is not a place the report cannot be written (found by a sweep)
        raise DamagedFile(run_folder / "meta.json", "missing: this is not a run folder")
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
    # each run's own result with its expanded U (k = 2), for the plot: (run, density, U, volume, U)
    points: list[dict[str, Any]] = field(default_factory=list)
    # runs whose result no specimen can have ("NOT A MEASUREMENT", run exit 7), whose record is gone, or
    # whose record disagrees with the catalog's figures: not in the means
    left_out: list[str] = field(default_factory=list)
    why_left_out: dict[str, str] = field(default_factory=dict)  # run -> why (default: not a measurement)
    unchecked: list[str] = field(default_factory=list)  # runs in the means whose folder is not here to check

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
                "mean_density_g_cm3": self._mean(d), "sd_density_g_cm3": self._sd(d), "left_out": self.left_out,
                "range_density_g_cm3": (max(d) - min(d)) if d else None,
                "mean_volume_cm3": self._mean(v), "sd_volume_cm3": self._sd(v)}


NO_RECORD = "no record"


def _record_doubt(catalog: Any, row: Any) -> str | None:
    """Why a completed run's catalog figures cannot be taken for a sample's mean: its run folder is gone,
    or its record disagrees with them (record/integrity.py), or None."""
    from pycnoctl.controller.record.integrity import disagreements

    path = getattr(catalog, "path", None)
    if path is None:
        return None
    folder = Path(path).parent / "runs" / (row.folder or row.id)
    if not folder.is_dir():
        return NO_RECORD
    try:
        summary = read_summary(folder / "summary.json")
    except (OSError, ValueError):
        return "record damaged"
    if summary is None:
        return "no summary"
    results = summary.get("results") if isinstance(summary.get("results"), dict) else {}
    return "record disagrees" if disagreements(results, row) else None


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
        if is_not_a_measurement(r.message):  # a wrong volume must not move the mean
            g.left_out.append(r.id)
            continue
        unsure = _record_doubt(catalog, r)
        if unsure == NO_RECORD:  # archived elsewhere, say: its figures stand, said to be unchecked
            g.unchecked.append(r.id)
        elif unsure is not None:  # found by a sweep: an edited catalog volume moved a sample's mean unseen
            g.left_out.append(r.id)
            g.why_left_out[r.id] = unsure
            continue
        g.run_ids.append(r.id)
        if r.density is not None:
            g.densities.append(r.density / 1e3)
        if r.volume_m3 is not None:
            g.volumes.append(r.volume_m3 * 1e6)
        vol, u_vol = r.volume_m3, r.u_volume_m3  # the catalog keeps the expanded U of the volume
        rel = u_vol / vol if vol and u_vol is not None else None
        # the density's U from the volume's relative U: the mass's (0.1 mg on grams) is far below it
        g.points.append({"run_id": r.id, "sample_id": r.sample_id or "",
                         "density": r.density / 1e3 if r.density is not None else None,
                         "U_density": r.density / 1e3 * rel if r.density is not None and rel is not None else None,
                         "volume": vol * 1e6 if vol is not None else None,
                         "U_volume": u_vol * 1e6 if u_vol is not None else None})
    return [groups[k] for k in sorted(groups)]


def render_sample_set(stats: Sequence[SampleStats], out: Path, *, title: str = "sample set") -> Path:
    """The sample set as HTML (a table and the plot of each run's result with its U, embedded), or as PDF
    when ``out`` ends in .pdf; the plot is also saved beside it as PNG."""
    rows = []
    table = []
    for s in stats:
        d = s.as_dict()
        row = [s.sample_id or "(none)", str(s.n), _num(d["mean_density_g_cm3"]), _num(d["sd_density_g_cm3"]),
               _num(d["range_density_g_cm3"]), _num(d["mean_volume_cm3"]), _num(d["sd_volume_cm3"]),
               ", ".join([*(f"{i} (no record to check)" if i in s.unchecked else i for i in s.run_ids),
                          *(f"{i} (left out: {s.why_left_out.get(i, 'not a measurement')})" for i in s.left_out)])]
        rows.append(row)
        table.append({"sample": row[0], "runs": row[1], "mean_density": row[2], "sd_density": row[3],
                      "mean_volume": row[5], "sd_volume": row[6]})
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    png = render_sample_plot(stats, out.with_suffix(".png"))
    if out.suffix.lower() == ".pdf":
        from pycnoctl.controller.record.pdf import sample_set_pdf

        return sample_set_pdf(table, [p for s in stats for p in s.points], out, title=title, png=png)
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    text = _TEMPLATES.get_template("sample_set.html.j2").render(
        title=title, rows=rows, stamp=stamp, png_name=png.name,
        png_data=base64.b64encode(png.read_bytes()).decode("ascii"))
    out.write_text(text, encoding="utf-8")
    return out


def render_sample_plot(stats: Sequence[SampleStats], png: Path) -> Path:
    """Each run's density with its expanded U, grouped by sample, and each sample's mean."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    fig = Figure(figsize=(9, 4), dpi=DPI)
    ax = fig.add_axes((0.1, 0.22, 0.86, 0.7))
    for i, s in enumerate(stats):
        pts = [p for p in s.points if p["density"] is not None]
        if not pts:
            continue
        xs = [i + (j - (len(pts) - 1) / 2) * min(0.6 / max(len(pts), 1), 0.15) for j in range(len(pts))]
        ax.errorbar(xs, [p["density"] for p in pts], yerr=[p["U_density"] or 0.0 for p in pts], fmt="o", ms=3,
                    capsize=2, lw=0.8, color="tab:blue")
        ax.hlines(statistics.fmean(p["density"] for p in pts), i - 0.3, i + 0.3, color="tab:red", lw=1)
    ax.set_xticks(range(len(stats)), [s.sample_id or "(none)" for s in stats], rotation=30, ha="right", fontsize=8)
    ax.set_ylabel("skeletal density / g/cm³")
    ax.set_title("each run with its expanded U (k = 2); red: the sample's mean", fontsize=9)
    ax.grid(alpha=0.3)
    fig.savefig(png)
    return png
