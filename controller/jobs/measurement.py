"""One run from request to stored result: the piece shared by ``run``, ``check``, ``calibrate`` and the daemon.

prepare() proves the sequence sound for this instrument before anything moves; execute() drives the
controller to the end of the run and writes the record, the summary and the catalog row.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import math
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pycnoctl.controller.domain.gaspath import ChamberCalibration
from pycnoctl.controller.domain.states import RunState
from pycnoctl.controller.domain.yamlio import ConfigError
from pycnoctl.controller.maths import results
from pycnoctl.controller.maths.advisor import advise
from pycnoctl.controller.maths.settle import resolving_span
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.runfolder import RecordWriteError, RunRecorder, software_version
from pycnoctl.controller.record.storagefault import StorageFault, storage_cause
from pycnoctl.controller.run.control import Controller
from pycnoctl.controller.run.engine import RunEngine, linearity_u
from pycnoctl.controller.run.sequence import Sequence, check_against_instrument, load_sequence, resolve_sequence
from pycnoctl.drivers.instrument import Instrument


def data_dir(explicit: str | Path | None = None) -> Path:
    """Where runs and the catalog live: --data, else $PYCNOCTL_DATA, else the user's data folder
    ($XDG_DATA_HOME/pycnoctl, by default ~/.local/share/pycnoctl).  Never the working directory: a
    default that moves with it scatters one lab's records over as many catalogs as folders it ran in."""
    if explicit or os.environ.get("PYCNOCTL_DATA"):
        return Path(explicit or os.environ["PYCNOCTL_DATA"]).absolute()
    base = os.environ.get("XDG_DATA_HOME") or os.path.join(os.path.expanduser("~"), ".local", "share")
    return Path(base).absolute() / "pycnoctl"


#: g/cm^3: no solid's skeletal density lies outside this (lithium, the least dense solid element, is
#: 0.534 g/cm^3 and osmium, the densest, 22.59 g/cm^3: handbook values, quoted from memory, with margin)
SOLID_DENSITY_G_CM3 = (0.3, 23.0)


MASS_RANGE = (1e-6, 10.0)  # kg: 1 mg to 10 kg, what a pycnometer cell can hold (a wrong unit falls outside)
BULK_RANGE = (1e-8, 1e-3)  # m^3: 0.01 cm^3 to 1 litre


def specimen_problem(mass: float | None, u_mass: float, bulk_volume: float | None,
                     u_bulk_volume: float) -> tuple[str, str] | None:
    """The first thing wrong with what the operator says about the specimen, as (field, message), or
    None.  One set of rules for the command line and the daemon: a negative uncertainty was taken by
    its magnitude on one and refused on the other."""
    if mass is not None and not (math.isfinite(mass) and mass > 0):
        return "mass", "mass must be positive"
    if mass is not None and not MASS_RANGE[0] <= mass <= MASS_RANGE[1]:
        return "mass", (f"mass {mass * 1e3:.6g} g is not a specimen a pycnometer cell holds (give it between "
                        f"{MASS_RANGE[0] * 1e3:g} g and {MASS_RANGE[1] * 1e3:g} g; is the unit right?)")
    if bulk_volume is not None and not (math.isfinite(bulk_volume) and bulk_volume > 0):
        return "bulk_volume", "bulk volume must be positive"
    if bulk_volume is not None and not BULK_RANGE[0] <= bulk_volume <= BULK_RANGE[1]:
        return "bulk_volume", (f"bulk volume {bulk_volume * 1e6:.6g} cm3 is not a specimen's (give it between "
                               f"{BULK_RANGE[0] * 1e6:g} and {BULK_RANGE[1] * 1e6:g} cm3; is the unit right?)")
    if not (math.isfinite(u_mass) and u_mass >= 0):
        return "u_mass", "mass uncertainty must be zero or positive"
    if mass is not None and u_mass >= 0.5 * mass:
        return "u_mass", (f"mass uncertainty {u_mass * 1e3:.6g} g is not below half the mass {mass * 1e3:.6g} g "
                          "(is the unit right?)")
    if not (math.isfinite(u_bulk_volume) and u_bulk_volume >= 0) or (
            u_bulk_volume and (bulk_volume is None or u_bulk_volume >= 0.5 * bulk_volume)):
        return "u_bulk_volume", ("bulk volume uncertainty must be zero or positive, below half the bulk volume, "
                                 "and given with a bulk volume")
    return None


