"""Units at the edges: parse user text ('1.4 bar', '25 degC', '10 cm3') into SI floats, and format back.

Why: every value entering pycnoctl (command line, sequence files, configs) may carry a unit; inside,
everything is a plain float in SI (Pa, m^3, K, kg, s).  One shared pint registry does the conversion,
so a pressure typed in psi and one typed in kPa give bit-for-bit comparable numbers.

A bare number takes the parser's default unit.  Temperatures in degC/degF are converted as absolute
temperatures (25 degC -> 298.15 K); use :func:`parse_temperature_difference` for uncertainties and
steps, where 0.1 degC means 0.1 K.
"""

from __future__ import annotations

import functools
import math
import re

# typing.TYPE_CHECKING without importing typing (about 2 ms of every start of the command line; the
# annotations are never evaluated): type checkers take the name as True.
TYPE_CHECKING = False
if TYPE_CHECKING:
    from typing import Any

    import pint


@functools.cache
def registry() -> pint.UnitRegistry[Any]:
    """The one registry of the project, built on first use (importing pint and building the registry
    costs about a quarter of a second: a command that never parses a unit must not pay it).
    Offset units (degC) are only ever built as Quantity(value, unit)."""
    import pint

    return pint.UnitRegistry(autoconvert_offset_to_baseunit=True)


def __getattr__(name: str) -> Any:
    # ``units.ureg`` and ``units.Q_`` stay available as before, built on first access
    if name == "ureg":
        return registry()
    if name == "Q_":
        return registry().Quantity
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


class UnitError(ValueError):
    """Text that is not a number with a unit of the expected kind."""


# dimension name -> (pint dimensionality, SI unit, article+noun for messages)
_DIMENSIONS: dict[str, tuple[str, str, str]] = {
    "pressure": ("[pressure]", "Pa", "a pressure"),
    "volume": ("[volume]", "m**3", "a volume"),
    "temperature": ("[temperature]", "K", "a temperature"),
    "temperature_difference": ("[temperature]", "K", "a temperature difference"),
    "mass": ("[mass]", "kg", "a mass"),
    "duration": ("[time]", "s", "a duration"),
    "rate": ("[pressure]/[time]", "Pa/s", "a pressure rate"),
    "length": ("[length]", "m", "a length"),
    "density": ("[density]", "kg/m**3", "a density"),
    "fraction": ("[]", "", "a fraction"),
}
_ALIAS_DIM = {"time": "duration", "dimensionless": "fraction", "pressure_rate": "rate"}

_NUMBER_UNIT = re.compile(
    r"^\s*(?P<num>[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)\s*(?P<unit>.*?)\s*$"
)
# 'cm3' -> 'cm**3', 'm2' -> 'm**2' (a unit symbol directly followed by a power digit)
_POWER_DIGIT = re.compile(r"(?<=[A-Za-z])([23])(?![A-Za-z0-9])")
_REPLACE = (("°C", "degC"), ("℃", "degC"), ("°F", "degF"), ("°", "deg"), ("³", "**3"), ("²", "**2"),
            ("µ", "u"), ("μ", "u"))
_OFFSET_UNITS = {"degree_Celsius": "kelvin", "degree_Fahrenheit": "degree_Rankine"}


