"""A finished run for people: the cycles table and the result in plain words (``run`` and ``show``).

Everything a reader needs to trust the figure is said, not implied: which uncertainty is standard
(u, k = 1) and which expanded (U, k = 2), why each cycle left out was left out, whether the kept cycles
converged, the calibration the volumes come from, and, in one line, when the result came from the
simulator rather than from a specimen.
"""

from __future__ import annotations

from typing import Any

from pycnoctl.controller.cli.display import Column, Units, console, print_table
from pycnoctl.controller.domain.text import visible


def is_simulated(summary: dict[str, Any]) -> bool | None:
    """Whether the run was on the simulator, from whichever field the record carries (None: not said)."""
    for where in (summary, summary.get("instrument") or {}, summary.get("results") or {}):
        v = where.get("simulated") if isinstance(where, dict) else None
        if isinstance(v, bool):
            return v
    return None


def discard_count(summary: dict[str, Any]) -> int:
    parsed = ((summary.get("sequence") or {}).get("parsed") or {})
    return int(((parsed.get("cycles") or {}).get("discard")) or 0)


def converge_rule(summary: dict[str, Any]) -> tuple[int, float] | None:
    parsed = ((summary.get("sequence") or {}).get("parsed") or {})
    conv = (parsed.get("cycles") or {}).get("converge")
    return (int(conv["last"]), float(conv["within"])) if isinstance(conv, dict) else None


def why(c: dict[str, Any], discard: int, outliers: list[int]) -> str:
    """A cycle's place in the result, in a word or three."""
    # imported here: listing runs needs no numpy
    from pycnoctl.controller.maths.results import SETTLED_TOO_SOON, STILL_SETTLING_IN, WARM_UP

    flags = [f for f in c.get("flags") or [] if f]
    extra = f"; {', '.join(flags)}" if flags else ""
    if c.get("kept"):
        if c.get("index") in outliers:
            return "yes (outlier)" + extra
        return "yes" + extra
    if SETTLED_TOO_SOON in flags or STILL_SETTLING_IN in flags:
        return "no (" + "; ".join(flags) + ")"
    if c.get("index", 0) <= discard or WARM_UP in flags:
        rest = [f for f in flags if f != WARM_UP]
        return "no (warm-up)" + (f"; {', '.join(rest)}" if rest else "")
    if c.get("volume_cm3") is None:
        return "no (no volume)" + extra
    return "no" + extra


def cycle_rows(summary: dict[str, Any], units: Units) -> list[list[str]]:
    discard, outliers = discard_count(summary), list(summary.get("outliers") or [])
    return [[str(c["index"]), units.p(c.get("p1_gauge_pa")), units.p(c.get("p2_gauge_pa")),
             _f(c.get("volume_cm3")), _f(c.get("u_volume_cm3")), why(c, discard, outliers)]
            for c in summary.get("cycles") or []]


def cycle_columns(units: Units) -> list[Column]:
    return [Column("cycle", True), Column(f"P1 / {units.p_label}", True, 2), Column(f"P2 / {units.p_label}", True, 2),
            Column("volume / cm3", True), Column("u / cm3 (k=1)", True, 1), Column("kept", False, 0)]


def cycle_records(summary: dict[str, Any], units: Units) -> list[dict[str, Any]]:
    """The cycles for --csv: figures in the display units, named in the headers."""
    discard, outliers = discard_count(summary), list(summary.get("outliers") or [])
    pu = units.pressure
    out = []
    for c in summary.get("cycles") or []:
        p1, p2 = c.get("p1_gauge_pa"), c.get("p2_gauge_pa")
        out.append({"run_id": summary.get("run_id"), "cycle": c["index"],
                    f"p1_gauge_{pu}": None if p1 is None else units.p_value(p1),
                    f"p2_gauge_{pu}": None if p2 is None else units.p_value(p2),
                    "volume_cm3": c.get("volume_cm3"), "u_volume_cm3_standard": c.get("u_volume_cm3"),
                    "kept": bool(c.get("kept")), "note": why(c, discard, outliers), "flags": c.get("flags") or []})
    return out


def cycle_csv_columns(units: Units) -> list[str]:
    pu = units.pressure
    return ["run_id", "cycle", f"p1_gauge_{pu}", f"p2_gauge_{pu}", "volume_cm3", "u_volume_cm3_standard", "kept",
            "note", "flags"]