@dataclass
class RunRequest:
    """What the operator asks for; masses in kg, volumes in m^3."""

    sequence: str | Path
    sample_id: str = ""
    mass: float | None = None
    u_mass: float = 0.0
    bulk_volume: float | None = None
    u_bulk_volume: float = 0.0  # standard uncertainty of the bulk volume (0: taken as exact, and said so)
    operator: str = ""
    expansion_volume: str | None = None  # overrides the sequence's choice
    note: str = ""


@dataclass
class PreparedRun:
    request: RunRequest
    sequence: Sequence
    expansion_volume: str
    warnings: list[str] = field(default_factory=list)


def unknown_volume(name: str, names: list[str]) -> str | None:
    """Why ``name`` is no expansion volume of an instrument that has ``names``, or None."""
    if name in names:
        return None
    return f"unknown expansion volume {name!r}; the instrument has: {', '.join(names)}"


def prepare(request: RunRequest, instrument: Instrument, catalog: Catalog | None = None) -> PreparedRun:
    """Load and check the sequence against the instrument; ConfigError lists every problem.

    With a catalog, an automatic expansion-volume choice weighs the calibrated volumes."""
    seq = load_sequence(resolve_sequence(request.sequence))
    names = list(instrument.roles.expansion)
    problems, warnings = check_against_instrument(
        seq, expansion_volumes=names, max_pressure=instrument.limits.max_pressure, gas=instrument.gas,
        sample_period=instrument.sample_period,
    )
    if problems:
        raise ConfigError(problems)
    choice = request.expansion_volume or seq.expand.volume
    if choice == "auto":
        estimate = seq.expand.sample_estimate
        cal = {n: instrument.chambers.for_expansion(n) for n in names}
        if catalog is not None:
            for n in names:
                rec = catalog.latest_calibration(n, seq.gas, instrument.identity)
                if rec is not None:
                    cov = tuple(tuple(float(x) for x in row) for row in (rec.cov or [[0.0, 0.0], [0.0, 0.0]]))
                    cal[n] = ChamberCalibration(rec.vc, rec.vr, cov)  # type: ignore[arg-type]
        volumes = {n: c.vr for n, c in cal.items()}
        cell = sum(c.vc for c in cal.values()) / len(cal)
        if estimate is None or not 0 < estimate < cell:
            choice = max(volumes, key=volumes.__getitem__)
            warnings.append("no usable sample estimate for the advisor; using the largest expansion volume")
        else:
            choice = advise(estimate, cell, volumes, p1_gauge=seq.fill.target, u_p=_settled_u(seq, instrument),
                            cov_cal={n: np.asarray(c.cov, dtype=float) for n, c in cal.items()}).best
    elif (unknown := unknown_volume(choice, names)) is not None:
        raise ValueError(unknown)
    defaults = seq.sample_defaults  # what the command line did not give, the sequence file may
    if request.mass is None and defaults.mass is not None:
        request = dataclasses.replace(request, mass=defaults.mass)
    if request.bulk_volume is None and defaults.bulk_volume is not None:
        request = dataclasses.replace(request, bulk_volume=defaults.bulk_volume)
    return PreparedRun(request, seq, choice, warnings)


def _settled_u(seq: Sequence, instrument: Instrument) -> float:
    """The u a settled pressure will have, for the advisor: the end-point standard error of a regression
    over the settle window of white noise (2 u_p / sqrt(n) for n samples) with the transducer's
    systematic part; the window the engine will use (a fixed drift limit lengthens it on a noisy
    gauge).  The advisor weighs it against each volume's calibration covariance, so its size matters,
    not only its ratio between volumes."""
    settle = seq.settle_expanded
    dt = max(instrument.sample_period, 1e-3)
    window = settle.window
    if settle.max_drift != "auto" and getattr(settle, "max_remainder", None) is None:
        # a fixed limit the noise cannot resolve over the stated window: the engine lengthens it
        n_stated = int(window / dt) + 1
        window = resolving_span(n_stated, dt, window, float(settle.max_drift), instrument.pressure_u,
                                max(window, settle.max_time / 2.0))
    n = max(window / dt, 3.0)
    return math.hypot(2.0 * instrument.pressure_u / math.sqrt(n),
                      linearity_u(instrument.pressure_u, instrument.pressure_u_linearity))