# (unit text after _clean_unit, dimension) -> factor to SI: the common units, converted without
# building the registry.  Each factor is the float the registry itself computes, so x * factor is
# bit-for-bit what pint returns (tests/test_units.py checks every entry against the registry);
# any other unit, and every error message, goes through pint.
_FAST_FACTORS: dict[tuple[str, str], float] = {
    ("Pa", "pressure"): 1.0, ("kPa", "pressure"): 1000.0, ("MPa", "pressure"): 1000000.0,
    ("hPa", "pressure"): 100.0, ("bar", "pressure"): 100000.0, ("mbar", "pressure"): 100.0,
    ("psi", "pressure"): 6894.7572931683635, ("atm", "pressure"): 101325.0, ("torr", "pressure"): 133.32236842105263,
    ("m**3", "volume"): 1.0, ("cm**3", "volume"): 1.0000000000000002e-06, ("mm**3", "volume"): 1e-09,
    ("mL", "volume"): 1.0000000000000002e-06, ("ml", "volume"): 1.0000000000000002e-06,
    ("L", "volume"): 0.0010000000000000002,
    ("K", "temperature"): 1.0, ("K", "temperature_difference"): 1.0, ("degC", "temperature_difference"): 1.0,
    ("kg", "mass"): 1.0, ("g", "mass"): 0.001, ("mg", "mass"): 1e-06,
    ("s", "duration"): 1.0, ("ms", "duration"): 0.001, ("min", "duration"): 60.0, ("h", "duration"): 3600.0,
    ("m", "length"): 1.0, ("cm", "length"): 0.01, ("mm", "length"): 0.001,
    ("kg/m**3", "density"): 1.0, ("g/cm**3", "density"): 999.9999999999999,
    ("Pa/s", "rate"): 1.0, ("", "fraction"): 1.0, ("%", "fraction"): 0.01, ("ppm", "fraction"): 1e-06,
}
# absolute temperature in degC: the registry adds the offset to the magnitude (scale 1)
_DEGC_OFFSET = 273.15


def _fast_si(value: Any, key: str, default_unit: str) -> float | None:
    """SI magnitude of a plain number or 'number unit' text in a common unit; None: ask pint."""
    if isinstance(value, bool):
        return None
    if isinstance(value, int | float):
        magnitude, unit = float(value), default_unit
    elif isinstance(value, str):
        m = _NUMBER_UNIT.match(value)
        if not m:
            return None
        magnitude = float(m.group("num"))
        unit = _clean_unit(m.group("unit")) or default_unit
    else:
        return None
    if unit == "degC" and key == "temperature":
        out = magnitude + _DEGC_OFFSET
    else:
        factor = _FAST_FACTORS.get((unit, key))
        if factor is None:
            return None
        out = magnitude * factor
    return out if math.isfinite(out) and math.isfinite(magnitude) else None


def _clean_unit(unit: str) -> str:
    for old, new in _REPLACE:
        unit = unit.replace(old, new)
    unit = unit.replace("^", "**")
    return _POWER_DIGIT.sub(r"**\1", unit)


def _dim_key(dimension: str) -> str:
    key = dimension.strip().lower()
    key = _ALIAS_DIM.get(key, key)
    if key not in _DIMENSIONS:
        raise UnitError(f"unknown dimension {dimension!r}; known: {', '.join(_DIMENSIONS)}")
    return key


def to_quantity(value: Any, default_unit: str, *, difference: bool = False, said: Any = None) -> pint.Quantity[Any]:
    """Text, number or Quantity -> Quantity of this registry (bare numbers get ``default_unit``).

    ``said``: what the user typed, when ``value`` is a rewriting of it ('1.3 BAR' -> '1.3 bar', a tag cut
    off): messages quote the user's own text, not one they never wrote."""
    shown = value if said is None else said
    import tokenize  # with pint: its parser raises tokenize errors on some garbage

    import pint

    ureg = registry()
    Q_ = ureg.Quantity
    if isinstance(value, pint.Quantity):
        if value._REGISTRY is not ureg:  # another registry: go through its unit string
            return Q_(value.magnitude, str(value.units))
        return value
    if isinstance(value, bool):
        raise UnitError(f"{value!r} is not a number")
    if isinstance(value, int | float):
        magnitude, unit = float(value), default_unit
    else:
        text = str(value)
        m = _NUMBER_UNIT.match(text)
        if not m:
            raise UnitError(f"{shown!r} is not a number with a unit")
        magnitude = float(m.group("num"))
        unit = _clean_unit(m.group("unit")) or default_unit
    if not math.isfinite(magnitude):
        raise UnitError(f"{shown!r} is not a finite number")
    try:
        units = ureg.parse_units(unit) if unit else ureg.dimensionless
    except (pint.UndefinedUnitError, pint.errors.DefinitionSyntaxError, AttributeError, TypeError,
            ValueError, SyntaxError, ArithmeticError, tokenize.TokenError) as exc:
        raise UnitError(f"{shown!r}: unknown unit {unit!r}") from exc
    if difference:
        # a temperature step in degC is a step in K; map offset units onto their delta units
        name = str(units)
        if name in _OFFSET_UNITS:
            units = ureg.parse_units(_OFFSET_UNITS[name])
    return Q_(magnitude, units)


