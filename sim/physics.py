"""Gas-network physics: lumped volumes joined by restrictions, with mass and energy balances.

Why this shape: a pycnometer is a handful of rigid volumes and valves, so a lumped model is exact
enough, and small enough to integrate in pure Python far faster than real time.

Model (textbook lumped-parameter gas dynamics):
- Each volume node holds n (mol) and U (J).  Caloric model: ideal gas, U = n cv T with
  cv = R/(gamma-1) and cp = gamma cv (the real-gas departure of U is of order B*rho ~ 1e-3 for helium
  at 2 bar and is neglected).  Thermal model P-n-T: the virial EOS of controller.gas,
  P = Z rho R T with Z(P, T) from Gas.Z, so n = P V / (Z R T) exactly as the measurement core counts.
- Fixed nodes (the regulated supply, ambient) are infinite reservoirs at a given P and T.
- Restrictions: an orifice (isentropic nozzle, choked below the critical pressure ratio, subsonic
  above it, blended to a linear law within ``LINEAR_BAND`` of equal pressures where the nozzle law's
  infinite slope is unphysical), or a linear conductance C (m^3/s, molar flow C*dp/(R T_up)) used
  for leaks and for the pore sub-volume of a porous sample.
- Flow carries the molar enthalpy cp*T_up of the upstream gas: the downstream gas heats on filling,
  the upstream gas cools as it expands (first law for open control volumes).
- Each node relaxes toward its wall temperature at constant volume with time constant tau
  (Newton's law of cooling, h*A lumped as n*cv/tau); tau=None means adiabatic walls.

Integration (operator splitting per step): first the exact exponential heat exchange of each node,
then one linearly implicit (backward Euler) flow step over all open restrictions, each linearised by
its secant conductance, predicted once and corrected once (see ``_flow_step``).  Backward Euler is
L-stable, so the stiff millisecond orifice flows never limit the step once pressures have equalised;
the transfers are applied pairwise, so moles and energy are conserved to round-off.  The caller
picks the step: :meth:`GasNetwork.max_step` bounds the relative change of moles per step (accuracy
of fast flows and of the adiabatic temperature changes) and the step of a node that both flows and
exchanges heat (accuracy of the splitting).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from pycnoctl.controller.domain.gas import Gas, R, virial_function

#: Within this relative pressure difference the nozzle law is replaced by a linear one (laminar-like
#: approach to equilibrium).  Its flow at the band edge is kept, so the law stays continuous.
LINEAR_BAND: float = 0.005
#: A gas within this many kelvin of its wall temperature is taken as settled (snapped to it).
SNAP_K: float = 1e-9


def critical_pressure_ratio(gamma: float) -> float:
    """p_down/p_up below which an isentropic nozzle is choked: (2/(gamma+1))^(gamma/(gamma-1))."""
    return (2.0 / (gamma + 1.0)) ** (gamma / (gamma - 1.0))


def choked_mass_flux_factor(gamma: float) -> float:
    """sqrt(gamma) (2/(gamma+1))^((gamma+1)/(2(gamma-1))): m_dot = Cd A p0 factor / sqrt(R_s T0)."""
    return math.sqrt(gamma) * (2.0 / (gamma + 1.0)) ** ((gamma + 1.0) / (2.0 * (gamma - 1.0)))


class Nozzle:
    """The isentropic nozzle law of one gas, with its constants worked out once.

    Why a class: the integrator evaluates the law for every open restriction twice a step, and the
    exponents, the choked factor and the flow at the edge of the linear band depend only on the gas."""

    __slots__ = ("_choke", "_edge", "_k_sub", "_k_temp", "_r_crit", "_x1", "_x2", "r_specific")

    def __init__(self, gamma: float, r_specific: float) -> None:
        self.r_specific = r_specific
        self._r_crit = critical_pressure_ratio(gamma)
        self._choke = choked_mass_flux_factor(gamma)
        self._x1 = 2.0 / gamma
        self._x2 = (gamma + 1.0) / gamma
        self._k_sub = 2.0 * gamma
        self._k_temp = (gamma - 1.0) * r_specific
        r_edge = 1.0 - LINEAR_BAND
        # subsonic flow at the band edge is cda p_up edge / sqrt(T_up)
        self._edge = math.sqrt(self._k_sub / self._k_temp * (r_edge**self._x1 - r_edge**self._x2))

    def mass_flow(self, cda: float, p_up: float, t_up: float, p_down: float) -> float:
        """Mass flow (kg/s, >= 0) through effective area cda = Cd*A (m^2).

        Choked: Cd A p0 sqrt(gamma/(R_s T0)) (2/(gamma+1))^((gamma+1)/(2(gamma-1)));
        subsonic: Cd A p0 sqrt(2 gamma/((gamma-1) R_s T0) (r^(2/gamma) - r^((gamma+1)/gamma))).
        Within LINEAR_BAND of r = 1 the flow falls linearly to zero from its value at the band edge.
        """
        if p_up <= 0.0 or p_down >= p_up:
            return 0.0
        r = p_down / p_up
        if r <= self._r_crit:
            return cda * p_up * self._choke / math.sqrt(self.r_specific * t_up)
        if r >= 1.0 - LINEAR_BAND:
            return cda * p_up * self._edge / math.sqrt(t_up) * (1.0 - r) / LINEAR_BAND
        psi = r**self._x1 - r**self._x2
        return cda * p_up * math.sqrt(self._k_sub / (self._k_temp * t_up) * psi)

    def conductance(self, cda: float, p_up: float, t_up: float, p_down: float) -> float:
        """Secant conductance, mass flow / (p_up - p_down) in kg/(s Pa), for p_up > 0.

        Within the linear band it is the flow at the band edge over the band, whatever the difference
        (so it stays finite as the pressures meet)."""
        dp = p_up - p_down
        if dp <= LINEAR_BAND * p_up:
            return cda * self._edge / (LINEAR_BAND * math.sqrt(t_up))
        return self.mass_flow(cda, p_up, t_up, p_down) / dp


def nozzle_mass_flow(cda: float, p_up: float, t_up: float, p_down: float, gamma: float,
                     r_specific: float) -> float:
    """Isentropic nozzle mass flow (kg/s, >= 0) through effective area cda = Cd*A (m^2): see Nozzle."""
    return Nozzle(gamma, r_specific).mass_flow(cda, p_up, t_up, p_down)


@dataclass
class Node:
    """A gas volume.  ``fixed`` nodes are reservoirs whose P, T are imposed from outside."""

    name: str
    volume: float  # m^3 of gas space
    tau: float | None = None  # thermal time constant to the wall, s; None = adiabatic
    fixed: bool = False
    hidden: bool = False  # not a place a sensor can sit (pore space)


@dataclass
class Link:
    """A restriction between nodes a and b.

    When ``open`` and cda > 0 it is an orifice; otherwise, if conductance > 0, a linear
    conductance (a leak past a closed valve seat, or a pore throat).  A relief link starts to lift
    at ``relief_reseat`` (gauge of a over b) and is fully open (``relief_cda``) at ``relief_set``.
    """

    name: str
    a: int
    b: int
    cda: float = 0.0  # Cd * A, m^2
    conductance: float = 0.0  # m^3/s
    open: bool = False
    relief_set: float | None = None
    relief_reseat: float = 0.0
    relief_cda: float = 0.0  # full-lift effective area of a relief link

    @property
    def active(self) -> bool:
        return (self.open and self.cda > 0.0) or self.conductance > 0.0 or self.relief_set is not None


@dataclass
class NetworkState:
    """Everything needed to roll the network back to a committed time."""

    n: list[float]
    U: list[float]
    relief_open: list[bool]


@dataclass
class GasNetwork:
    """The integrator.  Indices into ``nodes``/``links`` are stable; names map through ``index``."""

    gas: Gas
    nodes: list[Node]
    links: list[Link] = field(default_factory=list)
    rel_moles: float = 0.02  # largest relative change of moles in a node per step
    coupling: float = 0.1  # step limit, in thermal time constants, for a node both flowing and relaxing
    thermal_tol: float = 1e-4  # K: below this deviation from the wall the coupling limit is lifted
    relief_step: float = 2e-3  # s, longest step while a relief valve is near or in its lift range

    def __post_init__(self) -> None:
        g = self.gas
        self.gamma = g.gamma
        self.cv = R / (g.gamma - 1.0)
        self.cp = g.gamma * self.cv
        self.r_specific = R / g.molar_mass
        nozzle = Nozzle(g.gamma, self.r_specific)
        self._nozzle, self._nozzle_g = nozzle.mass_flow, nozzle.conductance
        self.index = {nd.name: i for i, nd in enumerate(self.nodes)}
        self._virial = virial_function(g)
        k = len(self.nodes)
        self.n = [0.0] * k
        self.U = [0.0] * k
        self.P = [0.0] * k
        self.T = [0.0] * k
        self.Z = [1.0] * k
        self.wall = [293.15] * k
        self.steps = 0
        self.flowed = False  # whether the last step moved gas over any link
        self._fixed = [nd.fixed for nd in self.nodes]
        self._volume = [nd.volume for nd in self.nodes]
        self._var = [i for i, nd in enumerate(self.nodes) if not nd.fixed]
        self._refresh_active()

    # ----------------------------------------------------------------- state
    def _refresh_active(self) -> None:
        self._active = [lk for lk in self.links if lk.active]
        self._relief = [lk for lk in self.links if lk.relief_set is not None]

    def eos_pressure(self, n: float, temp: float, volume: float) -> tuple[float, float]:
        """(P, Z) of n mol at temp in volume, inverting n = P V/(Z(P,T) R T) exactly."""
        rho = n / volume
        if self._virial is None or rho == 0.0:
            return rho * R * temp, 1.0
        b, c = self._virial(temp)
        a = (c - b * b) * rho * rho
        q = 1.0 - b * rho
        z = 2.0 / (q + math.sqrt(q * q - 4.0 * a))
        return z * rho * R * temp, z

    def init_node(self, i: int, pressure: float, temp: float) -> None:
        """Fill variable node i with gas at (pressure, temp)."""
        nd = self.nodes[i]
        if nd.fixed:
            self.set_fixed(i, pressure, temp)
            return
        n = self.gas.moles(pressure, nd.volume, temp)
        self.n[i] = n
        self.U[i] = n * self.cv * temp
        self._update_all()

    def set_fixed(self, i: int, pressure: float, temp: float) -> None:
        self.P[i] = pressure
        self.T[i] = temp
        self.Z[i] = 1.0

    def set_walls(self, temp: float) -> None:
        for i in self._var:
            self.wall[i] = temp

    def _update_all(self) -> None:
        """Temperature, pressure and Z of every variable node from its moles and energy."""
        n_, U, P, T, Z, wall, vol = self.n, self.U, self.P, self.T, self.Z, self.wall, self._volume
        cv = self.cv
        eos = self.eos_pressure
        for i in self._var:
            n = n_[i]
            if n <= 0.0:
                P[i], T[i], Z[i] = 0.0, wall[i], 1.0
                continue
            t = U[i] / (n * cv)
            T[i] = t
            P[i], Z[i] = eos(n, t, vol[i])

    def snapshot(self) -> NetworkState:
        return NetworkState(self.n[:], self.U[:], [lk.open for lk in self._relief])

    def restore(self, s: NetworkState) -> None:
        self.n[:] = s.n
        self.U[:] = s.U
        for lk, was_open in zip(self._relief, s.relief_open, strict=True):
            lk.open = was_open
        self._update_all()

    def total_moles(self) -> float:
        return math.fsum(self.n[i] for i in self._var)

    def total_energy(self) -> float:
        return math.fsum(self.U[i] for i in self._var)

    # ----------------------------------------------------------------- flow
    def link_flow(self, lk: Link) -> tuple[int, int, float]:
        """(upstream, downstream, molar flow mol/s >= 0) of a link at the present state."""
        P = self.P
        up, dn = (lk.a, lk.b) if P[lk.a] >= P[lk.b] else (lk.b, lk.a)
        p_up, p_dn = P[up], P[dn]
        if p_up <= p_dn:
            return up, dn, 0.0
        return up, dn, self._link_flow_at(lk, p_up, self.T[up], p_dn)

    def _equilibrium_transfer(self, up: int, dn: int) -> float:
        """Moles that would equalise the two pressures, moving gas at the upstream temperature.

        For an ideal gas P = (gamma-1) U / V, so moving dn mol at T_up changes each pressure by
        gamma Z R T_up dn / V: the pair equilibrium is then exact (linear in dn).
        """
        t_up = self.T[up]
        k = 0.0
        if not self._fixed[up]:
            k += self.gamma * self.Z[up] * R * t_up / self.nodes[up].volume
        if not self._fixed[dn]:
            k += self.gamma * self.Z[dn] * R * t_up / self.nodes[dn].volume
        if k == 0.0:
            return math.inf
        return (self.P[up] - self.P[dn]) / k

    def _update_relief(self) -> None:
        """Proportional relief: closed below the reseat pressure, lifting linearly to full bore at
        the set pressure (a smooth law, so the implicit flow step cannot make it chatter)."""
        for lk in self._active:
            if lk.relief_set is None:
                continue
            dp = self.P[lk.a] - self.P[lk.b]
            span = max(lk.relief_set - lk.relief_reseat, 1.0)
            lift = min(max((dp - lk.relief_reseat) / span, 0.0), 1.0)
            lk.open = lift > 0.0
            lk.cda = lk.relief_cda * lift

    def _flow_step(self, h: float) -> bool:
        """Move gas over all active links for h seconds by a linearly implicit (backward Euler) step.

        Each link is linearised by its secant conductance g; moving dm mol of gas at temperature t
        changes a node's pressure by gamma Z R t dm / V (exact for an ideal gas), which gives a small
        diagonally dominant linear system for the end-of-step pressures.  It is solved twice:

        1. with each link pointing down the start pressure difference and carrying its donor's
           start temperature, which predicts the transfers and each node's end temperature;
        2. with each link pointing the way the prediction flows, linearised by its secant at the
           predicted end state, and carrying the mean of its donor's start and predicted end
           temperatures (a donor cools as it empties, a node fed by colder gas cools by mixing:
           second order in the transfer).

        The second solve is what the transfers apply, so the pressures it predicts are the ones the
        moved energy makes.  Had the carried temperature been corrected after the solve, or a link
        that reverses kept its start direction, the end state would sit off the implicit solution
        by an amount that depends on h; with stiff links that offset shows up as jumps in the
        pressure from step to step.  Transfers are applied pairwise, so moles and energy are
        conserved to round-off whatever the step.
        """
        P, T, n, U = self.P, self.T, self.n, self.U
        fixed = self._fixed
        links = []
        pos: dict[int, int] = {}
        for lk in self._active:
            if lk.relief_set is not None and not lk.open:
                continue
            up, dn = (lk.a, lk.b) if P[lk.a] >= P[lk.b] else (lk.b, lk.a)
            if P[up] == P[dn]:
                continue
            c = self._link_conductance(lk, up, dn)
            if c <= 0.0:
                continue
            links.append([up, dn, h * c, T[up], lk, False])
            for i in (up, dn):
                if not fixed[i] and i not in pos:
                    pos[i] = len(pos)
        if not links:
            return False
        self.flowed = True
        cp, cv = self.cp, self.cv
        # predictor: transfers at the start temperatures, and the end temperature they give
        pnew = self._solve_pressures(links, pos)
        dn_ = dict.fromkeys(pos, 0.0)
        du_ = dict.fromkeys(pos, 0.0)
        for link in links:
            up, dn, c, t_up, lk, _turned = link
            dm = c * (pnew[up] - pnew[dn])
            if dm < 0.0:  # the flow turns round within the step: point the link the way it goes
                up, dn, dm = dn, up, -dm
                t_up = T[up]
                link[:] = up, dn, h * self._link_conductance(lk, up, dn), t_up, lk, True
            if not fixed[up]:
                dm = min(dm, 0.5 * n[up])
                dn_[up] -= dm
                du_[up] -= cp * t_up * dm
            if not fixed[dn]:
                dn_[dn] += dm
                du_[dn] += cp * t_up * dm
        # corrector conductance: the secant at the predicted end state, one step of the iteration
        # towards the fully implicit flow.  A choked inflow from a fixed node then moves K h to
        # second order (the start secant falls short by the rise over the step), and a linear
        # link keeps its conductance, so a quasi-steady balance (heat driving gas out through a
        # stiff vent) does not depend on the step.
        t_end = {i: (U[i] + du_[i]) / ((n[i] + dn_[i]) * cv) for i in pos}
        for link in links:
            up, dn, _c, _t, lk, turned = link
            if not fixed[up]:
                link[3] = 0.5 * (T[up] + t_end[up])
            if turned or lk.relief_set is not None:
                # the start secant of a link that turned round stands; so does a relief valve's,
                # whose lift is held at its start value over the step: its flow at the end state
                # with that lift would overstate the venting and make the lift chatter
                continue
            pu, pd = pnew[up], pnew[dn]
            if pu <= pd:
                continue
            f_end = self._link_flow_at(lk, pu, T[up] if fixed[up] else t_end[up], pd)
            if f_end > 0.0:
                link[2] = h * f_end / (pu - pd)
        # corrector: the transfers that are applied
        pnew = self._solve_pressures(links, pos)
        for up, dn, c, t_carry, _lk, _turned in links:
            dm = c * (pnew[up] - pnew[dn])
            if dm < 0.0:  # turned round again: a flow too small to matter; move it the other way
                up, dn, dm, t_carry = dn, up, -dm, T[dn]
            if not fixed[up]:
                dm = min(dm, 0.5 * n[up])
            de = cp * t_carry * dm
            if not fixed[up]:
                n[up] -= dm
                U[up] -= de
            if not fixed[dn]:
                n[dn] += dm
                U[dn] += de
        for i in pos:
            T[i] = U[i] / (n[i] * cv)
        return True

    def _link_conductance(self, lk: Link, up: int, dn: int) -> float:
        """Secant conductance (mol/(s Pa)) of a link for flow from up to dn at the present state."""
        t_up = self.T[up]
        p_up = self.P[up]
        g = self._nozzle_g(lk.cda, p_up, t_up, self.P[dn]) / self.gas.molar_mass \
            if lk.open and lk.cda > 0.0 and p_up > 0.0 else 0.0
        if lk.conductance > 0.0:
            g += lk.conductance / (R * t_up)
        return g

    def _link_flow_at(self, lk: Link, p_up: float, t_up: float, p_dn: float) -> float:
        """Molar flow (mol/s) of a link from p_up at t_up to p_dn."""
        f = self._nozzle(lk.cda, p_up, t_up, p_dn) / self.gas.molar_mass if lk.open and lk.cda > 0.0 else 0.0
        if lk.conductance > 0.0:
            f += lk.conductance * (p_up - p_dn) / (R * t_up)
        return f

    def _solve_pressures(self, links: list[list], pos: dict[int, int]) -> list[float]:
        """End-of-step pressures for transfers dm = c (P'_up - P'_dn): every node's, the fixed ones
        and those no link touches at their present value."""
        P, Z, fixed, vol = self.P, self.Z, self._fixed, self._volume
        k_gas = self.gamma * R
        m = len(pos)
        A = [[0.0] * m for _ in range(m)]
        rhs = [0.0] * m
        for i, k in pos.items():
            A[k][k] = 1.0
            rhs[k] = P[i]
        for up, dn, c, t_up, _lk, _turned in links:
            # P'_up = P_up - al_up dm;  P'_dn = P_dn + al_dn dm
            if not fixed[up]:
                ku = pos[up]
                al = k_gas * Z[up] * t_up / vol[up] * c
                A[ku][ku] += al
                if fixed[dn]:
                    rhs[ku] += al * P[dn]
                else:
                    A[ku][pos[dn]] -= al
            if not fixed[dn]:
                kd = pos[dn]
                al = k_gas * Z[dn] * t_up / vol[dn] * c
                A[kd][kd] += al
                if fixed[up]:
                    rhs[kd] += al * P[up]
                else:
                    A[kd][pos[up]] -= al
        x = _solve_dominant(A, rhs)
        p_end = P[:]
        for i, k in pos.items():
            p_end[i] = x[k]
        return p_end

    def max_step(self, h: float) -> float:
        """Shorten h so that no node's moles change by more than rel_moles in one step, and so that
        a node exchanging heat while joined through an open orifice takes steps of at most
        ``coupling`` times its thermal time constant (the heat/flow splitting is only first-order
        accurate in h/tau; a closed node's heat exchange is exact at any step)."""
        eps = self.rel_moles
        n = self.n
        fixed = self._fixed
        nodes = self.nodes
        for lk in self._active:
            if lk.relief_set is not None:
                # the lift follows the pressure explicitly: resolve that feedback loop finely
                dp = self.P[lk.a] - self.P[lk.b]
                if dp > lk.relief_reseat - 0.02 * (lk.relief_set - lk.relief_reseat):
                    h = min(h, self.relief_step)
                if not lk.open:
                    continue
            if lk.open and lk.cda > 0.0:
                for i in (lk.a, lk.b):
                    tau = nodes[i].tau
                    if tau is not None and not fixed[i] and abs(self.T[i] - self.wall[i]) > self.thermal_tol:
                        h = min(h, self.coupling * tau)
            up, dn, f = self.link_flow(lk)
            if f <= 0.0:
                continue
            dneq = self._equilibrium_transfer(up, dn)
            if fixed[up]:
                nmin = n[dn]
            elif fixed[dn]:
                nmin = n[up]
            else:
                nmin = min(n[up], n[dn])
            allowed = eps * nmin
            if dneq <= allowed:
                continue
            if math.isinf(dneq):
                continue
            # dneq (1 - exp(-h f/dneq)) <= allowed
            h = min(h, -(dneq / f) * math.log1p(-allowed / dneq))
        return h

    def step(self, h: float, wall_rate: float = 0.0) -> bool:
        """Advance the state by h seconds (heat exchange, then the flows in sequence, then the EOS).

        ``wall_rate`` (K/s) is how fast the walls move over the step (a drifting lab); ``wall`` then
        holds their temperature at the step's middle, and the heat exchange stays exact for a
        linear drift.  Returns False when nothing changed (no flow, every node at its wall
        temperature).
        """
        self.steps += 1
        self.flowed = False
        P, T, n, U = self.P, self.T, self.n, self.U
        nodes = self.nodes
        cv = self.cv
        self._update_relief()
        touched = False
        # heat exchange first, so that the flows below also settle the pressure differences it makes
        wall, rate = self.wall, wall_rate
        for i in self._var:
            tau = nodes[i].tau
            ni = n[i]
            if tau is None or ni <= 0.0:
                continue
            t_old = U[i] / (ni * cv)
            if rate == 0.0:
                dev = t_old - wall[i]
                if dev == 0.0:
                    continue
                dev *= math.exp(-h / tau)
                if abs(dev) < SNAP_K:
                    dev = 0.0
                t_new = wall[i] + dev
            else:
                # Newton cooling towards a wall moving at `rate`: the gas trails it by rate * tau,
                # and its deviation from that trailing line decays with tau (exact for a ramp)
                lag = rate * tau
                half = 0.5 * rate * h
                t_new = wall[i] + half - lag + (t_old - wall[i] + half + lag) * math.exp(-h / tau)
            U[i] = ni * cv * t_new
            T[i] = t_new
            P[i] *= t_new / t_old  # linearised (exact if ideal); the EOS below makes it exact
            touched = True
        if self._flow_step(h):
            touched = True
        if touched:
            self._update_all()
        return touched


def _solve_dominant(A: list[list[float]], b: list[float]) -> list[float]:
    """Gaussian elimination without pivoting (A is diagonally dominant); A and b are overwritten."""
    m = len(b)
    for k in range(m):
        piv = A[k][k]
        rowk = A[k]
        for i in range(k + 1, m):
            f = A[i][k]
            if f != 0.0:
                f /= piv
                rowi = A[i]
                for j in range(k + 1, m):
                    rowi[j] -= f * rowk[j]
                b[i] -= f * b[k]
    x = [0.0] * m
    for k in range(m - 1, -1, -1):
        acc = b[k]
        rowk = A[k]
        for j in range(k + 1, m):
            acc -= rowk[j] * x[j]
        x[k] = acc / rowk[k]
    return x