def jsonable(x: Any) -> Any:
    """Plain JSON data from dataclasses, pydantic models, tuples and non-finite floats (as null)."""
    if dataclasses.is_dataclass(x) and not isinstance(x, type):
        return jsonable(dataclasses.asdict(x))
    if isinstance(x, dict):
        return {str(k): jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [jsonable(v) for v in x]
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, (str, int, float, bool)) or x is None:
        return x
    if hasattr(x, "model_dump"):
        return jsonable(x.model_dump(mode="json"))
    return str(x)


def instrument_description(instrument: Instrument) -> dict[str, Any]:
    """What the record keeps about the instrument: enough to recompute the run later."""
    return jsonable({
        "name": instrument.name,
        "identity": instrument.identity,
        "fingerprint": instrument.fingerprint,
        "simulated": instrument.simulated,
        "gas": instrument.gas,
        "roles": instrument.roles,
        "chambers": instrument.chambers,
        # an optional limit left unset (no supply gauge) is left out of the record
        "limits": instrument.limits.model_dump(exclude_none=True),
        "pressure_is_gauge": instrument.pressure_is_gauge,
        "pressure_u": instrument.pressure_u,
        "pressure_u_linearity": instrument.pressure_u_linearity,
        "temperature_u": instrument.temperature_u,
        "barometer": instrument.barometer is not None,
        "thermometer": instrument.thermometer is not None,
        "barometer_u": instrument.barometer_u,
        "ambient_drift_rate": instrument.ambient_drift_rate,
        "sample_period": instrument.sample_period,
        "config": instrument.extras.get("config"),
        # the simulator's noise realisation: `--seed` with this number replays the run exactly
        "sim_seed": getattr(instrument.extras.get("sim"), "seed", None),
    })


#: What a recomputation of a run's trace takes of its instrument (record/replay.py's reanalyze): kept in
#: meta.json from the run's start as well as in summary.json at its end, so that a run killed before its
#: summary was written can still be recomputed.
REPLAY_FACTS = ("gas", "pressure_is_gauge", "pressure_u", "pressure_u_linearity", "temperature_u", "barometer",
                "barometer_u", "ambient_drift_rate", "thermometer")


def replay_facts(instrument: Instrument) -> dict[str, Any]:
    """The instrument's REPLAY_FACTS, taken from the same description the summary keeps (one source)."""
    description = instrument_description(instrument)
    return {key: description[key] for key in REPLAY_FACTS}


def start_meta(prepared: PreparedRun, instrument: Instrument) -> dict[str, Any]:
    """What meta.json keeps from the run's start: who and what, and everything a recomputation of the
    trace needs (the sequence text, the instrument's facts, the gas, the calibration record the run
    computes with, None for the config's nominal volumes, and the chamber volumes themselves with their
    covariance, as the summary keeps them).  meta.json is written once, before anything moves;
    summary.json comes only at the end, and a killed run has none."""
    seq, req = prepared.sequence, prepared.request
    cal = instrument.chambers.for_expansion(prepared.expansion_volume)
    return jsonable({
        "sample_id": req.sample_id, "sequence": seq.name, "operator": req.operator,
        "expansion_volume": prepared.expansion_volume,
        "sequence_text": seq.raw_text or "",
        "gas": seq.gas,
        "mass_g": req.mass * 1e3 if req.mass else None,
        "calibration_id": cal.record_id,
        # the volumes themselves: a run on the nominal ones is then recomputed with no volumes typed in
        "calibration": cal,
        "instrument": replay_facts(instrument),
    })


@dataclass
class Outcome:
    """A run's measured result in SI units: the engine's finished cycles and the result over them."""

    cycles: list[results.CycleResult]
    result: results.RunResult | None


def outcome(prepared: PreparedRun, engine: RunEngine) -> Outcome:
    """The cycles as the engine's measurer finished them (never recomputed) and the run result."""
    seq, req = prepared.sequence, prepared.request
    cycles = results.agreeing_only(engine.cycle_results(), seq.cycles.converge if seq.expands else None)
    res = results.run_result(cycles, converge=seq.cycles.converge, mass=req.mass, u_mass=req.u_mass) \
        if seq.expands else None
    return Outcome(cycles, res)


