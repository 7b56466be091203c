"""Gas properties for the expansion equations: molar mass, heat-capacity ratio and virial coefficients.

Why: at 1-3 bar helium is within 0.05 % of ideal, but a pycnometer resolves better than that, and
nitrogen, argon and air deviate several times more.  The working equations therefore count moles as
n = P V / (Z R T) with Z from a virial expansion.

Sources of the coefficients (no runtime dependency on them):
  B(T), C(T) = sum_i a_i (T0/T)**i, i = 0..3, T0 = 298.15 K, least-squares fitted here over 240-360 K
  (241 points) to the second and third virial coefficients implied by the reference equations of state
  as implemented in CoolProp 8.0.0:
    helium   - the helium-4 reference Helmholtz equation of state (CoolProp fluid "Helium")
    nitrogen - the nitrogen reference Helmholtz equation of state (CoolProp fluid "Nitrogen")
    argon    - the argon reference Helmholtz equation of state (CoolProp fluid "Argon")
    air      - the pseudo-pure dry-air reference equation of state (CoolProp fluid "Air")
  Maximum deviation of the fit from CoolProp over 240-360 K:
    B: He 0.00027, N2 0.00082, Ar 0.00064, air 0.0011 cm^3/mol
    C: He 0.0022, N2 0.13, Ar 0.14, air 0.0049 cm^6/mol^2
  Refit and print: ``python tests/test_gas.py --refit`` (needs CoolProp).

Z uses the pressure-series virial form truncated after the third coefficient,
  Z = 1 + B p + (C - B^2) p^2,  p = P/(R T).
The two-term form Z = 1 + B P/(R T) alone misses CoolProp's Z by up to 2.7e-5 for air and 2.2e-5 for
nitrogen at 3 bar (measured against CoolProp 8.0.0, see tests/test_gas.py), so C is kept; with it the
residual is below 3e-7 at 1-3 bar, 15-35 C.

Molar masses are those of the CoolProp fluid files; gamma is the ideal-gas Cp/Cv at 298.15 K from the
same equations of state (5/3 for the monatomic gases).
"""

from __future__ import annotations

from collections.abc import Callable

from pycnoctl.controller.domain.values import FrozenValue

#: Molar gas constant, J/(mol K): N_A k with both exact since the 2019 SI (CODATA 2018 prints it
#: as 8.314462618...; the product keeps all digits).
R: float = 6.02214076e23 * 1.380649e-23

#: Reference temperature of the virial fits, K.
T_FIT: float = 298.15
#: Range over which the virial fits were made and are trusted, K.
T_RANGE: tuple[float, float] = (240.0, 360.0)

_CM3 = 1e-6  # cm^3/mol -> m^3/mol
_CM6 = 1e-12  # cm^6/mol^2 -> m^6/mol^2


class UnknownGas(ValueError):
    """A gas name that is not in the table."""


def _series(coeffs: tuple[float, ...], t: float) -> float:
    x = T_FIT / t
    total = 0.0
    for a in reversed(coeffs):
        total = total * x + a
    return total


class Gas(FrozenValue):
    """One working gas.  ``b_coeffs`` in cm^3/mol, ``c_coeffs`` in cm^6/mol^2 (series in T_FIT/T).

    Immutable; equal (and hashed) on every field but ``source``; its repr shows name, molar mass and
    gamma (not a dataclass: see domain.values).
    """

    _FIELDS = ("name", "molar_mass", "gamma", "b_coeffs", "c_coeffs", "source")
    _COMPARED = ("name", "molar_mass", "gamma", "b_coeffs", "c_coeffs")
    _SHOWN = ("name", "molar_mass", "gamma")
    name: str
    molar_mass: float  # kg/mol
    gamma: float  # ideal-gas Cp/Cv near room temperature
    b_coeffs: tuple[float, ...]
    c_coeffs: tuple[float, ...]
    source: str

    def __init__(self, name: str, molar_mass: float, gamma: float, b_coeffs: tuple[float, ...] = (),
                 c_coeffs: tuple[float, ...] = (), source: str = "") -> None:
        self._freeze(name=name, molar_mass=molar_mass, gamma=gamma, b_coeffs=b_coeffs, c_coeffs=c_coeffs,
                     source=source)

    @property
    def is_ideal(self) -> bool:
        return not self.b_coeffs and not self.c_coeffs

    def B(self, T: float) -> float:
        """Second virial coefficient, m^3/mol."""
        return _series(self.b_coeffs, T) * _CM3 if self.b_coeffs else 0.0

    def C(self, T: float) -> float:
        """Third virial coefficient (density series), m^6/mol^2."""
        return _series(self.c_coeffs, T) * _CM6 if self.c_coeffs else 0.0

    def Z(self, P: float, T: float) -> float:
        """Compressibility factor at absolute pressure P (Pa) and temperature T (K)."""
        if self.is_ideal:
            return 1.0
        b = self.B(T)
        p = P / (R * T)
        return 1.0 + b * p + (self.C(T) - b * b) * p * p

    def molar_density(self, P: float, T: float) -> float:
        """Amount density n/V = P/(Z R T), mol/m^3."""
        return P / (self.Z(P, T) * R * T)

    def moles(self, P: float, V: float, T: float) -> float:
        """Amount of gas in volume V (m^3) at P (Pa), T (K), mol."""
        return V * self.molar_density(P, T)

    def mass_density(self, P: float, T: float) -> float:
        """Mass density, kg/m^3."""
        return self.molar_mass * self.molar_density(P, T)


