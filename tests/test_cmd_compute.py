"""`pycnoctl compute` through cli.main and once through the installed console script."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

CP = pytest.importorskip("CoolProp.CoolProp")
optimize = pytest.importorskip("scipy.optimize")

from pycnoctl.controller.cli.main import main  # noqa: E402
from pycnoctl.controller.maths.volume import expansion_pressure  # noqa: E402

CM3 = 1e-6
PA = 101325.0


def run_json(capsys, *args):
    rc = main(["compute", *args, "--json"])
    out = capsys.readouterr().out
    assert rc == 0
    return json.loads(out)


def test_ideal_textbook_value(capsys):
    # ASM Handbook Vol. 7 form: Vs = Vc - Vr/((P1-Pa)/(P2-Pa) - 1) = 10 - 7/(1.4/0.58 - 1)
    out = run_json(capsys, "--cell-volume", "10", "--expansion-volume", "7", "--p1", "1.4", "--p2", "0.58",
                   "--gauge", "--gas", "ideal")
    assert out["volume_cm3"] == pytest.approx(10 - 7 / (1.4 / 0.58 - 1), rel=1e-12)
    assert out["volume_u_cm3"] == 0.0 and out["k"] == 2.0
    assert "density_g_cm3" not in out


def test_gauge_flag_tags_and_absolute_agree(capsys):
    base = ["--cell-volume", "10 cm^3", "--expansion-volume", "7 mL"]
    a = run_json(capsys, *base, "--p1", "1.4 bar", "--p2", "0.58 bar", "--gauge")
    b = run_json(capsys, *base, "--p1", "241.325 kPa", "--p2", "159.325 kPa", "--absolute")
    c = run_json(capsys, *base, "--p1", "1.4 bar gauge", "--p2", "159325 Pa", "--absolute")
    e = run_json(capsys, *base, "--p1", "1.4 bar", "--p2", "0.58 bar")  # gauge without saying so, as in `run`
    assert e["volume_cm3"] == a["volume_cm3"]
    d = run_json(capsys, *base, "--p1", "20.305 psi", "--p2", "0.58", "--gauge")  # 20.305 psi ~ 1.39998 bar
    assert a["volume_cm3"] == pytest.approx(b["volume_cm3"], rel=1e-12)
    assert a["volume_cm3"] == pytest.approx(c["volume_cm3"], rel=1e-12)
    assert d["volume_cm3"] == pytest.approx(a["volume_cm3"], rel=2e-4)


def test_silicon_sphere_density_on_coolprop_helium(capsys):
    # synthetic single-crystal Si sample: rho = 28.0855/12.0588349 g/cm^3 [D from CODATA molar volume];
    # true P2 from a CoolProp (helium reference EOS) mass balance at 25 C
    rho_si = 28.0855 / 12.0588349
    vc, vr, vs, t = 10 * CM3, 7 * CM3, 6.5 * CM3, 298.15
    p1 = PA + 1.4e5

    def d(p):
        return CP.PropsSI("Dmolar", "T", t, "P", p, "Helium")

    vg = vc - vs
    n = vg * d(p1) + vr * d(PA)
    p2 = optimize.brentq(lambda p: (vg + vr) * d(p) - n, PA, p1, xtol=1e-9, rtol=1e-15)
    mass_g = rho_si * vs / CM3
    out = run_json(capsys, "--cell-volume", "10", "--expansion-volume", "7", "--p1", f"{p1!r} Pa",
                   "--p2", f"{p2!r} Pa", "--temperature", "25 degC", "--mass", f"{mass_g!r} g",
                   "--u-p", "50 Pa", "--u-mass", "0.1 mg", "--u-cell-volume", "0.002",
                   "--u-expansion-volume", "0.003", "--water-temperature", "20 degC", "--absolute")
    assert out["volume_cm3"] == pytest.approx(6.5, rel=1e-5)
    assert out["density_g_cm3"] == pytest.approx(rho_si, rel=1e-5)
    assert abs(out["ideal_gas_volume_cm3"] / 6.5 - 1) > 1e-4  # ideal form misses by more
    assert out["volume_u_cm3"] == pytest.approx(2 * out["volume_u_std_cm3"])
    assert out["density_u_g_cm3"] == pytest.approx(2 * out["density_u_std_g_cm3"])
    assert out["density_u_std_g_cm3"] > 0
    names = [r["name"] for r in out["budget"]]
    assert "fill pressure P1" in names and "cell volume Vc" in names
    # specific gravity against air-free water at 20 C: 0.998207 g/cm^3 (methods.md, CoolProp IAPWS-95)
    assert out["specific_gravity"] == pytest.approx(rho_si / 0.998207, rel=3e-6)


def test_human_output(capsys):
    rc = main(["compute", "--cell-volume", "10", "--expansion-volume", "7", "--p1", "1.4", "--p2", "0.58",
               "--gauge", "--u-p", "5 mbar", "--mass", "11.6", "--u-mass", "1 mg"])
    text = capsys.readouterr().out
    assert rc == 0
    assert "sample volume" in text and "density" in text and "fill pressure P1" in text


@pytest.mark.parametrize(
    ("args", "flag"),
    [
        (["--cell-volume", "-10"], "--cell-volume"),
        (["--p1", "3 kg"], "--p1"),
        (["--p2", "1.58"], "--p2"),  # above P1 (gauge)
        (["--p2", "-0.1"], "--p2"),
        (["--gas", "xenon"], "--gas"),
        (["--temperature", "5 bar"], "--temperature"),
        (["--u-p", "-1"], "--u-p"),
        (["--mass", "-2"], "--mass"),
        (["--water-temperature", "20"], "--water-temperature"),  # needs --mass
        # a bare number in the wrong unit: 1013 meant as hPa reads as bar, 295 meant as K reads as degC
        # (a lab's air pressure and temperature: the standard atmosphere is 101.325 kPa; common practice)
        (["--ambient", "1013"], "--ambient"),
        (["--ambient", "14.7"], "--ambient"),  # psi
        (["--temperature", "295"], "--temperature"),
        (["--ta", "-60 degC"], "--ta"),
        (["--ambient", "1 bar gauge"], "--ambient"),  # absolute by definition (a sweep found it taken)
    ],
)
def test_bad_input_is_one_line_exit_2(capsys, args, flag):
    base = {"--cell-volume": "10", "--expansion-volume": "7", "--p1": "1.4", "--p2": "0.58"}
    extra = []
    for k, v in zip(args[::2], args[1::2], strict=True):
        if k in base:
            base[k] = v
        else:
            extra += [k, v]
    argv = ["compute", "--gauge", *[x for kv in base.items() for x in kv], *extra]
    rc = main(argv)
    err = capsys.readouterr().err
    assert rc == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and flag in lines[0] and "Traceback" not in err


def test_a_volume_below_zero_within_its_uncertainty_warns(capsys):
    # ideal gas: 10 - 7 / (1.0 / 0.6 - 1) = -0.5 cm3, with U about 2 cm3: an empty cell can measure so
    rc = main(["compute", "--cell-volume", "10", "--expansion-volume", "7", "--p1", "1.0", "--p2", "0.6",
               "--gauge", "--gas", "ideal", "--u-cell-volume", "1"])
    out = capsys.readouterr().out
    assert rc == 0 and "warning: sample volume -0.5 cm^3 lies outside" in out and "NOT A MEASUREMENT" not in out


def test_an_impossible_volume_is_not_a_measurement_with_runs_exit_code(capsys):
    # found by a sweep: a volume below zero beyond its U was printed as a result with a warning, exit 0,
    # where `run` exits 7 and marks it under the number
    args = ["compute", "--cell-volume", "10", "--expansion-volume", "7", "--p1", "1.4", "--p2", "1.3", "--gauge",
            "--mass", "5 g", "--u-cell-volume", "0.001", "--u-expansion-volume", "0.001"]
    assert main(args) == 7
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("sample volume   -") and lines[1].startswith("  ideal-gas form")
    assert lines[2].startswith("NOT A MEASUREMENT: the volume -")
    assert not any(ln.startswith(("density", "warning")) for ln in lines)  # said once, and no density of it
    assert main([*args, "--json"]) == 7
    captured = capsys.readouterr()
    out = json.loads(captured.out)
    assert out["impossible"] and out["warnings"] == [f"NOT A MEASUREMENT: {out['impossible']}"]
    assert "density_g_cm3" not in out and "NOT A MEASUREMENT" in captured.err
    assert main([*args, "--csv"]) == 7


def test_huge_pressure_uncertainty_warns(capsys):
    # a bare --u-p is in bar, so '--u-p 50' is 50 bar: warned, not silently used
    rc = main(["compute", "--cell-volume", "10", "--expansion-volume", "7", "--p1", "1.4", "--p2", "0.58",
               "--gauge", "--u-p", "50"])
    assert rc == 0 and "--u-p" in capsys.readouterr().out


def test_console_script_subprocess():
    exe = Path(sys.executable).parent / "pycnoctl"  # the console script of the environment running the tests
    assert exe.exists(), f"console script not installed beside {sys.executable}"
    proc = subprocess.run(
        [str(exe), "compute", "--cell-volume", "12", "--expansion-volume", "8", "--p1", "1.3", "--p2",
         "0.389297", "--gauge", "--gas", "ideal", "--json"],
        capture_output=True, text=True, timeout=60, check=False,
    )
    assert proc.returncode == 0, proc.stderr
    # methods.md [D] calibration check case: a 25.4 mm sphere (8.580247 cm^3) gives P2g = 0.389297 bar
    assert json.loads(proc.stdout)["volume_cm3"] == pytest.approx(8.580247, abs=5e-5)
    bad = subprocess.run([str(exe), "compute", "--cell-volume", "12", "--expansion-volume", "8", "--p1",
                          "3 kg", "--p2", "1"], capture_output=True, text=True, timeout=60, check=False)
    assert bad.returncode == 2 and "--p1" in bad.stderr and "Traceback" not in bad.stderr


def test_roundtrip_with_expansion_pressure(capsys):
    vs = 3.3 * CM3
    p2 = expansion_pressure(vs, PA + 1.5e5, PA, 10 * CM3, 7 * CM3, gas="nitrogen", t1=295.0)
    out = run_json(capsys, "--cell-volume", "10", "--expansion-volume", "7", "--p1", f"{PA + 1.5e5!r} Pa",
                   "--p2", f"{p2!r} Pa", "--gas", "N2", "--temperature", "295 K", "--mode", "sample_first",
                   "--absolute")
    assert out["volume_cm3"] == pytest.approx(3.3, rel=1e-10)


def test_a_lab_pressure_or_temperature_with_its_unit_is_taken(capsys):
    a = run_json(capsys, "--cell-volume", "10", "--expansion-volume", "7", "--p1", "1.4", "--p2", "0.58",
                 "--ambient", "1013.25 hPa", "--temperature", "295.15 K")
    b = run_json(capsys, "--cell-volume", "10", "--expansion-volume", "7", "--p1", "1.4", "--p2", "0.58",
                 "--ambient", "1.01325", "--temperature", "22")
    assert a["volume_cm3"] == pytest.approx(b["volume_cm3"], rel=1e-12)


@pytest.mark.parametrize("edge", ["-40 degC", "-40", "233.15 K", "80 degC", "176 degF"])
def test_the_ends_of_a_labs_temperature_range_are_in_it(capsys, edge):
    # -40 degC came back from the unit conversion as 233.14999999999998 K and was refused (a sweep found it)
    run_json(capsys, "--cell-volume", "10", "--expansion-volume", "7", "--p1", "1.4", "--p2", "0.58",
             "--temperature", edge)


EXACT = "chamber volumes taken as exact: give --u-cell-volume and --u-expansion-volume"


def test_volumes_without_their_uncertainties_are_said_to_be_taken_as_exact(capsys):
    # found by a sweep: '+/- 0.00000 cm^3 (expanded U, k = 2)' printed with no word that the budget is empty
    args = ["compute", "--cell-volume", "12", "--expansion-volume", "8", "--p1", "1.09", "--p2", "0.5085",
            "--mass", "12.5"]
    assert main(args) == 0
    lines = capsys.readouterr().out.splitlines()
    assert "+/- 0.00000 cm^3 (expanded U" in lines[0]
    assert lines[2] == f"warning: {EXACT}"  # next to the result, once
    assert sum(EXACT in ln for ln in lines) == 1
    assert main([*args, "--json"]) == 0
    captured = capsys.readouterr()
    assert json.loads(captured.out)["warnings"] == [EXACT] and EXACT in captured.err
    assert main([*args, "--u-expansion-volume", "0.001"]) == 0
    assert "warning: cell volume Vc taken as exact: give --u-cell-volume" in capsys.readouterr().out
    assert main([*args, "--u-expansion-volume", "0.001", "--u-cell-volume", "0.001"]) == 0
    assert "taken as exact" not in capsys.readouterr().out