def summarize(run_id: str, prepared: PreparedRun, engine: RunEngine, instrument: Instrument, *,
              started: float, ended: float, t0: float, t1: float, done: Outcome | None = None) -> dict[str, Any]:
    """The run summary: status, result with uncertainty, every cycle, and everything used to get it
    (the stored form: volumes in cm3 for people, as summary.json has always had them)."""
    seq = prepared.sequence
    req = prepared.request
    done = done or outcome(prepared, engine)
    cycles, res = done.cycles, done.result
    status = {RunState.DONE: "completed", RunState.FAULT: "fault", RunState.ABORTED: "aborted"}.get(
        RunState(engine.state), "interrupted")
    cal = instrument.chambers.for_expansion(prepared.expansion_volume)
    out: dict[str, Any] = {
        "run_id": run_id,
        "status": status,
        "sample_id": req.sample_id,
        "operator": req.operator,
        "note": req.note,
        "sequence": {"name": seq.name, "kind": seq.kind, "file": str(seq.path) if seq.path else None,
                     "text": seq.raw_text, "parsed": seq.model_dump(mode="json")},
        "instrument": instrument_description(instrument),
        "calibration": jsonable(cal),
        "calibrated": cal.record_id is not None,
        "simulated": instrument.simulated,
        "software": {"name": "pycnoctl", "version": software_version()},
        "gas": seq.gas,
        "expansion_volume": prepared.expansion_volume,
        "expansion_volume_choice": "request" if req.expansion_volume else (
            "auto" if seq.expand.volume == "auto" else "sequence"),
        "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(started)),
        "ended_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(ended)),
        "instrument_time_s": t1 - t0,
        "wall_time_s": ended - started,
        "warnings": list(prepared.warnings) + list(engine.warnings),
        "fault": {"kind": engine.fault_kind, "message": engine.reason} if engine.state == RunState.FAULT else None,
        "abort_reason": engine.reason if engine.state == RunState.ABORTED else None,
        "cycles": [c.as_dict() for c in cycles],
        "mass_g": req.mass * 1e3 if req.mass else None,
        "volume_cm3": None, "volume_u_cm3": None, "volume_u_std_cm3": None, "k": None,
        "density_g_cm3": None, "density_u_g_cm3": None, "converged": None, "impossible": None,
    }
    if seq.kind == "leak_check":
        rates = [c.leak_rate_pa_s for c in engine.cycles if math.isfinite(c.leak_rate_pa_s)]
        out["leak_rate_pa_s"] = rates[-1] if rates else None
        # two-sided: a fall is gas leaving, a rise is gas coming in past the closed inlet
        out["leak_ok"] = bool(rates) and abs(rates[-1]) <= seq.leak_check.max_rate
    if res is not None:
        out.update({
            "volume_cm3": res.volume_m3 * 1e6, "volume_u_cm3": res.U_volume_m3 * 1e6,
            "volume_u_std_cm3": res.u_volume_m3 * 1e6, "k": res.k, "sd_cm3": res.sd_m3 * 1e6,
            "rsd": res.rsd, "converged": res.converged, "outliers": res.outliers, "n_kept": res.n_kept,
            "budget": jsonable(res.as_dict()["budget"]),
        })
        if res.density_kg_m3 is not None:
            out["density_g_cm3"] = res.density_kg_m3 / 1e3
            out["density_u_g_cm3"] = (res.U_density_kg_m3 or 0.0) / 1e3
            lo, hi = SOLID_DENSITY_G_CM3
            if not lo <= out["density_g_cm3"] <= hi:
                out["warnings"].append(
                    f"density {out['density_g_cm3']:.4g} g/cm3 lies outside any solid's ({lo:g}-{hi:g} g/cm3): "
                    "check the mass and its unit, and the sample volume")
        impossible = results.outside_cell(res.volume_m3, res.U_volume_m3, cal.vc)
        out["impossible"] = impossible
        if impossible:
            out["warnings"].append(results.not_a_measurement(impossible))
        if req.bulk_volume and res.volume_m3 > 0:
            from pycnoctl.controller.maths.uncertainty import porosity

            phi, u_phi = porosity(req.bulk_volume, req.u_bulk_volume, res.volume_m3, res.u_volume_m3)
            out["porosity"], out["porosity_u"] = phi, res.k * u_phi
            out["bulk_volume_cm3"], out["u_bulk_volume_cm3"] = req.bulk_volume * 1e6, req.u_bulk_volume * 1e6
            if phi + res.k * u_phi < 0:
                out["warnings"].append(
                    f"porosity {100 * phi:.2f} % is below zero beyond its U: the bulk volume "
                    f"{req.bulk_volume * 1e6:.4g} cm3 is smaller than the grain volume {res.volume_m3 * 1e6:.4g} cm3, "
                    "which no specimen can be; check the bulk volume, its unit and that it is of this specimen")
            elif phi < 0:
                out["warnings"].append(f"porosity {100 * phi:.2f} % is below zero but within its U of it: no open "
                                       "porosity found")
    return jsonable(out)