def virial_function(gas: Gas) -> Callable[[float], tuple[float, float]] | None:
    """A function T -> (B(T), C(T)) for the gas, or None for an ideal gas.

    Why: the simulator evaluates its equation of state for every volume on every step; one call that
    shares T_FIT/T between both series (unrolled for the four-term fits of the table) costs a third
    of two method calls.  The arithmetic is that of Gas.B and Gas.C, to the last bit."""
    if gas.is_ideal:
        return None
    bc, cc = gas.b_coeffs, gas.c_coeffs
    if len(bc) != 4 or len(cc) != 4:
        return lambda t: (gas.B(t), gas.C(t))
    b0, b1, b2, b3 = bc
    c0, c1, c2, c3 = cc

    def pair(t: float) -> tuple[float, float]:
        x = T_FIT / t
        return ((((b3 * x + b2) * x + b1) * x + b0) * _CM3, (((c3 * x + c2) * x + c1) * x + c0) * _CM6)

    return pair


_TABLE: dict[str, Gas] = {
    "helium": Gas(
        "helium",
        4.002602e-3,
        5.0 / 3.0,
        (8.23799793, 6.85341411, -4.12558589, 0.878723384),
        (30.2918006, 112.946203, -45.1929877, 8.78978921),
        "helium-4 reference EOS via CoolProp 8.0.0",
    ),
    "nitrogen": Gas(
        "nitrogen",
        28.01348e-3,
        1.39953,
        (40.6884799, -31.6694422, -15.5752045, 1.64618315),
        (1268.48788, -256.432404, 270.076089, 132.315437),
        "nitrogen reference EOS via CoolProp 8.0.0",
    ),
    "argon": Gas(
        "argon",
        39.948e-3,
        5.0 / 3.0,
        (33.1527033, -35.9321764, -13.58268, 0.807857854),
        (891.634287, -506.093361, 686.62878, -10.5859381),
        "argon reference EOS via CoolProp 8.0.0",
    ),
    "air": Gas(
        "air",
        28.96546e-3,
        1.39999,
        (38.1229089, -32.4489736, -15.3606586, 1.5647142),
        (1279.32545, 230.18931, 338.583807, -31.4345601),
        "pseudo-pure dry-air reference EOS via CoolProp 8.0.0",
    ),
    # Ideal gas: Z = 1.  Molar mass and gamma of helium so thermal models still have numbers.
    "ideal": Gas("ideal", 4.002602e-3, 5.0 / 3.0, (), (), "ideal gas law"),
}

_ALIASES: dict[str, str] = {"he": "helium", "n2": "nitrogen", "ar": "argon", "dry air": "air"}

#: Names accepted by :func:`get_gas` (aliases He, N2, Ar also work, any case).
GASES: tuple[str, ...] = tuple(_TABLE)


def get_gas(name: str | Gas) -> Gas:
    """Look a gas up by name, case-insensitive; a Gas passes through unchanged."""
    if isinstance(name, Gas):
        return name
    key = str(name).strip().lower()
    key = _ALIASES.get(key, key)
    try:
        return _TABLE[key]
    except KeyError:
        raise UnknownGas(
            f"unknown gas {name!r}; choose one of: {', '.join(GASES)} (aliases He, N2, Ar)"
        ) from None
