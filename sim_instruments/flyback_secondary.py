"""The flyback's secondary rectifier node: the diode's anode–cathode voltage over one period.

Same time base as the primary switch node (:mod:`labseq_sim_instruments.flyback_transient`): t = 0
at
the primary's turn-off command, the primary turns on again at ``off_time_s``.

Off-time (primary switch off), from the primary node v(t) through the ideal transformer: the
magnetising inductance carries the winding voltage Lm/(Lm + Llk)·(v − Vin), so the diode sees

    v_ak = Lm/(Lm + Llk)·(v − Vin)/n − Vout,

capped at the forward drop +Vf. While the secondary conducts (from the node's first arrival at
the plateau until demagnetisation in DCM, or until turn-on in CCM) the diode sits at +Vf. In DCM
the primary's valley ring after demagnetisation shows here scaled by 1/n.

On-time (primary switch on): a decoupled secondary network. The primary winding, now across the
bus, is a step source behind the primary leakage; seen from the secondary (Thevenin of Vin behind
Llk with Lm in shunt, referred by n²) it is

    V = Vin·Lm/(n·(Lm + Llk)) + Vout   behind   L = (Llk ∥ Lm)/n² + L2,   R = Rd/n² + R2,

with L2, R2 the secondary loop's own inductance and resistance, driving the junction capacitance
Cj in parallel with the optional Rs–Cs damper across the diode. V is the reverse-voltage plateau,
the flyback relation Vin/n + Vout with the leakage divider kept. The network is linear (Cj
constant), so it is solved exactly from its state matrix's eigenvalues and eigenvectors. The
junction capacitance does not load the primary node's own ring (decoupled networks), and the
ring's troughs are taken not to forward-bias the diode again.

Turn-off of the diode. DCM: its current is already zero; the ring starts at turn-on from the
diode's voltage at that instant with no current. CCM: the diode carries I_F; its current falls at
a = (V + Vf)/L, and the diode blocks once its stored charge is gone. A pn diode's stored charge
follows the lumped charge-control equation dq/dt = i − q/τ with q = I_F·τ in steady conduction
(the zero-transit-time limit of P. O. Lauritzen and C. L. Ma, "A simple diode model with reverse
recovery", IEEE Trans. Power Electronics 6(2), 1991), so the current overshoots to −Irr; the ring
starts when q reaches zero with the loop current Irr charging the junction (the stored energy
½·L·Irr² adds to the overshoot). A Schottky stores no charge: the ring starts at zero current.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, signal

from labseq_sim_instruments.flyback_design import FlybackDesign
from labseq_sim_instruments.flyback_transient import POINTS_PER_RING_PERIOD


@dataclass(frozen=True)
class Recovery:
    """How the rectifier's current leaves it after the primary turns on (CCM)."""

    forward_current_a: float  # I_F when the primary turns on
    current_slope_a_per_s: float  # a = (V + Vf)/L, the commutation rate
    block_time_s: float  # from turn-on until the diode blocks (I_F/a for a Schottky)
    recovery_current_a: float  # Irr: reverse current when it blocks (0 for a Schottky)

    @property
    def recovery_charge_c(self) -> float:
        """Charge drawn back after the current's zero crossing: Irr²/(2·a) (linear ramp)."""
        return self.recovery_current_a**2 / (2.0 * self.current_slope_a_per_s)


@dataclass(frozen=True)
class SecondaryPeriod:
    """The rectifier node over one period and what it costs, from :meth:`simulate`."""

    grid_dt_s: float
    node_v: np.ndarray  # anode–cathode volts at k·grid_dt_s for k = 0..N (last = period)
    plateau_v: float  # reverse voltage the ring settles to
    peak_reverse_v: float  # highest reverse voltage of the ring
    recovery: Recovery
    snubber_energy_j: float  # in the diode damper's resistor over the period
    damping_energy_j: float  # in the ring loop's series resistance


