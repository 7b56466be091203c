"""End-to-end accuracy: does the stated uncertainty cover the truth on instruments of many kinds?

Each simulated instrument is calibrated with spheres first (the spheres' true volumes drawn within
their certificates), then a specimen is measured several times, every run with a fresh noise
realisation (its own simulator seed).  Printed per instrument and pooled:

- bias of the run results from the simulator's true solid volume, and bias / U;
- observed SD of the run results within one calibration, and the mean stated U (k = 2);
- coverage: the share of runs whose |result - truth| <= U;
- stated random u of a run's mean / observed SD (the budget's prediction of its own scatter), and
  the same for single cycles (a cycle's random u / the cycle-to-cycle SD within runs); and the run
  ratio pooled over the instruments (their chi-square) with the range an exact budget gives, and how
  many instruments an exact budget leaves outside 0.8-1.25 by sampling alone (a 27-degree-of-freedom
  SD is known to about 14 %, so about one in ten);
- calibration z-scores (fitted - true) / u for Vc and Vr, and the share within 2 u - per quantity,
  both at once, and what exactly N(0,1) z-scores at the observed Vc-Vr correlation would give for
  both at once (about 94 % at their usual 0.97: honest k = 2 uncertainties reach 95.4 % only for one);
- the cycle-to-cycle SD against what the pressure readings' noise alone allows (each kept cycle's
  settle-window regression errors of P1, P2 and the zero, propagated through the volume equation,
  nothing else): the share of the scatter the software's own settling, zeroing and drift handling
  add on top of the transducer;
- with --floor, the time to a result against its physical floor: the same runs' instrument time with
  each settle cut to the moment the instrument's noise-free relaxation came within the pressure error
  worth 0.05 % of the volume (bench/settle_floor.py; purge, fills and vents as they were).

Targets (issue): pooled coverage >= 95 %, >= 90 % per instrument; |bias| < U/2; random u / SD in
0.8-1.25; calibrated Vc, Vr within U in >= 95 % of calibrations; cycle SD within 1.5x the noise-only u;
time to a result within 2x the floor.

How the instruments were chosen: to span what home-built pycnometers are (helium, nitrogen and
argon; lab 15-30 degC; cells of 12-60 cm^3 with one to three expansion volumes; specimens filling
15 % to 85 % of the cell; transducer noise 6-20 Pa) and the physics that makes settling hard
(a thermal time constant of 30 s; a specimen with 0.5 cm^3 of open pores filling with 120 s; a lab
whose pressure and temperature drift during the run; an absolute transducer with a barometer).
All are invented; none is a shipped config.

    python bench/bench_accuracy.py [--quick] [--edges] [--runs N] [--calibrations N] [--jobs N] [--only NAME]
                                   [--demo-runs N] [--floor]

The last line is the time to a result of the shipped grain-volume on the shipped clean and noisy
simulators (uncalibrated; their nominal volumes are their true ones).
"""

from __future__ import annotations

import argparse
import dataclasses
import math
import statistics
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from pycnoctl.controller.jobs.calibration import SimCellLoader, Sphere, calibrate
from pycnoctl.controller.jobs.measurement import RunRequest, execute, prepare
from pycnoctl.controller.maths.uncertainty import cycle_volume_budget
from pycnoctl.controller.record.catalog import Catalog
from pycnoctl.controller.record.runfolder import load_run
from pycnoctl.controller.run.control import Controller
from pycnoctl.drivers.simulated import build_sim_instrument
from pycnoctl.sim.config import SimConfig, check, config_from_dict

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(Path(__file__).resolve().parent))  # its sibling module, however the bench is started
from settle_floor import SETTLES, floor_run_seconds, floor_seconds, settle_times  # noqa: E402


@dataclasses.dataclass(frozen=True)
class Spec:
    """One invented instrument and its specimen."""

    name: str
    gas: str = "helium"
    lab_c: float = 22.0
    cell_cm3: float = 12.0
    expansions: tuple[float, ...] = (8.0,)
    use: int = 0  # which expansion volume the sequence names
    fill_share: float = 0.5  # the specimen's share of the cell
    noise_pa: float = 8.0
    thermal_tau_s: float = 2.0
    pore_cm3: float = 0.0
    pore_tau_s: float = 120.0
    pressure_drift_pa_h: float = 0.0  # lab pressure drift, Pa per hour
    pressure_wave_pa: float = 0.0  # lab pressure oscillation amplitude (period 20 min)
    temperature_drift_k_h: float = 0.0
    absolute: bool = False
    fill_bar: float = 1.3
    thermometer_at: str = "wall"  # 'wall', or 'cell': a thermometer in the gas, which shows its relaxation


