"""One switching period of the flyback switch node, integrated as a piecewise-smooth network.

From the turn-off command (t = 0) to the next turn-on the primary current charges the switch node
(Coss(V) + stray, in parallel with the RC damper and, above the clamp capacitor's voltage, the RCD
clamp). The network changes shape when a diode changes state, so the off-time is integrated in
segments with :func:`scipy.integrate.solve_ivp`, each ending at the event where a diode turns on
or off:

* secondary rectifier: off while the magnetising inductance Lm carries the leakage current in
  series; on once the voltage across Lm reaches the reflected voltage Vr = n·(Vout + Vf), after
  which Lm demagnetises at -Vr/Lm and the leakage inductance rings with the node around Vin + Vr;
  off again when the secondary current n·(iLm - iLlk) falls to zero (DCM: the valley ring of
  Lm + Llk with the node around Vin follows);
* RCD clamp diode: on while the node sits at the clamp capacitor's voltage and feeds it;
* switch body diode: holds the node at 0 V when the valley ring would swing below ground.

At turn-on the node falls to about 0 V with a short switching time, the snubber capacitor dumps
its charge through Rs and the node capacitance's energy is lost in the switch.

State vector: node voltage, leakage current (bus to drain), magnetising current, snubber
capacitor voltage, clamp capacitor voltage, and the energies dissipated in Rs, in the damping
resistance and in the clamp resistor (integrated alongside so that losses come from the currents).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp

from labseq_sim_instruments.flyback_design import FlybackDesign

#: Time constant of the node's fall at turn-on (a switching time typical of the MOSFETs modelled).
TURN_ON_FALL_TIME_S = 5e-9
#: Grid points per period of the fastest leakage ring when a waveform is recorded.
POINTS_PER_RING_PERIOD = 50
#: Relative tolerance of the integrator.
RTOL = 1e-6
#: Bound on diode state changes in one period, against chattering at a diode threshold.
MAX_SEGMENTS = 400

_V, _I, _IM, _VCS, _VCL, _E_RS, _E_RD, _E_CL = range(8)


@dataclass(frozen=True)
class PeriodResult:
    """Energies per switching period and, when recorded, the node voltage on a uniform grid."""

    grid_dt_s: float
    node_v: np.ndarray | None  # node voltage at k·grid_dt_s for k = 0..N (last point = period)
    snubber_energy_j: float  # in Rs: during the off-time plus the turn-on discharge of Cs
    damping_energy_j: float  # in the leakage loop's series resistance
    clamp_energy_j: float  # in the clamp resistor over the whole period
    switching_energy_j: float  # node capacitance energy lost in the switch at turn-on
    clamp_end_v: float  # clamp capacitor voltage at the end of the period
    demag_time_s: float | None  # first end of secondary conduction (DCM), None if never


@dataclass(frozen=True)
class _Mode:
    secondary_on: bool
    clamp_on: bool
    body_on: bool


class NodeNetwork:
    """The switch-node network of one design at one bus voltage (fixed per call site)."""

    def __init__(self, design: FlybackDesign, bulk_voltage_v: float) -> None:
        self.design = design
        self.bulk_v = bulk_voltage_v
        self.vr = design.reflected_voltage_v
        self.lm = design.magnetizing_inductance_h
        self.llk = design.leakage_inductance_h
        self.lp = self.lm + self.llk
        self.rd = design.damping_resistance_ohm
        self.has_snubber = design.has_snubber
        self.rs = design.snubber_resistance_ohm if self.has_snubber else math.inf
        self.cs = design.snubber_capacitance_f
        self.has_clamp = design.has_clamp
        self.rcl = design.clamp_resistance_ohm or math.inf
        self.ccl = design.clamp_capacitance_f or 0.0
        self.c0 = design.coss_c0_f
        self.vj = design.coss_vj_v
        self.cstray = design.stray_capacitance_f
        self._rhs: dict[_Mode, Callable[[float, np.ndarray], list[float]]] = {}

    # --- network equations ----------------------------------------------------------------------

    def node_capacitance_f(self, v: float) -> float:
        """Coss(V) + stray at node voltage ``v``."""
        if self.c0 == 0.0:
            return self.cstray
        return self.c0 / math.sqrt(1.0 + max(v, 0.0) / self.vj) + self.cstray

    def node_energy_j(self, v: float) -> float:
        """Energy stored in Coss(V) + stray at voltage ``v``: the integral of C(u)·u du from 0."""
        v = max(v, 0.0)
        energy = 0.5 * self.cstray * v * v
        if self.c0 > 0.0:
            s = 1.0 + v / self.vj
            energy += self.c0 * self.vj**2 * ((2.0 / 3.0) * s**1.5 - 2.0 * math.sqrt(s) + 4.0 / 3.0)
        return energy

    def _turn_on_snubber_energy_j(self, node_v: float, snubber_v: float) -> float:
        """Energy Rs takes while the switch pulls the node from ``node_v`` to 0 V at turn-on.

        The node falls as V·exp(-a·t) (a = 1/:data:`TURN_ON_FALL_TIME_S`); the snubber capacitor
        follows with rate b = 1/(Rs·Cs), so the resistor voltage is P·exp(-a·t) + Q·exp(-b·t) and
        its energy is (P²/2a + 2PQ/(a+b) + Q²/2b)/Rs. An instant fall (a → ∞) gives ½·Cs·Vcs².
        """
        if not self.has_snubber:
            return 0.0
        a = 1.0 / TURN_ON_FALL_TIME_S
        b = 1.0 / (self.rs * self.cs)
        if abs(b - a) < 1e-6 * a:  # equal rates: nudge one, the result is continuous there
            b *= 1.0 + 1e-4
        forced = b * node_v / (b - a)  # capacitor response to the falling node
        p = node_v - forced
        q = -(snubber_v - forced)
        return (p * p / (2 * a) + 2 * p * q / (a + b) + q * q / (2 * b)) / self.rs

    def _make_rhs(self, mode: _Mode) -> Callable[[float, np.ndarray], list[float]]:
        vin, vr, lm, llk, lp, rd = self.bulk_v, self.vr, self.lm, self.llk, self.lp, self.rd
        rs, cs, rcl, ccl = self.rs, self.cs, self.rcl, self.ccl
        has_snubber, has_clamp = self.has_snubber, self.has_clamp
        cap = self.node_capacitance_f
        secondary_on, clamp_on, body_on = mode.secondary_on, mode.clamp_on, mode.body_on

        def rhs(_t: float, y: np.ndarray) -> list[float]:
            v, i, vcs, vcl = y[0], y[1], y[3], y[4]
            i_snub = (v - vcs) / rs if has_snubber else 0.0
            i_rcl = (vcl - vin) / rcl if has_clamp else 0.0
            if secondary_on:
                di = (vin + vr - v - rd * i) / llk
                dim = -vr / lm
            else:
                di = (vin - v - rd * i) / lp
                dim = di
            if body_on:
                dv = 0.0
                dvcl = -i_rcl / ccl if has_clamp else 0.0
            elif clamp_on:
                dv = (i - i_snub - i_rcl) / (cap(v) + ccl)
                dvcl = dv
            else:
                dv = (i - i_snub) / cap(v)
                dvcl = -i_rcl / ccl if has_clamp else 0.0
            return [
                dv,
                di,
                dim,
                i_snub / cs if has_snubber else 0.0,
                dvcl,
                i_snub * i_snub * rs if has_snubber else 0.0,
                rd * i * i,
                i_rcl * i_rcl * rcl if has_clamp else 0.0,
            ]

        return rhs

    def _rhs_for(self, mode: _Mode) -> Callable[[float, np.ndarray], list[float]]:
        if mode not in self._rhs:
            self._rhs[mode] = self._make_rhs(mode)
        return self._rhs[mode]

    def _snubber_current(self, y: np.ndarray) -> float:
        return (y[_V] - y[_VCS]) / self.rs if self.has_snubber else 0.0

    def _clamp_diode_current(self, _t: float, y: np.ndarray) -> float:
        """Clamp diode current while it conducts, scaled by (C(v) + Ccl) (only its sign is used).

        The diode feeds the clamp capacitor and its resistor: with the node tied to the capacitor,
        i_d·(C + Ccl) = (i - i_snub)·Ccl + C·i_R. It stops when this falls through zero, which
        leaves the node and the capacitor moving apart, so the diode does not chatter.
        """
        i_rcl = (y[_VCL] - self.bulk_v) / self.rcl
        node_c = self.node_capacitance_f(y[_V])
        return (y[_I] - self._snubber_current(y)) * self.ccl + node_c * i_rcl

    def _events(self, mode: _Mode) -> list[tuple[Callable[..., float], str]]:
        """Terminal events of ``mode``: (function, name of the diode change it signals)."""
        vin, vr, lm, lp, rd = self.bulk_v, self.vr, self.lm, self.lp, self.rd
        events: list[tuple[Callable[..., float], str]] = []

        def event(fn: Callable[..., float], direction: int, name: str) -> None:
            fn.terminal = True  # type: ignore[attr-defined]
            fn.direction = direction  # type: ignore[attr-defined]
            events.append((fn, name))

        if mode.secondary_on:
            event(lambda _t, y: y[_IM] - y[_I], -1, "secondary_off")
        else:
            event(lambda _t, y: lm * (y[_V] + rd * y[_I] - vin) / lp - vr, 1, "secondary_on")
        if mode.body_on:
            event(lambda _t, y: y[_I] - self._snubber_current(y), 1, "body_off")
        elif mode.clamp_on:
            event(lambda t, y: self._clamp_diode_current(t, y), -1, "clamp_off")
        else:
            event(lambda _t, y: y[_V], -1, "body_on")
            if self.has_clamp:
                event(lambda _t, y: y[_V] - y[_VCL], 1, "clamp_on")
        return events

    # --- one period ---------------------------------------------------------------------------

    def min_ring_period_s(self) -> float:
        """Period of the fastest leakage ring: Llk with the smallest node capacitance it can see."""
        v_high = self.bulk_v + self.vr + 2.0 * max(self.design.switch_rating_v, self.bulk_v)
        return 2.0 * math.pi * math.sqrt(self.llk * self.node_capacitance_f(v_high))

    def simulate(
        self,
        peak_current_a: float,
        off_time_s: float,
        period_s: float,
        clamp_start_v: float,
        *,
        record: bool,
    ) -> PeriodResult:
        """Integrate one period from the turn-off command with ``peak_current_a`` in Lm and Llk.

        ``off_time_s`` is when the switch turns on again; ``clamp_start_v`` is the clamp
        capacitor's voltage at t = 0. With ``record`` the node voltage is sampled on a uniform
        grid fine enough for the fastest ring (:data:`POINTS_PER_RING_PERIOD`).
        """
        ring_period_s = self.min_ring_period_s()
        dt = ring_period_s / POINTS_PER_RING_PERIOD
        n_steps = max(int(math.ceil(period_s / dt)), 1)
        dt = period_s / n_steps
        grid = np.arange(n_steps + 1) * dt if record else None
        n_off = int(np.searchsorted(grid, off_time_s, side="left")) if record else 0
        node_v = np.empty(n_steps + 1) if record else None

        y = np.array(
            [0.0, peak_current_a, peak_current_a, 0.0, clamp_start_v, 0.0, 0.0, 0.0], dtype=float
        )
        mode = _Mode(secondary_on=False, clamp_on=False, body_on=False)
        t = 0.0
        filled = 0
        demag_time_s: float | None = None
        # Absolute tolerances on the scale of each state, so that a ring decayed far below what
        # any scope resolves no longer holds the step size down.
        v_scale = self.bulk_v + self.vr
        e_scale = 0.5 * (
            self.llk * peak_current_a**2 + (self.node_capacitance_f(0.0) + self.cs) * v_scale**2
        )
        atol = RTOL * np.array(
            [v_scale, peak_current_a, peak_current_a, v_scale, v_scale, e_scale, e_scale, e_scale]
        )
        for _ in range(MAX_SEGMENTS):
            if t >= off_time_s:
                break
            events = self._events(mode)
            # The turn-on instant is always a requested point, so the last column is the state
            # there when no event stops the segment first.
            t_eval = np.append(grid[filled:n_off], off_time_s) if record else None
            sol = solve_ivp(
                self._rhs_for(mode),
                (t, off_time_s),
                y,
                method="DOP853",
                t_eval=t_eval,
                events=[fn for fn, _ in events],
                rtol=RTOL,
                atol=atol,
                max_step=period_s / 20.0,
                first_step=min(ring_period_s / 200.0, off_time_s - t),
            )
            if not sol.success:
                raise RuntimeError(f"switch-node integration failed: {sol.message}")
            reached_turn_on = sol.status != 1
            if record and len(sol.t):
                samples = sol.y[_V][:-1] if reached_turn_on else sol.y[_V]
                node_v[filled : filled + samples.size] = samples
                filled += samples.size
            if reached_turn_on:
                y = sol.y[:, -1]
                t = off_time_s
                break
            k, t = min(
                ((k, sol.t_events[k][0]) for k in range(len(events)) if sol.t_events[k].size),
                key=lambda item: item[1],
            )
            name = events[k][1]
            mode, y = _switch(mode, name, np.array(sol.y_events[k][0], dtype=float))
            if name == "secondary_off" and demag_time_s is None:
                demag_time_s = t
        else:
            raise RuntimeError("switch-node integration: diodes kept switching (chattering)")

        v_end, vcs_end, vcl_end = float(y[_V]), float(y[_VCS]), float(y[_VCL])
        on_time_s = period_s - off_time_s
        clamp_energy_j = float(y[_E_CL])
        if self.has_clamp:
            tau = self.rcl * self.ccl
            excess = vcl_end - self.bulk_v
            clamp_energy_j += (
                excess**2 * tau / (2.0 * self.rcl) * (1 - math.exp(-2 * on_time_s / tau))
            )
            vcl_end = self.bulk_v + excess * math.exp(-on_time_s / tau)
        if record:
            on_grid = grid[n_off:] - off_time_s
            node_v[n_off:] = v_end * np.exp(-on_grid / TURN_ON_FALL_TIME_S)
        return PeriodResult(
            grid_dt_s=dt,
            node_v=node_v,
            snubber_energy_j=float(y[_E_RS]) + self._turn_on_snubber_energy_j(v_end, vcs_end),
            damping_energy_j=float(y[_E_RD]),
            clamp_energy_j=clamp_energy_j,
            switching_energy_j=self.node_energy_j(v_end),
            clamp_end_v=vcl_end,
            demag_time_s=demag_time_s,
        )


def _switch(mode: _Mode, name: str, y: np.ndarray) -> tuple[_Mode, np.ndarray]:
    """New mode after a diode event, with the state made consistent with it."""
    y = y.copy()
    if name == "secondary_on":
        return _Mode(True, mode.clamp_on, mode.body_on), y
    if name == "secondary_off":
        y[_IM] = y[_I]  # Lm and Llk carry one current again
        return _Mode(False, mode.clamp_on, mode.body_on), y
    if name == "clamp_on":
        y[_V] = y[_VCL]
        return _Mode(mode.secondary_on, True, False), y
    if name == "clamp_off":
        return _Mode(mode.secondary_on, False, False), y
    if name == "body_on":
        y[_V] = 0.0
        return _Mode(mode.secondary_on, False, True), y
    if name == "body_off":
        return _Mode(mode.secondary_on, False, False), y
    raise ValueError(f"unknown diode event {name!r}")