def execute(prepared: PreparedRun, controller: Controller, *, root: Path, catalog: Catalog,
            run_id: str | None = None, should_stop: Callable[[], bool | str] = lambda: False,
            max_duration: float | None = None) -> dict[str, Any]:
    """Drive one run to its end on the controller; returns the summary that was stored.

    A storage fault (disk full, EIO, read-only media) before the run moves any gas raises
    StorageFault with the catalog row closed where it could be written; after that, every
    bookkeeping step is attempted on its own and what could not be saved is in the summary."""
    inst = controller.instrument
    seq = prepared.sequence
    req = prepared.request
    cal_use = None
    if seq.kind == "measure":  # this instrument's calibration of the volume and gas, or the stated nominal
        from pycnoctl.controller.jobs.calibration_use import CalibrationRefused, settle_mismatch, use_latest_calibration

        try:
            cal_use = use_latest_calibration(inst, catalog, expansion_volume=prepared.expansion_volume,
                                             gas=seq.gas, fill_target=seq.fill.target)
        except CalibrationRefused as exc:  # nothing has moved; a queued row is closed with the reason
            if run_id is not None:
                with contextlib.suppress(Exception):
                    catalog.finish_run(run_id, "aborted", message=f"refused: {exc}")
            raise
        prepared.warnings.extend(cal_use.warnings)
        prepared.warnings.extend(settle_mismatch(cal_use.record, seq))
    meta = start_meta(prepared, inst)  # before the catalog row: a failure here leaves no row 'running'
    try:
        if run_id is None:
            run_id = catalog.create_run(kind=seq.kind, sample_id=req.sample_id, sequence_name=seq.name,
                                        status="running")
        else:  # issued earlier (the daemon's queue): it moves from queued to running now
            catalog.update_status(run_id, "running")
    except Exception as exc:
        cause = storage_cause(exc)
        if cause is None:
            raise
        raise StorageFault(f"the catalog cannot be written ({cause}: {exc}); the run did not start, "
                           "the instrument is in the safe state") from exc
    try:
        recorder = RunRecorder(root, run_id, inst.valves.valve_names, meta=meta)
    except RecordWriteError as exc:  # nothing has moved: close the row and say why
        message = f"write_error: run record not created ({storage_cause(exc) or 'write failed'}): {exc}"
        with contextlib.suppress(Exception):  # the catalog may be on the same full disk: the next writer closes it
            catalog.finish_run(run_id, "fault", message=message)
        raise StorageFault(f"run {run_id}: {message}; the run did not start, the instrument is in the safe state"
                           ) from exc
    engine = RunEngine(seq, inst, expansion_volume=prepared.expansion_volume)
    started, t0 = time.time(), inst.clock.now()
    try:
        for w in prepared.warnings:
            recorder.event("warning", t0, w)
            controller.notify("warning", {"t": t0, "message": w})  # the daemon's run view and a live terminal
        controller.start(engine, recorder)
        controller.run_until_done(should_stop, max_duration)
    except Exception as exc:  # outside a tick (the stop check, the clock): the same guarded path
        _fail_outside_tick(controller, engine, recorder, exc)
    finally:
        if not engine.terminal:  # KeyboardInterrupt and the like: safe state, then keep what we have
            inst.safe_state()
            engine.request_abort("controller stopped", inst.clock.now())
        # a write that failed on the last tick, after the run had ended: the trip came too late to fault it
        late_loss = controller.monitor.latched \
            if controller.recorder is not recorder and engine.state == RunState.DONE else None
        controller.engine = None
        controller.recorder = None
        try:
            done = outcome(prepared, engine)
            summary = summarize(run_id, prepared, engine, inst, started=started, ended=time.time(),
                                t0=t0, t1=inst.clock.now(), done=done)
        except Exception as exc:  # no summary at all: the row must not stay 'running'; say what was lost
            _close_after_bookkeeping_error(catalog, recorder, run_id, engine, exc)
            raise RunFault(run_id, f"run {run_id}: {type(exc).__name__} while storing the run: {exc}; "
                                   "the instrument is in the safe state, the record may be incomplete") from exc
        _store(summary, done, prepared, recorder, catalog, cal_use, inst,
               late_loss=f"end of the run record ({late_loss.message})" if late_loss is not None else None)
    return summary