SPECS: tuple[Spec, ...] = (
    Spec("he-half", noise_pa=6.0),
    Spec("n2-warm-small", gas="nitrogen", lab_c=30.0, cell_cm3=25.0, expansions=(15.0,), fill_share=0.15,
         noise_pa=10.0),
    Spec("ar-cool-large-vr", gas="argon", lab_c=15.0, cell_cm3=45.0, expansions=(30.0,), fill_share=0.4,
         noise_pa=8.0),
    Spec("he-three-volumes", lab_c=18.0, cell_cm3=60.0, expansions=(10.0, 25.0, 50.0), use=1, fill_share=0.85,
         noise_pa=20.0),
    Spec("he-slow-thermal", thermal_tau_s=30.0, fill_share=0.6, noise_pa=8.0),
    Spec("he-porous", fill_share=0.5, pore_cm3=0.5, pore_tau_s=120.0, noise_pa=8.0),
    Spec("he-drifting-lab", pressure_drift_pa_h=-150.0, pressure_wave_pa=40.0, temperature_drift_k_h=0.3,
         noise_pa=8.0),
    Spec("n2-absolute", gas="nitrogen", absolute=True, noise_pa=12.0, fill_share=0.3, lab_c=25.0),
)
QUICK = ("he-half", "ar-cool-large-vr", "he-slow-thermal", "n2-absolute")

#: --edges: a second set, never used while the settle rules were chosen, at the edges the eight above do
#: not reach: a cheap 40 Pa transducer, thermal time constants between theirs (15 s; 20 s on an absolute
#: nitrogen bench), a cell 95 % full and one 5 % full (argon), a 2 bar fill, pores fast enough to be
#: waited out (0.3 cm^3, 20 s), a lab warming 1 K/h while its pressure rises 300 Pa/h, and a thermometer
#: placed in the cell's gas rather than on its wall (it shows the 8 s relaxation the pressure shows)
EDGES: tuple[Spec, ...] = (
    Spec("he-noisy-40", noise_pa=40.0),
    Spec("he-tau-15", thermal_tau_s=15.0, fill_share=0.4),
    Spec("n2-full-95", gas="nitrogen", fill_share=0.95, noise_pa=8.0),
    Spec("ar-tiny-5", gas="argon", fill_share=0.05, expansions=(25.0,), cell_cm3=20.0, noise_pa=8.0),
    Spec("he-2-bar", fill_bar=2.0, noise_pa=10.0),
    Spec("he-fast-pores", pore_cm3=0.3, pore_tau_s=20.0, noise_pa=8.0),
    Spec("he-warming-lab", temperature_drift_k_h=1.0, pressure_drift_pa_h=300.0, noise_pa=8.0),
    Spec("n2-slow-abs", gas="nitrogen", absolute=True, thermal_tau_s=20.0, noise_pa=15.0, fill_share=0.5),
    Spec("he-gas-thermo", thermometer_at="cell", thermal_tau_s=8.0, noise_pa=8.0),
)