def parse_quantity(value: Any, dimension: str, *, default_unit: str | None = None, said: Any = None) -> float:
    """Parse ``value`` as the named dimension and return the SI magnitude.

    ``dimension`` is one of: pressure, volume, temperature, temperature_difference, mass, duration
    (time), rate (Pa/s), length, density, fraction.  ``default_unit`` applies to bare numbers
    (SI when not given); ``said`` is the user's text when ``value`` rewrites it (see to_quantity).
    """
    shown = value if said is None else said
    key = _dim_key(dimension)
    dimensionality, si_unit, noun = _DIMENSIONS[key]
    fast = _fast_si(value, key, default_unit if default_unit is not None else si_unit)
    if fast is not None:
        return fast
    import pint

    q = to_quantity(value, default_unit if default_unit is not None else si_unit,
                    difference=(key == "temperature_difference"), said=shown)
    if not q.check(dimensionality):
        raise UnitError(f"{_show(shown)} is not {noun}")
    try:
        out = float(q.to(si_unit).magnitude) if si_unit else float(q.to("").magnitude)
    except pint.DimensionalityError as exc:  # pragma: no cover - check() already guards this
        raise UnitError(f"{_show(shown)} is not {noun}") from exc
    if not math.isfinite(out):
        raise UnitError(f"{_show(shown)} is not a finite number")
    return out


def _show(value: Any) -> str:
    return repr(value) if isinstance(value, str) else repr(str(value))


#: Pa, absolute: the air pressure of any lab, from about 5500 m up to below sea level (a standard
#: atmosphere is 101.325 kPa; the barometric formula gives about 50 kPa at 5500 m; margins both ways)
LAB_PRESSURE = (30e3, 120e3)
#: K: the temperature of a lab and of the gas a pycnometer holds in it, -40 to +80 degC (common practice;
#: the instruments are run near room temperature)
LAB_TEMPERATURE = (233.15, 353.15)


def _bare(value: Any) -> bool:
    try:
        float(value)
    except (TypeError, ValueError):
        return False
    return not isinstance(value, bool)


def lab_pressure_problem(value: Any, pa: float, *, default_unit: str = "bar") -> str | None:
    """Why an absolute lab pressure read from ``value`` (``pa`` in Pa) cannot be one, or None.

    Why: a bare 1013 meant as hPa is read as 1013 bar, and a bare 295 meant as kelvin as degC; each gave
    a result with no word of the mistake."""
    return _out_of_lab(value, pa / 1e3, (LAB_PRESSURE[0] / 1e3, LAB_PRESSURE[1] / 1e3), "kPa absolute",
                       "a lab's air pressure", "kPa", "'1013 hPa' or '101.3 kPa'", default_unit)


def lab_temperature_problem(value: Any, kelvin: float, *, default_unit: str = "degC") -> str | None:
    """Why a lab or gas temperature read from ``value`` (``kelvin``) cannot be one, or None."""
    return _out_of_lab(value, kelvin - 273.15, (LAB_TEMPERATURE[0] - 273.15, LAB_TEMPERATURE[1] - 273.15), "degC",
                       "a lab's temperature", "degC", "'22 degC' or '295.15 K'", default_unit)


def _out_of_lab(value: Any, shown: float, bounds: tuple[float, float], read_as: str, what: str, unit: str,
                example: str, default_unit: str) -> str | None:
    """The refusal of a value outside what a lab can have, in the unit it is shown in. The ends are in
    the range, to a millionth (-40 degC comes back from a conversion as 233.14999999999998 K)."""
    lo, hi = bounds
    if lo - 1e-6 <= shown <= hi + 1e-6:
        return None
    bare = _bare(value)
    return (f"{_show(value)} reads as {shown:.7g} {read_as}{f' (a bare number is {default_unit})' if bare else ''}; "
            f"{what} lies between {lo:g} and {hi:g} {unit}: "
            + (f"give the unit, e.g. {example}" if bare else "check the value and its unit"))