def _store(summary: dict[str, Any], done: Outcome, prepared: PreparedRun, recorder: RunRecorder, catalog: Catalog,
           cal_use: Any, inst: Instrument, *, late_loss: str | None = None) -> None:
    """Every bookkeeping step on its own: one that fails (a full disk, say) must not keep the next
    from being tried.  What was not saved goes into the summary, the row's message and, if it can
    still be written, the run's events; the row is closed as a fault."""
    seq = prepared.sequence
    run_id = summary["run_id"]
    lost: list[str] = []
    failures: list[BaseException] = []
    before = (summary["status"], summary["fault"])
    if late_loss is not None:
        lost.append(late_loss)
        failures.append(RecordWriteError(late_loss, recorder.folder))
        _mark_not_saved(summary, lost, failures, before)

    def attempt(what: str, step: Callable[[], Any]) -> None:
        try:
            step()
        except Exception as exc:
            failures.append(exc)
            cause = storage_cause(exc)
            lost.append(f"{what} ({cause})" if cause else f"{what} ({type(exc).__name__} while storing "
                                                           f"the run: {exc})")
            _mark_not_saved(summary, lost, failures, before)  # before summary.json is written: it says so too

    def late_warnings() -> None:
        late = cal_use.after_run(summary)
        summary["warnings"].extend(late)
        summary["calibration"]["record"] = jsonable(cal_use.describe())
        for w in late:
            recorder.event("warning", inst.clock.now(), w)

    if cal_use is not None:
        attempt("calibration check", late_warnings)
    attempt("cycles.csv", lambda: recorder.write_cycles([_cycle_record(c) for c in summary["cycles"]]))

    def write_summary() -> None:
        recorder.write_summary(
            sequence=summary["sequence"], sequence_text=seq.raw_text or "",
            instrument=summary["instrument"], calibration=summary["calibration"],
            results={k: v for k, v in summary.items() if k not in ("sequence", "instrument", "calibration")},
        )

    attempt("summary.json", write_summary)
    attempt("trace/events final flush", recorder.close)
    attempt("catalog cycles", lambda: catalog.add_cycles(  # SI, straight from the cycle results
        run_id, [(c.index, _si(c.p1_gauge_pa), _si(c.p2_gauge_pa), _si(c.volume_m3), c.kept)
                 for c in done.cycles]))
    if lost:
        with contextlib.suppress(Exception):  # on a disk that is still full this fails too
            _note_after_close(recorder, "not saved: " + "; ".join(str(f) for f in failures), "write_error" if any(
                storage_cause(f) for f in failures) else type(failures[0]).__name__)
    req = prepared.request
    message = (summary["fault"] or {}).get("message") or summary["abort_reason"] or (
        results.not_a_measurement(summary["impossible"]) if summary.get("impossible") else None)
    try:
        res = done.result
        catalog.finish_run(run_id, summary["status"], volume_m3=_si(res.volume_m3) if res else None,
                           u_volume_m3=_si(res.U_volume_m3) if res else None,  # the expanded U, as always
                           density=_si(res.density_kg_m3) if res and res.density_kg_m3 else None,
                           mass=req.mass, message=message, calibration_id=summary["calibration"].get("record_id"))
        return
    except Exception as exc:
        failed: Exception = exc
        why = f"catalog row ({storage_cause(exc) or f'{type(exc).__name__}: {exc}'})"
    failures.append(failed)
    try:  # the short form: only the status and why
        catalog.finish_run(run_id, "fault", message=f"{message or 'run ended'}; then not saved: {why}")
        lost.append(why)
    except Exception:  # the catalog cannot be written at all: the next writer marks the row interrupted
        lost.append(why + "; it stays 'running' until the next writer marks it interrupted")
    _mark_not_saved(summary, lost, failures, before)
    with contextlib.suppress(Exception):
        _note_after_close(recorder, f"not saved: {why}", "write_error")