def result_lines(summary: dict[str, Any], units: Units, *, simulated: bool | None = None) -> list[str]:
    """The result in sentences: what was measured, how well, and what it rests on."""
    lines: list[str] = []
    sim = is_simulated(summary) if simulated is None else simulated
    status = summary.get("status")
    lines.append(f"status: {status}; expansion volume {summary.get('expansion_volume')}; gas {summary.get('gas')}")
    if summary.get("fault"):
        lines.append(f"fault ({summary['fault'].get('kind')}): {summary['fault'].get('message')}")
    if summary.get("abort_reason"):
        lines.append(f"aborted: {summary['abort_reason']}")
    from pycnoctl.controller.maths.results import not_a_measurement

    marked = not_a_measurement(summary["impossible"]) if summary.get("impossible") else None
    k = summary.get("k") or 2.0
    if summary.get("volume_cm3") is not None:
        u_std = summary.get("volume_u_std_cm3")
        std = f"; standard u = {u_std:.5f} cm3" if u_std is not None else ""
        lines.append(f"volume:   {summary['volume_cm3']:.5f} cm3 +/- {summary['volume_u_cm3']:.5f} cm3 "
                     f"(expanded U, k = {k:g}, about 95 % coverage{std})")
        if marked:
            lines.append(marked)
    elif status == "completed" and summary.get("cycles"):  # every cycle ended, none counts: no result
        lines.append(f"volume:   NONE - none of the {len(summary['cycles'])} cycles was kept (the cycles table "
                     "says why each was left out), so this run gives no result")
    if summary.get("density_g_cm3") is not None:
        rho, u_rho = summary["density_g_cm3"] * 1e3, (summary.get("density_u_g_cm3") or 0.0) * 1e3
        lines.append(f"density:  {units.rho(rho)} {units.density} +/- {units.rho(u_rho)} {units.density} "
                     f"(expanded U, k = {k:g}; mass {summary.get('mass_g')} g)")
    if summary.get("porosity") is not None:
        u_phi = summary.get("porosity_u")
        tail = f" +/- {u_phi * 100:.2f} % (expanded U, k = {k:g})" if u_phi is not None else ""
        if summary.get("bulk_volume_cm3") is not None:
            u_b = summary.get("u_bulk_volume_cm3") or 0.0
            tail += (f"; bulk volume {summary['bulk_volume_cm3']:.4g} cm3 " +
                     (f"+/- {u_b:.3g} cm3 (standard u)" if u_b else "taken as exact (no --u-bulk-volume)"))
        lines.append(f"porosity: {summary['porosity'] * 100:.2f} %{tail}")
    n_cycles = len(summary.get("cycles") or [])
    if n_cycles and summary.get("volume_cm3") is not None:
        discard = discard_count(summary)
        kept = summary.get("n_kept")
        rsd = summary.get("rsd")
        first = "the first" if discard == 1 else f"the first {discard}"
        words = f"cycles:   {kept} of {n_cycles} kept" + (f" ({first} discarded as warm-up)" if discard else "")
        from pycnoctl.controller.maths.results import WARM_UP

        settling = [str(c.get("index")) for c in summary.get("cycles") or [] if WARM_UP in (c.get("flags") or [])]
        if settling:
            words += (f" (cycle{'s' if len(settling) > 1 else ''} {', '.join(settling)} left out as warm-up: "
                      "the cycles after agreed and they had not)")
        if rsd is not None:
            words += f"; spread of the kept volumes (RSD) {rsd * 100:.3f} %"
        lines.append(words)
        lines.append("converged: " + converged_words(summary))
        if summary.get("outliers"):
            lines.append(f"outliers: cycle(s) {', '.join(map(str, summary['outliers']))} stand out from the "
                         "others (kept in the mean; look at the trace)")
    if summary.get("leak_rate_pa_s") is not None:
        verdict = "passed" if summary.get("leak_ok") else "FAILED"
        lines.append(f"leak check {verdict}: {summary['leak_rate_pa_s']:.3f} Pa/s")
    cal = calibration_words(summary)
    if cal:
        lines.append(cal)
    if sim:
        lines.append("SIMULATED: this result came from the gas-system simulator, not from a specimen")
    for w in summary.get("warnings") or []:
        if w != marked:  # said above, beside the volume
            lines.append(f"warning: {w}")
    return lines


def converged_words(summary: dict[str, Any]) -> str:
    conv = summary.get("converged")
    rule = converge_rule(summary)
    rule_text = f"last {rule[0]} kept cycles within {rule[1] * 100:g} % of their mean" if rule else ""
    if conv is None:
        return "not judged (the sequence sets no convergence rule)" if not rule else "not judged"
    if conv:
        return f"yes ({rule_text})" if rule_text else "yes"
    return (f"NO: the sequence asks for the {rule_text}, and they were not; the mean is reported, but the "
            "specimen may still be giving off gas or the temperature drifting") if rule_text else "NO"


def calibration_words(summary: dict[str, Any]) -> str:
    rec = (summary.get("calibration") or {}).get("record")
    if rec:
        return f"calibration: {rec.get('id')} of {str(rec.get('created') or '')[:10]} ({rec.get('gas')})"
    if summary.get("calibration") is not None:
        return "calibration: NONE - " + nominal_words(summary["calibration"])
    return ""


def nominal_words(cal: dict[str, Any]) -> str:
    """An uncalibrated run's volumes in words, with the relative uncertainty the config stated."""
    rel = nominal_u(cal)
    tail = f", each known to {100 * rel:.3g} % (k = 1) as the instrument config states" if rel else \
        ", with no uncertainty stated"
    return f"uncalibrated: the nominal volumes of the instrument config{tail}"


def nominal_u(cal: dict[str, Any]) -> float | None:
    """The relative standard uncertainty of a nominal Vc (the config states one figure for all volumes)."""
    cov, vc = cal.get("cov"), cal.get("vc")
    try:
        return (float(cov[0][0]) ** 0.5) / float(vc) if cov and vc else None  # type: ignore[index]
    except (TypeError, ValueError, IndexError, ZeroDivisionError):
        return None


def print_summary(summary: dict[str, Any], folder: Any, units: Units | None = None, *,
                  simulated: bool | None = None, con: Any = None) -> None:
    units = units or Units()
    con = con or console()
    if summary.get("cycles"):
        title = f"run {summary.get('run_id')} - {(summary.get('sequence') or {}).get('name', '')}"
        con.print(title)
        print_table(cycle_columns(units), cycle_rows(summary, units), con=con)
    from pycnoctl.controller.maths.results import NOT_A_MEASUREMENT

    for line in result_lines(summary, units, simulated=simulated):
        style = "bold red" if line.startswith(("fault", "converged: NO", "SIMULATED", NOT_A_MEASUREMENT)) else (
            "yellow" if line.startswith("warning") else None)
        con.print(visible(line), style=style, markup=False, highlight=False)
    con.print(f"record: {folder}", markup=False, soft_wrap=True)  # a path is never folded mid-name


def _f(x: float | None, digits: int = 5) -> str:
    return "-" if x is None else f"{x:.{digits}f}"