# pressure units as gauges' faces and labels print them in capitals ('1.3 BAR', '19 PSI'); pint's names
# are case-sensitive and know none of these.  Only whole upper-case spellings are mapped: 'MPA' is megapascal
# as industry writes it, a lower-case 'mpa' stays unknown rather than guessed.
_UPPER_PRESSURE = {"PA": "Pa", "HPA": "hPa", "KPA": "kPa", "MPA": "MPa", "BAR": "bar", "MBAR": "mbar",
                   "PSI": "psi", "TORR": "torr", "ATM": "atm"}


def _lower_pressure_unit(value: Any) -> Any:
    if not isinstance(value, str):
        return value
    m = _NUMBER_UNIT.match(value)
    if m is None or m.group("unit") not in _UPPER_PRESSURE:
        return value
    return f"{m.group('num')} {_UPPER_PRESSURE[m.group('unit')]}"


def parse_pressure(value: Any, *, default_unit: str = "bar") -> float:
    """Pressure in Pa (as given: absolute or gauge is the caller's business)."""
    return _pressure(value, default_unit, said=value, tags=False)


def _pressure(value: Any, default_unit: str, *, said: Any, tags: bool) -> float:
    """parse_pressure, quoting ``said`` (the user's text) in its messages; ``tags``: whether the key takes
    a gauge tag, which decides what a lone 'g' after the unit is told to become."""
    try:
        return parse_quantity(_lower_pressure_unit(value), "pressure", default_unit=default_unit, said=said)
    except UnitError as exc:
        hint = _lone_g_hint(said, default_unit, tags=tags)
        if hint is None:
            raise
        raise UnitError(f"{exc}{hint}") from None


# '1.3 bar g', '2 kPa G': pint reads the lone g as gram and says 'not a pressure', with no word of the tag
_LONE_G = re.compile(r"^\s*(?P<num>\S+?)\s*(?P<unit>[A-Za-z]+)\s+g\s*$", re.IGNORECASE)


def _lone_g_hint(said: Any, default_unit: str, *, tags: bool) -> str | None:
    """What to write instead of a 'g' standing apart after a pressure unit, or None when it is not that."""
    m = _LONE_G.match(said) if isinstance(said, str) else None
    if m is None:
        return None
    num, unit = m.group("num"), m.group("unit")
    try:
        parse_quantity(_lower_pressure_unit(f"{num} {unit}"), "pressure", default_unit=default_unit)
    except UnitError:
        return None  # the unit itself is wrong: its own message says so
    if not tags:
        return " (a 'g' apart from the unit is read as gram; this value takes no gauge tag)"
    spellings = []
    for text in (f"{num} {unit}g", f"{num} {unit}(g)"):
        try:
            if parse_pressure_spec(text, default_unit=default_unit)[1] is True:
                spellings.append(repr(text))
        except UnitError:
            pass
    return f" (a 'g' apart from the unit is read as gram): write {' or '.join(spellings)}"


def parse_volume(value: Any, *, default_unit: str = "cm**3") -> float:
    """Volume in m^3."""
    return parse_quantity(value, "volume", default_unit=default_unit)


def parse_temperature(value: Any, *, default_unit: str = "degC") -> float:
    """Absolute temperature in K (bare numbers are degC)."""
    out = parse_quantity(value, "temperature", default_unit=default_unit)
    if out <= 0.0:
        raise UnitError(f"{_show(value)} is at or below absolute zero")
    return out


def parse_temperature_difference(value: Any, *, default_unit: str = "K") -> float:
    """Temperature step or uncertainty in K; '0.1 degC' means 0.1 K."""
    return parse_quantity(value, "temperature_difference", default_unit=default_unit)


def parse_mass(value: Any, *, default_unit: str = "g") -> float:
    """Mass in kg (bare numbers are grams)."""
    return parse_quantity(value, "mass", default_unit=default_unit)


def parse_duration(value: Any, *, default_unit: str = "s") -> float:
    """Duration in s."""
    return parse_quantity(value, "duration", default_unit=default_unit)


def parse_rate(value: Any, *, default_unit: str = "Pa/s") -> float:
    """Pressure rate of change in Pa/s."""
    return parse_quantity(value, "rate", default_unit=default_unit)