def _mark_not_saved(summary: dict[str, Any], lost: list[str], failures: list[BaseException],
                    before: tuple[str, dict[str, Any] | None]) -> None:
    """The summary says what was not saved; a run that had not failed otherwise becomes a fault
    (write_error for a storage fault, exception for anything else)."""
    status, fault = before
    text = "not saved: " + ", ".join(lost)
    summary["not_saved"] = list(lost)
    summary["warnings"] = [w for w in summary["warnings"] if not w.startswith("not saved: ")] + [text]
    summary["status"] = "fault"
    if status == "fault" and fault:
        summary["fault"] = {**fault, "message": f"{fault['message']}; then {text}"}
    else:
        kind = "write_error" if any(storage_cause(f) or isinstance(f, RecordWriteError) for f in failures) \
            else "exception"
        summary["fault"] = {"kind": kind, "message": f"run {status}, but {text}"}


class RunFault(Exception):
    """A run that could not be brought to a stored end; its catalog row is closed as a fault."""

    def __init__(self, run_id: str, message: str) -> None:
        super().__init__(message)
        self.run_id = run_id


def _fail_outside_tick(controller: Controller, engine: RunEngine, recorder: RunRecorder, exc: Exception) -> None:
    """An exception from the run loop itself (not a tick): safe state, the record, the run a fault."""
    t = controller.last.t if controller.last is not None else math.nan
    if controller.engine is engine:
        controller.fail(exc, "run loop", t)
        return
    controller.instrument.safe_state()  # the run never began (refused at start): still say why
    message = f"{type(exc).__name__} in run start: {exc}"
    with contextlib.suppress(Exception):  # the catalog row still says it
        recorder.event("exception", t, message, type=type(exc).__name__, where="run start")
    engine.to_fault("write_error" if storage_cause(exc) else "exception", message, t)


def _close_after_bookkeeping_error(catalog: Catalog, recorder: RunRecorder, run_id: str, engine: RunEngine,
                                   exc: Exception) -> None:
    """Best effort: note the failure in the record, close the recorder, close the catalog row as a fault."""
    message = f"{type(exc).__name__} while storing the run: {exc}"
    if engine.state == RunState.FAULT:
        message = f"{engine.fault_kind}: {engine.reason}; then {message}"
    for step in (lambda: _note_after_close(recorder, message, type(exc).__name__),
                 recorder.close,
                 lambda: catalog.finish_run(run_id, "fault", message=message)):
        with contextlib.suppress(Exception):  # each step on its own: one failing must not keep the row open
            step()


def _note_after_close(recorder: RunRecorder, message: str, kind: str) -> None:
    """The exception into events.jsonl, even if the recorder was closed already (one appended line)."""
    try:
        recorder.event("exception", None, message, type=kind, where="bookkeeping")
        return
    except Exception:  # closed or broken: append the line directly
        pass
    line = json.dumps({"kind": "exception", "t": None, "wall": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                       "message": message, "type": kind, "where": "bookkeeping"})
    with open(recorder.events_path, "a", encoding="utf-8") as fh:
        fh.write(line + "\n")
        fh.flush()
        os.fsync(fh.fileno())


def _cycle_record(c: dict[str, Any]) -> dict[str, Any]:
    """A summary cycle as a row of cycles.csv (NaN where a value is missing)."""
    nan = float("nan")

    def f(key: str) -> float:
        v = c.get(key)
        return nan if v is None else float(v)

    return {"index": c["index"], "baseline_pa": f("baseline_pa"), "p1_pa": f("p1_gauge_pa"),
            "p2_pa": f("p2_gauge_pa"), "t1": f("t1_k"), "t2": f("t2_k"), "settle1_s": f("settle1_s"),
            "settle2_s": f("settle2_s"), "drift1_pa_s": f("drift1_pa_s"), "drift2_pa_s": f("drift2_pa_s"),
            "volume_m3": f("volume_m3"), "u_volume_m3": f("u_volume_m3"), "flags": c.get("flags", []),
            "kept": bool(c.get("kept"))}


def _si(x: float | None) -> float | None:
    """A value for the catalog: None where it is missing or not finite (the summary's jsonable rule)."""
    return None if x is None or not math.isfinite(x) else x