def sim_config(spec: Spec, seed: int, solid_cm3: float, *, still: bool = False) -> SimConfig:
    """The instrument's simulator config (its truth), built on the shipped clean bench's layout.

    still: no sensor noise and no lab drift (its physics otherwise the same), for the settle floor."""
    vols = {"cell": {"volume": f"{spec.cell_cm3} cm^3", "thermal_tau": f"{spec.thermal_tau_s} s"}}
    valves: dict[str, Any] = {
        # the metering inlet scaled with the cell, so that a fill takes about as long on every instrument
        "inlet": {"role": "inlet", "between": ["supply", "cell"],
                  "diameter": f"{0.05 * math.sqrt(spec.cell_cm3 / 12.0):.3f} mm", "cd": 0.7},
        "vent": {"role": "vent", "between": ["cell", "ambient"], "diameter": "0.8 mm", "cd": 0.7},
    }
    for i, v in enumerate(spec.expansions):
        vols[f"x{i}"] = {"volume": f"{v} cm^3", "thermal_tau": f"{spec.thermal_tau_s * 1.3} s"}
        valves[f"exp_x{i}"] = {"role": "expansion", "between": ["cell", f"x{i}"], "diameter": "1.0 mm", "cd": 0.7}
    lab: dict[str, Any] = {"temperature": f"{spec.lab_c} degC", "pressure": "1013.25 hPa",
                           "pressure_drift": f"{spec.pressure_drift_pa_h / 3600.0} Pa/s",
                           "temperature_drift": f"{spec.temperature_drift_k_h / 3600.0} K/s"}
    if spec.pressure_wave_pa:
        lab["pressure_wave"] = {"amplitude": f"{spec.pressure_wave_pa} Pa", "period": "1200 s"}
    pressure = {"node": "cell", "kind": "absolute" if spec.absolute else "gauge",
                "full_scale": "5 bar" if spec.absolute else "3.5 bar", "update_rate": "100 Hz",
                "noise": f"{spec.noise_pa} Pa"}
    data = {
        "name": spec.name, "seed": seed, "gas": spec.gas, "cell": "cell", "lab": lab,
        "supply": {"set_pressure": f"{spec.fill_bar + 0.1} bar", "cylinder_pressure": "150 bar"},
        "volumes": vols,
        "sample": {"solid_volume": f"{solid_cm3} cm^3", "pore_volume": f"{spec.pore_cm3} cm^3",
                   "pore_tau": f"{spec.pore_tau_s} s"},
        "valves": valves,
        "relief": {"node": "cell", "set_pressure": "3.0 bar", "diameter": "1.5 mm"},
        "instruments": {"pressure": pressure, "thermometer": {"at": spec.thermometer_at, "update_rate": "10 Hz",
                                                              "noise": "0.01 K"},
                        "barometer": {"update_rate": "10 Hz", "noise": "2 Pa"}},
        "initial_open": ["vent", *[f"exp_x{i}" for i in range(len(spec.expansions))]],
        "sample_period": "0.1 s",
    }
    if still:
        lab.update(pressure_drift="0 Pa/s", temperature_drift="0 K/s")
        lab.pop("pressure_wave", None)
        pressure["noise"] = "0 Pa"
        data["instruments"]["thermometer"]["noise"] = "0 K"
        data["instruments"]["barometer"]["noise"] = "0 Pa"
    return check(config_from_dict(data))


ALL_CYCLES = False  # --all-cycles: every measurement run goes through its 8 cycles (no stop once converged)
REMAINDER: str | None = None  # --remainder: the remainder rule's limit for every sequence (e.g. '5 Pa')
WINDOW: str | None = None  # --window: the settle window for every sequence (e.g. '6 s')
EXTRAPOLATE = False  # --extrapolate: every sequence records the fitted asymptote where it has a sound fit
SETTLE_RULE: str | None = None  # --drift: the drift rule with this max_drift (e.g. '0.5 Pa/s', 'auto')


def _sequence(spec: Spec, kind: str, folder: Path) -> Path:
    """The shipped grain-volume / calibration sequences, for this gas and expansion volume."""
    data = yaml.safe_load((ROOT / "sequences" / "grain-volume.yaml").read_text())
    data.update(name=f"{kind}-{spec.name}", kind=kind, gas=spec.gas)
    data["fill"]["target"] = f"{spec.fill_bar} bar"
    data["expand"] = {"volume": f"x{spec.use}"}
    if SETTLE_RULE:  # --drift: the drift rule instead of the shipped one, for both
        data["settle"]["max_drift"] = SETTLE_RULE
        data["settle"].pop("max_remainder", None)
    if REMAINDER:  # --remainder: the remainder rule for both
        data["settle"]["max_remainder"] = REMAINDER
    if WINDOW:  # --window: another settle window for both
        data["settle"]["window"] = WINDOW
    if EXTRAPOLATE:  # --extrapolate: record the fitted asymptote where the rule has a fit
        data["settle"]["extrapolate"] = True
    data.pop("sample_defaults", None)
    if kind == "calibrate":
        data["cycles"] = {"count": 6, "discard": 1}
    elif ALL_CYCLES:
        data["cycles"]["stop_on_converge"] = False
    path = folder / f"{kind}.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