def parse_length(value: Any, *, default_unit: str = "mm") -> float:
    """Length in m (bare numbers are millimetres)."""
    return parse_quantity(value, "length", default_unit=default_unit)


def parse_density(value: Any, *, default_unit: str = "g/cm**3") -> float:
    """Density in kg/m^3 (bare numbers are g/cm^3)."""
    return parse_quantity(value, "density", default_unit=default_unit)


def parse_fraction(value: Any) -> float:
    """Dimensionless fraction: '0.05 %' -> 0.0005, '2 ppm' -> 2e-6, '0.01' -> 0.01."""
    return parse_quantity(value, "fraction", default_unit="")


# the tag after the unit: '(g)', 'gauge', 'abs', or glued to bar or psi as the trade writes it ('1.3 barg',
# '19 psia'; a bare '1.3 barg' was an unknown unit with no word that the key is gauge already)
_GAUGE_SUFFIX = re.compile(r"\s*(?:\((?P<g1>g|gauge|a|abs|absolute)\)|\b(?P<g2>gauge|absolute|abs)|"
                           r"(?<=bar|psi)(?P<g3>g|a)|(?<=kPa|MPa)(?P<g4>g))\s*$", re.IGNORECASE)


def parse_pressure_spec(value: Any, *, default_unit: str = "bar") -> tuple[float, bool | None]:
    """Pressure with an optional reference tag: '1.4 bar gauge', '1.4 bar(g)', '2.4 bar abs'.

    Returns (Pa, gauge) where gauge is True/False when tagged and None when not.
    """
    if not isinstance(value, str):
        return parse_pressure(value, default_unit=default_unit), None
    m = _GAUGE_SUFFIX.search(value)
    if not m:
        return _pressure(value, default_unit, said=value, tags=True), None
    tag = (m.group("g1") or m.group("g2") or m.group("g3") or m.group("g4")).lower()
    gauge = tag in ("g", "gauge")
    # the messages quote what was typed ('1.3 Barg'), not the text left when the tag is cut off ('1.3 Bar')
    return _pressure(value[: m.start()], default_unit, said=value, tags=True), gauge


def parse_gauge_pressure(value: Any, *, default_unit: str = "bar") -> float:
    """A pressure above the lab's (Pa), where the key says gauge: a 'gauge' tag is welcome ('1.3 barg'),
    an absolute one refused, since it would be read as gauge."""
    return parse_pressure_on(value, "gauge", default_unit=default_unit)


def parse_pressure_on(value: Any, scale: str, *, default_unit: str = "bar") -> float:
    """A pressure (Pa) on a scale the key already fixes, 'gauge' or 'absolute' (a gauge or an absolute
    transducer's range): that scale's tag is welcome ('3.5 barg' on a gauge transducer), the other one
    refused, since the value would be read on this scale whatever its tag said."""
    pa, gauge = parse_pressure_spec(value, default_unit=default_unit)
    if scale == "gauge" and gauge is False:
        raise UnitError(f"{_show(value)} is tagged absolute, but this pressure is gauge (above the lab's "
                        "pressure): give it as gauge, e.g. '1.3 bar'")
    if scale == "absolute" and gauge is True:
        raise UnitError(f"{_show(value)} is tagged gauge, but this pressure is absolute (above vacuum): give it "
                        "as absolute, e.g. '2.3 bar'")
    return pa


def format_quantity(value_si: float, dimension: str, unit: str, *, digits: int = 6) -> str:
    """SI float -> '12.3456 cm³' style text in the requested unit (significant digits)."""
    key = _dim_key(dimension)
    _, si_unit, _ = _DIMENSIONS[key]
    q = registry().Quantity(value_si, si_unit or "").to(_clean_unit(unit))
    return f"{q.magnitude:.{digits}g} {q.units:~P}".rstrip()


def convert(value_si: float, dimension: str, unit: str) -> float:
    """SI float -> magnitude in ``unit`` (e.g. convert(1e-6, 'volume', 'cm^3') == 1.0)."""
    key = _dim_key(dimension)
    _, si_unit, _ = _DIMENSIONS[key]
    return float(registry().Quantity(value_si, si_unit or "").to(_clean_unit(unit)).magnitude)