def recovery_current_a(forward_current_a: float, slope_a_per_s: float, lifetime_s: float) -> float:
    """Reverse-recovery current Irr of the lumped charge-control diode model.

    With i(t) = I_F − a·t and dq/dt = i − q/τ from q(0) = I_F·τ, the charge is
    q(t) = τ·(I_F − a·t) + a·τ²·(1 − exp(−t/τ)); it reaches zero at u = t/τ solving
    β + 1 − u − exp(−u) = 0 with β = I_F/(a·τ), and then Irr = a·τ·(1 − exp(−u)). Limits: for
    a·τ ≫ I_F, Irr → sqrt(2·I_F·τ·a) (the classic abrupt-recovery relation Irr = sqrt(2·Qrr·a)
    with Qrr = I_F·τ); for a·τ ≪ I_F, Irr → a·τ.
    """
    if forward_current_a <= 0.0 or lifetime_s <= 0.0:
        return 0.0
    beta = forward_current_a / (slope_a_per_s * lifetime_s)
    u = optimize.brentq(lambda x: beta + 1.0 - x - math.exp(-x), beta, beta + 1.0, xtol=1e-12)
    return slope_a_per_s * lifetime_s * -math.expm1(-u)


class SecondaryNetwork:
    """The rectifier's ring network of one design at one bus voltage (see the module text)."""

    def __init__(self, design: FlybackDesign, bulk_voltage_v: float) -> None:
        if design.secondary is None:
            raise ValueError(f"DUT {design.label!r} declares no [secondary] rectifier")
        rect = design.secondary
        n = design.turns_ratio
        lm, llk = design.magnetizing_inductance_h, design.leakage_inductance_h
        self.design = design
        self.bulk_v = bulk_voltage_v
        self.divider = lm / (lm + llk)
        self.forward_v = design.rectifier_drop_v
        self.plateau_v = bulk_voltage_v * self.divider / n + design.output_voltage_v
        self.inductance_h = llk * self.divider / n**2 + rect.loop_inductance_h
        self.resistance_ohm = design.damping_resistance_ohm / n**2 + rect.series_resistance_ohm
        self.junction_f = rect.junction_capacitance_f
        self.rect = rect

    def state_matrix(self) -> np.ndarray:
        """State matrix of (loop current, reverse voltage[, damper capacitor voltage]).

        L·di/dt = V − R·i − vr;  Cj·dvr/dt = i − (vr − vcs)/Rs;  Cs·dvcs/dt = (vr − vcs)/Rs.
        """
        ell, r, cj = self.inductance_h, self.resistance_ohm, self.junction_f
        if not self.rect.has_snubber:
            return np.array([[-r / ell, -1.0 / ell], [1.0 / cj, 0.0]])
        g, cs = 1.0 / self.rect.snubber_resistance_ohm, self.rect.snubber_capacitance_f
        return np.array(
            [
                [-r / ell, -1.0 / ell, 0.0],
                [1.0 / cj, -g / cj, g / cj],
                [0.0, g / cs, -g / cs],
            ]
        )

    def ring(self, t_s: np.ndarray, state0: np.ndarray) -> np.ndarray:
        """States at ``t_s`` (from the ring's start) from ``state0``: the exact linear solution.

        x(t) = x∞ + W·diag(exp(λ·t))·W⁻¹·(x0 − x∞), with λ, W the state matrix's eigenvalues and
        eigenvectors and x∞ = (0, V[, V]) the settled plateau. Returns shape (states, times).
        """
        a = self.state_matrix()
        settled = np.array([0.0] + [self.plateau_v] * (a.shape[0] - 1))
        eigenvalues, vectors = np.linalg.eig(a)
        weights = np.linalg.solve(vectors, np.asarray(state0, dtype=float) - settled)
        modes = weights[:, None] * np.exp(np.outer(eigenvalues, t_s))
        return settled[:, None] + (vectors @ modes).real

    def min_ring_period_s(self) -> float:
        """Period of the fastest ring: L with the junction capacitance alone."""
        return 2.0 * math.pi * math.sqrt(self.inductance_h * self.junction_f)

    def recovery(self, forward_current_a: float) -> Recovery:
        """Commutation of a forward current I_F at the primary's turn-on (see the module text)."""
        slope = (self.plateau_v + self.forward_v) / self.inductance_h
        irr_a = recovery_current_a(forward_current_a, slope, self.rect.carrier_lifetime_s)
        return Recovery(forward_current_a, slope, (forward_current_a + irr_a) / slope, irr_a)

    def simulate(
        self,
        primary_grid_s: np.ndarray,
        primary_node_v: np.ndarray,
        peak_current_a: float,
        off_time_s: float,
        period_s: float,
        demag_time_s: float | None,
        min_dt_s: float,
    ) -> SecondaryPeriod:
        """The rectifier node over the period of a recorded primary node waveform.

        ``peak_current_a`` is the primary current at turn-off; ``demag_time_s`` the end of the
        secondary's conduction (None in CCM); ``min_dt_s`` the finest step the grid needs besides
        the secondary ring's own (the primary's recording step).
        """
        d = self.design
        n, vf = d.turns_ratio, self.forward_v
        dt = min(min_dt_s, self.min_ring_period_s() / POINTS_PER_RING_PERIOD)
        n_steps = max(int(math.ceil(period_s / dt)), 1)
        dt = period_s / n_steps
        t = np.arange(n_steps + 1) * dt
        n_off = int(np.searchsorted(t, off_time_s, side="left"))

        # off-time: the primary node through the ideal transformer, capped at +Vf
        reflected = self._reflect(np.interp(t[:n_off], primary_grid_s, primary_node_v))
        node_v = np.empty(n_steps + 1)
        node_v[:n_off] = np.minimum(reflected, vf)
        reaches = np.flatnonzero(reflected >= vf)
        conduct_start_s = float(t[reaches[0]]) if reaches.size else off_time_s
        conduct_end_s = off_time_s if demag_time_s is None else demag_time_s
        node_v[:n_off][(t[:n_off] >= conduct_start_s) & (t[:n_off] < conduct_end_s)] = vf

        # CCM: Lm's current fell at Vr/Lm from the secondary's start of conduction
        forward_a = 0.0
        if demag_time_s is None:
            fall_a = d.reflected_voltage_v * (off_time_s - conduct_start_s)
            forward_a = n * max(peak_current_a - fall_a / d.magnetizing_inductance_h, 0.0)
        recovery = self.recovery(forward_a)
        # DCM: the diode's voltage just before turn-on (the primary's value there is the last
        # one of its off-time)
        start_v = vf
        if forward_a == 0.0:
            on_v = self._reflect(np.interp(off_time_s, primary_grid_s, primary_node_v))
            start_v = min(float(on_v), vf)

        # on-time: the diode holds +Vf until it blocks, then the network rings
        snubber = self.rect.has_snubber
        ring_start_s = off_time_s + recovery.block_time_s
        ringing = t >= ring_start_s
        node_v[n_off:] = vf
        state0 = [recovery.recovery_current_a, -start_v]
        if snubber:
            state0.append(-float(self._damper_v(node_v[:n_off], dt)[-1]))
        states = self.ring(t[ringing] - ring_start_s, np.array(state0))
        node_v[ringing] = -states[1]

        damping_energy_j = float(np.trapezoid(self.resistance_ohm * states[0] ** 2, t[ringing]))
        snubber_energy_j = 0.0
        if snubber:
            branch_v = self._damper_v(node_v, dt)
            current_a = (node_v - branch_v) / self.rect.snubber_resistance_ohm
            snubber_energy_j = float(
                np.trapezoid(self.rect.snubber_resistance_ohm * current_a**2, t)
            )
        return SecondaryPeriod(
            grid_dt_s=dt,
            node_v=node_v,
            plateau_v=self.plateau_v,
            peak_reverse_v=float(np.max(states[1])) if states.size else self.plateau_v,
            recovery=recovery,
            snubber_energy_j=snubber_energy_j,
            damping_energy_j=damping_energy_j,
        )

    def _reflect(self, primary_v: np.ndarray) -> np.ndarray:
        """The diode voltage the primary node implies while the diode blocks (off-time)."""
        d = self.design
        return self.divider * (primary_v - self.bulk_v) / d.turns_ratio - d.output_voltage_v

    def _damper_v(self, node_v: np.ndarray, dt_s: float) -> np.ndarray:
        """Damper capacitor voltage (anode–cathode sense) driven by ``node_v`` sampled at dt_s.

        The exact response of dx/dt = (u − x)/(Rs·Cs) to the node joined linearly between
        samples (first-order hold), run as a recursive filter (scipy.signal.lfilter). It starts
        settled on the first sample: the record starts on a plateau the ring has long left.
        """
        tau_s = self.rect.snubber_resistance_ohm * self.rect.snubber_capacitance_f
        alpha = math.exp(-dt_s / tau_s)
        b0 = 1.0 - tau_s * (1.0 - alpha) / dt_s
        b1 = (1.0 - alpha) - b0
        zi = [node_v[0] * (1.0 - b0)]
        return signal.lfilter([b0, b1], [1.0, -alpha], node_v, zi=zi)[0]