class _FreshLoader(SimCellLoader):
    """Each sphere placed with its own noise realisation, and its true volume as drawn."""

    def __init__(self, config: SimConfig, seed: int, actual: dict[str, float]) -> None:
        super().__init__(config, actual=actual)
        self._seed = seed

    def load(self, index: int, sphere: Sphere) -> Any:
        self.config = self.config.model_copy(update={"seed": self._seed + index})
        return super().load(index, sphere)


def _spheres(spec: Spec, rng: np.random.Generator) -> tuple[list[Sphere], dict[str, float]]:
    """Two certified spheres of about 30 % and 60 % of the cell (u 0.02 % of the volume, a plausible
    certificate - from memory), and the volumes truly placed, drawn within the certificates."""
    out, actual = [], {}
    for i, share in enumerate((0.3, 0.6), 1):
        v = share * spec.cell_cm3 * 1e-6
        s = Sphere(f"sphere {i}", v, 2e-4 * v, spec=f"V={v * 1e6:.4f} cm^3")
        out.append(s)
        actual[s.label] = v + rng.normal(0.0, s.u_volume)
    return out, actual


def one_calibration(spec: Spec, cal_index: int, runs: int) -> dict[str, Any]:
    """Calibrate once, then measure ``runs`` times; the raw figures for the summary."""
    rng = np.random.default_rng(1000 * hash(spec.name) % 2**31 + cal_index)
    seed0 = int(rng.integers(1, 2**31 - 1))
    solid = spec.fill_share * spec.cell_cm3
    truth_cfg = sim_config(spec, seed0, 0.0)
    vc_true = truth_cfg.volumes["cell"].volume
    vr_true = truth_cfg.volumes[f"x{spec.use}"].volume
    out: dict[str, Any] = {"spec": spec.name, "cal": cal_index, "runs": []}
    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        cat = Catalog(d / "catalog.sqlite")
        spheres, actual = _spheres(spec, rng)
        cal = calibrate(spheres, _FreshLoader(truth_cfg, seed0, actual), catalog=cat, root=d / "runs",
                        expansion_volumes=[f"x{spec.use}"], sequence=_sequence(spec, "calibrate", d))
        (o,) = cal.outcomes
        out["cal_status"] = cal.status
        if o.fit is not None:
            out["vc_z"] = (o.fit.vc - vc_true) / o.fit.u_vc
            out["vr_z"] = (o.fit.vr - vr_true) / o.fit.u_vr
            out["chi2"], out["dof"] = o.fit.chi2, o.fit.dof
        if cal.status != "stored":
            out["cal_message"] = cal.message
            cat.close()
            return out
        seq = _sequence(spec, "measure", d)
        for r in range(runs):
            cfg = sim_config(spec, seed0 + 100 + r, solid)
            truth = cfg.sample.solid_volume
            inst = build_sim_instrument(cfg)
            s = execute(prepare(RunRequest(seq, sample_id=f"{spec.name}-{r}"), inst), Controller(inst),
                        root=d / "runs", catalog=cat)
            inst.close()
            spent, count = settle_times(load_run(d / "runs" / s["run_id"], trace_columns=("t", "state")).trace)
            cyc = [c for c in s["cycles"] if c.get("kept")]
            rep = next((row for row in s.get("budget") or [] if row["kind"] == "repeatability"), None)
            out["runs"].append({
                "status": s["status"], "truth": truth * 1e6, "v": s["volume_cm3"], "U": s["volume_u_cm3"],
                "u": s["volume_u_std_cm3"], "n": len(cyc), "time_s": s["instrument_time_s"],
                "settle_s": spent, "settles": count,
                "cycle_v": [c["volume_cm3"] for c in cyc],
                "cycle_u_random": [c["u_random_m3"] * 1e6 for c in cyc],
                "cycle_u_noise": [_noise_only_u(c, vc_true, vr_true, spec.gas) for c in cyc],
                "u_rep": rep["std_u"] * 1e6 if rep else math.nan,
                "warnings": s["warnings"],
                "why": (s.get("fault") or {}).get("message"),
            })
        cat.close()
    return out


def _noise_only_u(c: dict[str, Any], vc: float, vr: float, gas: str) -> float:
    """cm^3: a cycle's u from its pressures' regression errors alone (P1, P2 and the zero), through
    the same budget function the software uses, with every other input left out."""
    p1 = c["p1_ambient_pa"] + c["p1_gauge_pa"]
    p2 = c["p2_ambient_pa"] + c["p2_gauge_pa"]
    b = cycle_volume_budget(p1, p2, c["ambient_pa"], vc, vr, u_p1=c["u_p1_pa"], u_p2=c["u_p2_pa"],
                            u_pa=c["u_baseline_pa"], t1=c["t1_k"], t2=c["t2_k"], ta=c["ta_k"], gas=gas)
    return b.combined * 1e6


def _pooled_sd(groups: list[list[float]]) -> float:
    num = sum((len(g) - 1) * statistics.variance(g) for g in groups if len(g) > 1)
    dof = _pooled_dof(groups)
    return math.sqrt(num / dof) if dof else math.nan


def _pooled_dof(groups: list[list[float]]) -> int:
    return sum(len(g) - 1 for g in groups if len(g) > 1)


def summarise(spec: str, cals: list[dict[str, Any]], floor: dict[str, float] | None = None) -> dict[str, Any]:
    runs = [r for c in cals for r in c["runs"] if r["v"] is not None]
    failed = sum(1 for c in cals for r in c["runs"] if r["v"] is None) + sum(1 for c in cals if "cal_message" in c)
    z = [(c["vc_z"], c["vr_z"]) for c in cals if "vc_z" in c]
    row: dict[str, Any] = {"instrument": spec, "runs": len(runs), "failed": failed,
                           "cal_within_U": sum(abs(a) <= 2 and abs(b) <= 2 for a, b in z), "cals": len(z),
                           "cal_refused": sum(1 for c in cals if "cal_message" in c),
                           "cal_stored_within_U": sum(abs(c["vc_z"]) <= 2 and abs(c["vr_z"]) <= 2 for c in cals
                                                      if "vc_z" in c and "cal_message" not in c),
                           "z_vc": [round(a, 2) for a, _ in z], "z_vr": [round(b, 2) for _, b in z],
                           "chi2": [f"{c['chi2']:.0f}/{c['dof']}" for c in cals if "chi2" in c]}
    if not runs:
        return row
    err = np.array([r["v"] - r["truth"] for r in runs])
    U = np.array([r["U"] for r in runs])
    truth = runs[0]["truth"]
    groups = [[r["v"] for r in c["runs"] if r["v"] is not None] for c in cals]
    sd = _pooled_sd(groups)
    cyc_sd = _pooled_sd([r["cycle_v"] for r in runs if len(r["cycle_v"]) > 1])
    cyc_u = float(np.mean([u for r in runs for u in r["cycle_u_random"]]))
    cyc_noise = float(np.mean([u for r in runs for u in r["cycle_u_noise"]]))
    pred_run = float(np.mean([cyc_u / math.sqrt(r["n"]) for r in runs if r["n"]]))
    row.update(truth_cm3=truth, bias_pct=100 * err.mean() / truth, bias_over_U=float(err.mean() / U.mean()),
               sd_pct=100 * sd / truth, U_pct=100 * U.mean() / truth,
               coverage=float(np.mean(np.abs(err) <= U)), random_u_over_sd=pred_run / sd if sd > 0 else math.nan,
               sd_dof=_pooled_dof(groups),
               cycle_u_over_sd=cyc_u / cyc_sd if cyc_sd > 0 else math.nan,
               cycle_sd_over_noise=cyc_sd / cyc_noise if cyc_noise > 0 else math.nan,
               minutes=float(np.mean([r["time_s"] for r in runs])) / 60.0,
               floor_minutes=float(np.mean([floor_run_seconds(r["time_s"], r["settle_s"], r["settles"], floor)
                                            for r in runs])) / 60.0 if floor else math.nan,
               runs_raw=runs,
               warnings=sorted({w.split(":")[0][:60] for r in runs for w in r["warnings"]}))
    return row


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="four instruments, 1 calibration x 4 runs each")
    ap.add_argument("--runs", type=int, default=None, help="measurement runs per calibration (default 6)")
    ap.add_argument("--calibrations", type=int, default=None, help="calibrations per instrument (default 2)")
    ap.add_argument("--jobs", type=int, default=2, help="worker processes")
    ap.add_argument("--only", action="append", help="instrument name (repeatable)")
    ap.add_argument("--edges", action="store_true", help="the second set of instruments (EDGES) instead")
    ap.add_argument("--drift", help="settle by the drift rule with this max_drift for calibration and "
                                    "measurement, e.g. '0.5 Pa/s' or 'auto' (default: the shipped sequence's rule)")
    ap.add_argument("--remainder", help="settle by the remainder rule with this limit for calibration and "
                                        "measurement, e.g. '5 Pa' (default: the shipped sequence's rule)")
    ap.add_argument("--window", help="settle window for calibration and measurement, e.g. '6 s'")
    ap.add_argument("--extrapolate", action="store_true", help="settles record the fitted asymptote")
    ap.add_argument("--demo-runs", type=int, default=3,
                    help="runs of the shipped grain-volume on the shipped noisy simulator for the time-to-result "
                         "line (0: no demo line)")
    ap.add_argument("--all-cycles", action="store_true",
                    help="measurement runs go through all 8 cycles (default: the shipped sequence's rule, which "
                         "stops once the last cycles agree)")
    ap.add_argument("--floor", action="store_true",
                    help="also the physical floor of each instrument's settles and the time to a result against "
                         "it (one noise-free run per instrument, held ten time constants per settle)")
    args = ap.parse_args()
    global SETTLE_RULE, ALL_CYCLES, REMAINDER, WINDOW, EXTRAPOLATE
    SETTLE_RULE = args.drift  # read by the workers, which fork from here
    REMAINDER, WINDOW, EXTRAPOLATE = args.remainder, args.window, args.extrapolate
    ALL_CYCLES = args.all_cycles
    pool_specs = EDGES if args.edges else SPECS
    specs = [s for s in pool_specs if (not args.quick or s.name in QUICK) and (not args.only or s.name in args.only)]
    n_cal = args.calibrations or (1 if args.quick else 2)
    n_run = args.runs or (4 if args.quick else 6)
    t0 = time.monotonic()
    tasks = [(s, c) for s in specs for c in range(n_cal)]
    with ProcessPoolExecutor(max_workers=args.jobs) as pool:
        floors = dict(zip([s.name for s in specs], pool.map(_floor, specs), strict=True)) if args.floor else {}
        done = list(pool.map(one_calibration, [t[0] for t in tasks], [t[1] for t in tasks], [n_run] * len(tasks)))
    rows = [summarise(s.name, [d for d in done if d["spec"] == s.name], floors.get(s.name)) for s in specs]
    print(f"== accuracy on {len(specs)} simulated instruments, {n_cal} calibration(s) x {n_run} runs each "
          f"({time.monotonic() - t0:.0f} s wall)")
    head = f"{'instrument':18s} {'bias %':>8s} {'bias/U':>7s} {'SD %':>7s} {'U %':>7s} {'cover':>6s} " \
           f"{'u/SD run':>8s} {'u/SD cyc':>8s} {'SD/noise':>8s} {'cal in U':>8s} {'min/run':>7s}"
    print(head + (f" {'floor':>6s} {'x floor':>7s}" if floors else ""))
    for r in rows:
        if "coverage" not in r:
            print(f"{r['instrument']:18s} no result ({r['failed']} failed)")
            continue
        floor_cols = f" {r['floor_minutes']:6.1f} {r['minutes'] / r['floor_minutes']:7.2f}" if floors else ""
        print(f"{r['instrument']:18s} {r['bias_pct']:+8.4f} {r['bias_over_U']:+7.2f} {r['sd_pct']:7.4f} "
              f"{r['U_pct']:7.4f} {r['coverage']:6.0%} {r['random_u_over_sd']:8.2f} {r['cycle_u_over_sd']:8.2f} "
              f"{r['cycle_sd_over_noise']:8.2f} {r['cal_within_U']:>4d}/{r['cals']:<3d} {r['minutes']:7.1f}"
              + floor_cols)
    if floors:
        print("   floor: min/run with each settle cut to the moment its noise-free relaxation came within the "
              "pressure error worth 0.05 % of the volume (bench/settle_floor.py); zero / P1 / P2 floors s: "
              + "; ".join(f"{n} {f['baseline']:.0f}/{f['settle_filled']:.0f}/{f['settle_expanded']:.0f}"
                          for n, f in floors.items()))
        print(_fixed_wait_line(rows, floors))
    for r in rows:
        print(f"   {r['instrument']}: calibration z(Vc) {r['z_vc']}, z(Vr) {r['z_vr']}, chi-square {r['chi2']}; "
              f"failed {r['failed']}"
              + (f"; warnings: {r['warnings']}" if r.get("warnings") else ""))
    for d in done:
        why = next((r["why"] for r in d["runs"] if r["v"] is None and r["why"]), None)
        if why:
            print(f"   {d['spec']} calibration {d['cal']}, a failed run: {why[:300]}")
        if "cal_message" in d:
            print(f"   {d['spec']} calibration {d['cal']}: {d['cal_message'][:300]}")
    ok = [r for r in rows if "coverage" in r]
    if ok:
        cov = sum(r["coverage"] * r["runs"] for r in ok) / sum(r["runs"] for r in ok)
        cals = sum(r["cal_within_U"] for r in rows), sum(r["cals"] for r in rows)
        refused, stored_ok = sum(r["cal_refused"] for r in rows), sum(r["cal_stored_within_U"] for r in rows)
        print(f"pooled: coverage {cov:.1%} of {sum(r['runs'] for r in ok)} runs; calibrations within U "
              f"{cals[0]}/{cals[1]} (refused by their own residual test {refused}; stored and within U "
              f"{stored_ok}); instruments under 90 % coverage: "
              f"{[r['instrument'] for r in ok if r['coverage'] < 0.9] or 'none'}")
    z = np.array([(a, b) for r in rows for a, b in zip(r["z_vc"], r["z_vr"], strict=True)])
    if len(z) >= 3:
        print(_joint_coverage_line(z))
    ratios = [(r["random_u_over_sd"], r["sd_dof"]) for r in ok
              if math.isfinite(r["random_u_over_sd"]) and r["sd_dof"] > 0]
    if ratios:
        print(_random_u_line(ratios))
    if args.demo_runs > 0 and not args.edges and not args.only:
        print(_demo_line(args.demo_runs))


def _fixed_wait_line(rows: list[dict[str, Any]], floors: dict[str, dict[str, float]]) -> str:
    """The settle rule's time against fixed waits held as long as the floors demand: each instrument's own
    slowest floor (the shortest fixed wait that reaches 0.05 % there, knowing its physics; a fixed wait that
    matched the rule's smaller bias would be longer), and the slowest floor of the whole set (one wait for
    instrument measured and specimen, as a lab without an adaptive rule must choose).  Same runs, same
    purge, fills and vents; only the settles' length changes."""
    measured = [floors[r["instrument"]] for r in rows if "runs_raw" in r and r["instrument"] in floors]
    if not measured:
        return "   (no instrument gave a result to compare with fixed waits)"
    # the set's slowest floor among the instruments measured: one the rule refuses (pores) sets no wait
    lab_wait = max(max(f[k] for k in SETTLES) for f in measured)
    own, lab = [], []
    for r in rows:
        f = floors.get(r["instrument"])
        if "runs_raw" not in r or f is None:
            continue
        wait = max(f[k] for k in SETTLES)
        flat = [(rr["time_s"], rr["settle_s"], rr["settles"]) for rr in r["runs_raw"]]
        t_own = np.mean([floor_run_seconds(t, s, c, dict.fromkeys(SETTLES, wait)) for t, s, c in flat])
        t_lab = np.mean([floor_run_seconds(t, s, c, dict.fromkeys(SETTLES, lab_wait)) for t, s, c in flat])
        own.append(f"{r['instrument']} {r['minutes'] * 60 / t_own:.2f}")
        lab.append(f"{r['minutes'] * 60 / t_lab:.2f}")
    return ("   the rule's time / a fixed wait's, every settle held for the instrument's own slowest floor: "
            + "; ".join(own) + f"; held for the set's slowest floor ({lab_wait:.0f} s, one wait for all): "
            + ", ".join(lab))


def _floor(spec: Spec) -> dict[str, float]:
    return floor_seconds(spec, sim_config, _sequence)


def demo_run(config: str, seed: int) -> dict[str, float]:
    """The shipped grain-volume, as shipped, on a shipped simulator config: instrument time, cycles and the
    error from the simulator's true volume (uncalibrated: the configs' nominal volumes are their true ones)."""
    inst = build_sim_instrument(ROOT / "sim" / "configs" / f"{config}.yaml", seed=seed)
    truth = inst.extras["sim"].config.sample.solid_volume * 1e6
    with tempfile.TemporaryDirectory() as tmp, Catalog(Path(tmp) / "catalog.sqlite") as cat:
        s = execute(prepare(RunRequest("grain-volume", sample_id=f"demo-{config}-{seed}"), inst),
                    Controller(inst), root=Path(tmp) / "runs", catalog=cat)
    inst.close()
    v = s["volume_cm3"]
    return {"minutes": s["instrument_time_s"] / 60.0, "cycles": len(s["cycles"]),
            "error_pct": (v - truth) / truth * 100.0 if v is not None else math.nan}


def _demo_line(runs: int) -> str:
    """Time to a result on the shipped clean and noisy simulators (the issue's figures: 13.9 and 74
    instrument minutes when it was filed; the clean one's target is under 5)."""
    clean = demo_run("clean", 1)  # noise-free: every seed gives the same
    noisy = [demo_run("noisy", 1 + i) for i in range(runs)]
    return (f"shipped demos, grain-volume as shipped: clean {clean['minutes']:.1f} min per specimen "
            f"({clean['cycles']} cycles, error {clean['error_pct']:+.4f} %); noisy "
            f"{statistics.mean(r['minutes'] for r in noisy):.1f} min ({runs} runs, "
            f"{statistics.mean(r['cycles'] for r in noisy):.1f} cycles, error "
            f"{statistics.mean(r['error_pct'] for r in noisy):+.4f} % mean)")


def _random_u_figures(ratios: list[tuple[float, int]]) -> dict[str, float]:
    """The stated random u / run SD of every instrument, pooled, against what sampling alone gives.
    Why: each instrument's run SD rests on a few tens of runs (27 degrees of freedom at 3 x 10), so even
    an exact budget leaves a ratio outside 0.8-1.25 about one time in ten; the pooled ratio (the runs'
    chi-square over all instruments) tells an over- or under-stated budget from that scatter."""
    from pycnoctl.controller.maths.chisq import chi2_cdf, chi2_ppf, chi2_sf

    dof = sum(n for _, n in ratios)
    chi2 = sum(n / (r * r) for r, n in ratios)  # sum of dof x (SD / u)^2: chi-square with dof if u is exact
    return {"pooled": math.sqrt(dof / chi2), "dof": dof, "n": len(ratios),
            "lo": math.sqrt(dof / chi2_ppf(0.975, dof)), "hi": math.sqrt(dof / chi2_ppf(0.025, dof)),
            "outside": sum(1 for r, _ in ratios if not 0.8 <= r <= 1.25),
            "expected": sum(chi2_cdf(n * 0.8**2, n) + chi2_sf(n * 1.25**2, n) for _, n in ratios)}


def _random_u_line(ratios: list[tuple[float, int]]) -> str:
    f = _random_u_figures(ratios)
    return (f"random u: stated / run SD pooled over {f['n']} instruments {f['pooled']:.2f} ({f['dof']} degrees "
            f"of freedom; an exact budget gives {f['lo']:.2f}-{f['hi']:.2f} in 95 % of benches); outside "
            f"0.8-1.25 {f['outside']} of {f['n']}, where an exact budget leaves {f['expected']:.1f} by sampling alone")


def _joint_coverage_line(z: np.ndarray) -> str:
    """Calibrations within U per quantity and both at once, against what exactly N(0,1) z-scores at the
    observed correlation would give (a Monte Carlo, fixed seed).  Why: Vc and Vr of one fit are
    correlated but not the same, so honest k = 2 uncertainties put both within U somewhat less often
    than each alone (95.4 %); the pooled count above is read against this, not against 95 %."""
    inside = np.abs(z) <= 2.0
    rho = float(np.corrcoef(z.T)[0, 1])
    rng = np.random.default_rng(0)
    a = rng.standard_normal(400_000)
    b = rho * a + math.sqrt(max(1.0 - rho * rho, 0.0)) * rng.standard_normal(a.size)
    honest = float(np.mean((np.abs(a) <= 2.0) & (np.abs(b) <= 2.0)))
    return (f"calibrations: Vc within U {int(inside[:, 0].sum())}/{len(z)}, Vr {int(inside[:, 1].sum())}/{len(z)}, "
            f"both {int(inside.all(axis=1).sum())}/{len(z)}; RMS z {math.sqrt(float(np.mean(z[:, 0] ** 2))):.2f}, "
            f"{math.sqrt(float(np.mean(z[:, 1] ** 2))):.2f}; exactly N(0,1) z at their correlation {rho:.2f} "
            f"would put both within U in {honest:.1%} ({honest * len(z):.1f} of {len(z)})")


if __name__ == "__main__":
    sys.exit(main())
