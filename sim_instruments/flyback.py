"""Physical model of the simulated DUT: a flyback power stage seen from the bench.

The instruments of the simulated bench share one :class:`FlybackModel`: the line source sets the
bus, the electronic load sets the load current, the power meter reads :meth:`line_reading` and
the oscilloscope samples :meth:`switch_node_v` (and, when the DUT declares its output rectifier,
:meth:`secondary_node_v`) at an :meth:`operating_point`.

Operating point (a textbook flyback power stage, e.g. Pressman, *Switching Power Supply Design*):
input power Pin = Pout + losses, with the losses (RC damper, RCD clamp, leakage-loop damping,
capacitive turn-on and the design's other losses) taken from the integrated turn-off transient of
:mod:`labseq_sim_instruments.flyback_transient`, so Pin and the transient are iterated together. DCM
when the energy ½·Lm·Ipk²·fsw that delivers Pin fits in the period (on-time plus demagnetisation
time Lm·Ipk/Vr), CCM otherwise with the ideal duty D = Vr/(Vin + Vr). The output rectifier's
ring (:mod:`labseq_sim_instruments.flyback_secondary`) follows from the primary's period; its
damper and
loop losses join the input power, and the two are iterated until they agree.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from labseq_sim_instruments.flyback_design import (
    DEMO_DUTS,
    DutFileError,
    FlybackDesign,
    load_dut,
    resolve_dut,
)
from labseq_sim_instruments.flyback_secondary import SecondaryNetwork, SecondaryPeriod
from labseq_sim_instruments.flyback_transient import NodeNetwork, PeriodResult

__all__ = [
    "DEMO_DUTS",
    "DutFileError",
    "FlybackDesign",
    "FlybackModel",
    "LineReading",
    "OperatingPoint",
    "load_dut",
    "resolve_dut",
]

#: Forward drop of one bridge-rectifier diode (AC line), common practice, no published source.
BRIDGE_DIODE_DROP_V = 0.9
#: Steady state: input-power residual (relative) and clamp-voltage correction (V) accepted.
POWER_RTOL = 3e-4
CLAMP_VTOL = 0.1
MAX_ITERATIONS = 30
#: Operating points (with their recorded waveforms) kept per model.
CACHE_SIZE = 256


@dataclass(frozen=True)
class OperatingPoint:
    """The converter's steady state at one bus voltage and load."""

    bulk_voltage_v: float
    load_a: float
    output_voltage_v: float
    mode: str  # "DCM" or "CCM"
    duty: float
    peak_current_a: float
    reflected_voltage_v: float
    output_power_w: float
    snubber_loss_w: float
    clamp_loss_w: float
    input_power_w: float
    efficiency: float
    # settled clamp capacitor voltage (absolute) if fitted: the steady voltage that dissipates the
    # clamp loss in the clamp resistor, i.e. the capacitor's level averaged over its small ripple
    clamp_voltage_v: float | None
    damping_loss_w: float = 0.0  # leakage-loop series resistance
    switching_loss_w: float = 0.0  # node capacitance discharged by the switch at turn-on
    other_loss_w: float = 0.0  # conduction, core and rectifier losses (design fraction of Pout)
    demag_time_s: float | None = None  # end of secondary conduction in DCM
    # output rectifier (None/0 when the DUT declares no [secondary] or the converter idles)
    secondary_plateau_v: float | None = None  # reverse voltage Vin·Lm/(n·(Lm + Llk)) + Vout
    secondary_peak_reverse_v: float | None = None  # highest reverse voltage of the diode's ring
    secondary_forward_current_a: float = 0.0  # diode current when the primary turns on (CCM)
    secondary_recovery_current_a: float = 0.0  # reverse-recovery current Irr (pn diode)
    secondary_recovery_charge_c: float = 0.0  # charge drawn back after the zero crossing
    secondary_snubber_loss_w: float = 0.0  # in the diode's RC damper
    secondary_damping_loss_w: float = 0.0  # in the rectifier ring's loop resistance


@dataclass(frozen=True)
class LineReading:
    """What a power meter on the line input reads (AC: rms values over the line cycle)."""

    voltage_v: float
    current_a: float
    power_w: float
    power_factor: float


@dataclass(frozen=True)
class _Solution:
    """An operating point with its node voltages over one period, each on its own time grid."""

    op: OperatingPoint
    grid_s: np.ndarray
    node_v: np.ndarray
    secondary_grid_s: np.ndarray | None  # None: the DUT declares no [secondary]
    secondary_v: np.ndarray | None


@dataclass(frozen=True)
class _Primary:
    """Primary-side switching quantities for one input power."""

    mode: str
    peak_current_a: float
    duty: float
    off_time_s: float


class FlybackModel:
    """The flyback power stage of one :class:`FlybackDesign`, with its results cached."""

    def __init__(self, design: FlybackDesign) -> None:
        self.design = design
        self.period_s = 1.0 / design.switching_frequency_hz
        self._points: OrderedDict[tuple[float, float], _Solution]
        self._points = OrderedDict()
        # rectifier solutions per (line V, line Hz, load A); small, one per grid point
        self._rectified: dict[tuple[float, float, float], tuple[float, float, float]] = {}
        # converged (x, Jacobian, rectifier losses W) per load and bus voltage: starting points
        # for nearby buses
        self._solved: dict[float, dict[float, tuple[np.ndarray, np.ndarray, float]]] = {}

    # --- line side ------------------------------------------------------------------------------

    def bulk_voltage_v(
        self,
        line_v: float,
        line_is_ac: bool,
        line_frequency_hz: float,
        load_a: float,
        line_phase_rad: float,
    ) -> float:
        """Bus voltage at a point of the line cycle (phase 0 = line zero crossing).

        DC: the line voltage. AC: the capacitor-input rectifier's bus, which follows the
        rectified line (peak √2·Vrms less two bridge drops) while the bridge conducts and
        otherwise discharges at the converter's input power: C·v·dv/dt = -Pin.
        """
        if not line_is_ac:
            return max(float(line_v), 0.0)
        peak_v, start_rad, power_w = self._rectifier(line_v, line_frequency_hz, load_a)
        if power_w == 0.0 or peak_v == 0.0:
            return peak_v
        omega = 2.0 * math.pi * line_frequency_hz
        psi = math.fmod(line_phase_rad, math.pi)
        psi = psi + math.pi if psi < 0.0 else psi
        if start_rad <= psi <= math.pi / 2.0:
            return peak_v * math.sin(psi)
        since_peak_s = math.fmod(psi - math.pi / 2.0 + math.pi, math.pi) / omega
        return self._discharged_v(peak_v, power_w, since_peak_s)

    def _discharged_v(self, peak_v: float, power_w: float, since_peak_s: float) -> float:
        """Bulk capacitor voltage a time after the peak, discharging at constant power."""
        return math.sqrt(
            max(peak_v**2 - 2.0 * power_w * since_peak_s / self.design.bulk_capacitance_f, 0.0)
        )

    def _rectifier(
        self, line_v: float, line_frequency_hz: float, load_a: float
    ) -> tuple[float, float, float]:
        """(peak bus V, phase where the bridge starts conducting, converter input power)."""
        key = (float(line_v), float(line_frequency_hz), float(load_a))
        if key not in self._rectified:
            self._rectified[key] = self._solve_rectifier(*key)
        return self._rectified[key]

    def _solve_rectifier(
        self, line_v: float, line_frequency_hz: float, load_a: float
    ) -> tuple[float, float, float]:
        peak_v = max(math.sqrt(2.0) * line_v - 2.0 * BRIDGE_DIODE_DROP_V, 0.0)
        if peak_v == 0.0 or load_a <= 0.0:
            return peak_v, math.pi / 2.0, 0.0
        power_w = self.operating_point(peak_v, load_a).input_power_w
        omega = 2.0 * math.pi * line_frequency_hz

        def gap(psi: float) -> float:
            since_peak_s = (psi + math.pi / 2.0) / omega
            return peak_v * math.sin(psi) - self._discharged_v(peak_v, power_w, since_peak_s)

        start_rad = brentq(gap, 0.0, math.pi / 2.0) if gap(0.0) < 0.0 else 0.0
        return peak_v, start_rad, power_w

    def line_reading(
        self, line_v: float, line_is_ac: bool, line_frequency_hz: float, load_a: float
    ) -> LineReading:
        """Power-meter reading on the line input, averaged over the line cycle.

        AC: the bridge conducts from its start phase to the peak; the line current there is
        C·dv/dt plus the converter's draw Pin/v, zero elsewhere, which gives the capacitor-input
        rectifier's poor power factor. This ideal pulse (no line impedance) is a common-practice
        estimate, no published source; a real line's impedance widens the pulses and raises the
        power factor somewhat.
        """
        if load_a <= 0.0 or line_v <= 0.0:
            return LineReading(float(max(line_v, 0.0)), 0.0, 0.0, 1.0 if not line_is_ac else 0.0)
        if not line_is_ac:
            power_w = self.operating_point(line_v, load_a).input_power_w
            return LineReading(float(line_v), power_w / line_v, power_w, 1.0)
        peak_v, start_rad, converter_w = self._rectifier(line_v, line_frequency_hz, load_a)
        omega = 2.0 * math.pi * line_frequency_hz
        psi = np.linspace(start_rad, math.pi / 2.0, 2001)
        bus_v = peak_v * np.sin(psi)
        bulk_a = self.design.bulk_capacitance_f * peak_v * omega * np.cos(psi)
        line_a = bulk_a + converter_w / np.maximum(bus_v, 1e-9)
        # rms over a half cycle: the current flows only in [start, π/2] of each half period
        mean_square = np.trapezoid(line_a**2, psi) / math.pi
        mean_current = np.trapezoid(line_a, psi) / math.pi
        current_a = math.sqrt(float(mean_square))
        power_w = converter_w + 2.0 * BRIDGE_DIODE_DROP_V * float(mean_current)
        apparent = line_v * current_a
        return LineReading(float(line_v), current_a, power_w, min(power_w / apparent, 1.0))

    # --- power stage ----------------------------------------------------------------------------

    def _primary(self, bulk_v: float, input_power_w: float) -> _Primary:
        """DCM or CCM, peak current, duty and off-time delivering ``input_power_w``."""
        d = self.design
        lm, vr, period = d.magnetizing_inductance_h, d.reflected_voltage_v, self.period_s
        lp = lm + d.leakage_inductance_h
        peak_a = math.sqrt(2.0 * input_power_w * period / lm)
        on_s = lp * peak_a / bulk_v
        if on_s + lm * peak_a / vr <= period:
            return _Primary("DCM", peak_a, on_s / period, period - on_s)
        duty = vr / (bulk_v + vr)
        mean_on_a = input_power_w / (bulk_v * duty)
        ripple_a = bulk_v * duty * period / lm
        return _Primary("CCM", mean_on_a + ripple_a / 2.0, duty, period * (1.0 - duty))

    def operating_point(self, bulk_voltage_v: float, load_a: float) -> OperatingPoint:
        """Steady state at ``bulk_voltage_v`` and ``load_a`` (cached with its waveform)."""
        return self._solve(float(bulk_voltage_v), float(load_a)).op

    def switch_node_v(self, op: OperatingPoint, t_s: np.ndarray) -> np.ndarray:
        """Drain-source voltage at times ``t_s`` (periodic in 1/fsw, t = 0 at turn-off)."""
        solution = self._solve(op.bulk_voltage_v, op.load_a)
        return self._sample(solution.grid_s, solution.node_v, t_s)

    @property
    def has_secondary(self) -> bool:
        """True when the DUT declares its output rectifier, so :meth:`secondary_node_v` works."""
        return self.design.secondary is not None

    def secondary_node_v(self, op: OperatingPoint, t_s: np.ndarray) -> np.ndarray:
        """Rectifier anode–cathode voltage at ``t_s``, on :meth:`switch_node_v`'s time base.

        Negative while the diode blocks: it steps to about −(Vin/n + Vout) when the primary turns
        on, at t = −D/fsw modulo the period.
        """
        solution = self._solve(op.bulk_voltage_v, op.load_a)
        if solution.secondary_v is None:
            raise ValueError(f"DUT {self.design.label!r} declares no [secondary] rectifier")
        return self._sample(solution.secondary_grid_s, solution.secondary_v, t_s)

    def _sample(self, grid_s: np.ndarray, node_v: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        """A periodic waveform recorded over one period, at arbitrary times."""
        return np.interp(np.mod(np.asarray(t_s, dtype=float), self.period_s), grid_s, node_v)

    def _solve(self, bulk_v: float, load_a: float) -> _Solution:
        key = (bulk_v, load_a)
        if key in self._points:
            self._points.move_to_end(key)
            return self._points[key]
        if not (math.isfinite(bulk_v) and bulk_v >= 0.0):
            raise ValueError(f"bus voltage must be ≥ 0 V, got {bulk_v!r}")
        if not (math.isfinite(load_a) and load_a >= 0.0):
            raise ValueError(f"load current must be ≥ 0 A, got {load_a!r}")
        result = (
            self._idle(bulk_v, load_a)
            if load_a == 0.0 or bulk_v == 0.0
            else self._run(bulk_v, load_a)
        )
        self._points[key] = result
        if len(self._points) > CACHE_SIZE:
            self._points.popitem(last=False)
        return result

    def _idle(self, bulk_v: float, load_a: float) -> _Solution:
        """No switching (no load or no bus): the node sits at the bus voltage."""
        d = self.design
        op = OperatingPoint(
            bulk_voltage_v=bulk_v,
            load_a=load_a,
            output_voltage_v=0.0 if bulk_v == 0.0 else d.output_voltage_v,
            mode="DCM",
            duty=0.0,
            peak_current_a=0.0,
            reflected_voltage_v=d.reflected_voltage_v,
            output_power_w=0.0,
            snubber_loss_w=0.0,
            clamp_loss_w=0.0,
            input_power_w=0.0,
            efficiency=0.0,
            clamp_voltage_v=bulk_v if d.has_clamp else None,
        )
        grid_s = np.array([0.0, self.period_s])
        # no switching: the diode blocks what the output holds
        secondary_v = np.full(2, -op.output_voltage_v) if self.has_secondary else None
        return _Solution(op, grid_s, np.full(2, bulk_v), grid_s, secondary_v)

    def _run(self, bulk_v: float, load_a: float) -> _Solution:
        """Solve the primary's steady state, then the rectifier's, until their losses agree.

        The rectifier's losses (:mod:`labseq_sim_instruments.flyback_secondary`) depend on the
        primary's
        period only weakly, through its currents, so they enter the primary's solve as a fixed
        input power and the two are solved in turn until that power stops moving.
        """
        d = self.design
        network = NodeNetwork(d, bulk_v)
        secondary = SecondaryNetwork(d, bulk_v) if d.secondary is not None else None
        output_w = d.output_voltage_v * load_a
        fixed_w = output_w * (1.0 + d.other_loss_fraction)
        x, jacobian, secondary_w = self._initial_guess(bulk_v, load_a, fixed_w)
        for iteration in range(MAX_ITERATIONS):
            x, jacobian, primary, period = self._converge(
                network, x, jacobian, fixed_w + secondary_w
            )
            if secondary is None:
                rectifier = None
                break
            grid_s = np.arange(period.node_v.size) * period.grid_dt_s
            rectifier = secondary.simulate(
                grid_s,
                period.node_v,
                primary.peak_current_a,
                primary.off_time_s,
                self.period_s,
                period.demag_time_s,
                period.grid_dt_s,
            )
            new_w = d.switching_frequency_hz * (
                rectifier.snubber_energy_j + rectifier.damping_energy_j
            )
            settled = abs(new_w - secondary_w) <= POWER_RTOL * x[0]
            # Relaxed after the first steps: at light load the rectifier's loss can jump between
            # two values from one solve to the next (the turn-on moving across a valley of the
            # DCM ring), and the plain iteration then cycles; halving the step closes in.
            secondary_w = new_w if iteration < 2 else 0.5 * (secondary_w + new_w)
            if settled:
                break
        else:
            raise RuntimeError(f"rectifier losses did not settle at {bulk_v} V, {load_a} A")
        self._solved.setdefault(load_a, {})[bulk_v] = (x.copy(), jacobian, secondary_w)
        other_w = output_w * d.other_loss_fraction
        op = _operating_point(d, bulk_v, load_a, primary, period, other_w, rectifier)
        grid_s = np.arange(period.node_v.size) * period.grid_dt_s
        if rectifier is None:
            return _Solution(op, grid_s, period.node_v, None, None)
        secondary_grid_s = np.arange(rectifier.node_v.size) * rectifier.grid_dt_s
        return _Solution(op, grid_s, period.node_v, secondary_grid_s, rectifier.node_v)

    def _converge(
        self, network: NodeNetwork, x: np.ndarray, jacobian: np.ndarray | None, fixed_w: float
    ) -> tuple[np.ndarray, np.ndarray, _Primary, PeriodResult]:
        """Newton–Broyden solve of the primary's periodic steady state from x = (Pin[, clamp V]).

        Residuals F(x) from one integrated period: the input power the losses imply minus Pin,
        and the clamp capacitor's drift over the period (zero when the energy its diode dumps
        per cycle equals what its resistor dissipates). Newton steps with a finite-difference
        Jacobian kept up to date by Broyden's update; a start from a neighbour's solution and
        Jacobian usually leaves one integrated period to confirm it.
        """
        bulk_v = network.bulk_v
        # the clamp capacitor never discharges below the bus its resistor returns to; at light
        # load it may sit under Vin + Vr, where its diode takes magnetising energy too
        floor_v = bulk_v + 1.0
        residual, primary, period = self._residual(network, x, fixed_w, record=True)
        if jacobian is None:
            jacobian = self._jacobian(network, x, residual, fixed_w)
        for _ in range(MAX_ITERATIONS):
            step = -np.linalg.solve(jacobian, residual)
            power_ok = abs(residual[0]) <= POWER_RTOL * x[0]
            if power_ok and (x.size == 1 or abs(step[1]) <= CLAMP_VTOL):
                return x, jacobian, primary, period
            new_x = x + step
            new_x[0] = max(new_x[0], fixed_w)
            if x.size == 2:
                new_x[1] = max(new_x[1], floor_v)
            new_residual, primary, period = self._residual(network, new_x, fixed_w, record=True)
            jacobian = _broyden(jacobian, new_x - x, new_residual - residual)
            x, residual = new_x, new_residual
        raise RuntimeError(f"flyback steady state did not converge at {bulk_v} V")

    def _residual(
        self, network: NodeNetwork, x: np.ndarray, fixed_w: float, *, record: bool
    ) -> tuple[np.ndarray, _Primary, PeriodResult]:
        """Steady-state residuals at x = (Pin[, clamp V]) from one integrated period."""
        d = self.design
        primary = self._primary(network.bulk_v, float(x[0]))
        clamp_v = float(x[1]) if x.size == 2 else network.bulk_v
        period = network.simulate(
            primary.peak_current_a, primary.off_time_s, self.period_s, clamp_v, record=record
        )
        losses_w = d.switching_frequency_hz * (
            period.snubber_energy_j
            + period.clamp_energy_j
            + period.damping_energy_j
            + period.switching_energy_j
        )
        residual = [fixed_w + losses_w - x[0]]
        if x.size == 2:
            residual.append(period.clamp_end_v - clamp_v)
        return np.array(residual), primary, period

    def _jacobian(
        self, network: NodeNetwork, x: np.ndarray, residual: np.ndarray, fixed_w: float
    ) -> np.ndarray:
        """Forward-difference Jacobian of the steady-state residuals."""
        steps = np.array([1e-3 * x[0], 0.5][: x.size])
        jacobian = np.empty((x.size, x.size))
        for k in range(x.size):
            shifted = x.copy()
            shifted[k] += steps[k]
            shifted_residual = self._residual(network, shifted, fixed_w, record=False)[0]
            jacobian[:, k] = (shifted_residual - residual) / steps[k]
        return jacobian

    def _initial_guess(
        self, bulk_v: float, load_a: float, fixed_w: float
    ) -> tuple[np.ndarray, np.ndarray | None, float]:
        """Start from solved points at the same load (interpolated in bus voltage), else afresh.

        The clamp voltage is interpolated as its excess over the bus, which varies slowly; the
        Jacobian and the rectifier's losses are the nearest point's.
        """
        d = self.design
        solved = self._solved.get(load_a, {})
        if not solved:
            x = [fixed_w * 1.05] + ([bulk_v + d.clamp_voltage_v] if d.has_clamp else [])
            return np.array(x), None, 0.0
        nearest = sorted(solved, key=lambda v: abs(v - bulk_v))[:2]
        as_excess = np.array([0.0, 1.0])[: len(solved[nearest[0]][0])]
        points = [(v, solved[v][0] - as_excess * v) for v in nearest]
        if len(points) == 1 or points[0][0] == points[1][0]:
            guess = points[0][1]
        else:
            (v0, x0), (v1, x1) = points
            guess = x0 + (x1 - x0) * (bulk_v - v0) / (v1 - v0)
        guess = guess + as_excess * bulk_v
        guess[0] = max(guess[0], fixed_w)
        _, jacobian, secondary_w = solved[nearest[0]]
        return guess, jacobian.copy(), secondary_w


def _broyden(jacobian: np.ndarray, dx: np.ndarray, dfx: np.ndarray) -> np.ndarray:
    """Broyden's ("good") rank-one update of a Jacobian after the step dx changed F by dfx."""
    norm = float(dx @ dx)
    if norm == 0.0:
        return jacobian
    return jacobian + np.outer(dfx - jacobian @ dx, dx) / norm


def _operating_point(
    design: FlybackDesign,
    bulk_v: float,
    load_a: float,
    primary: _Primary,
    period: PeriodResult,
    other_w: float,
    rectifier: SecondaryPeriod | None,
) -> OperatingPoint:
    fsw = design.switching_frequency_hz
    output_w = design.output_voltage_v * load_a
    snubber_w = fsw * period.snubber_energy_j
    clamp_w = fsw * period.clamp_energy_j
    damping_w = fsw * period.damping_energy_j
    switching_w = fsw * period.switching_energy_j
    secondary_snubber_w = fsw * rectifier.snubber_energy_j if rectifier else 0.0
    secondary_damping_w = fsw * rectifier.damping_energy_j if rectifier else 0.0
    input_w = (
        output_w
        + other_w
        + snubber_w
        + clamp_w
        + damping_w
        + switching_w
        + secondary_snubber_w
        + secondary_damping_w
    )
    return OperatingPoint(
        bulk_voltage_v=bulk_v,
        load_a=load_a,
        output_voltage_v=design.output_voltage_v,
        mode=primary.mode,
        duty=primary.duty,
        peak_current_a=primary.peak_current_a,
        reflected_voltage_v=design.reflected_voltage_v,
        output_power_w=output_w,
        snubber_loss_w=snubber_w,
        clamp_loss_w=clamp_w,
        input_power_w=input_w,
        efficiency=output_w / input_w,
        clamp_voltage_v=bulk_v + math.sqrt(clamp_w * design.clamp_resistance_ohm)
        if design.has_clamp
        else None,
        damping_loss_w=damping_w,
        switching_loss_w=switching_w,
        other_loss_w=other_w,
        demag_time_s=period.demag_time_s,
        secondary_plateau_v=rectifier.plateau_v if rectifier else None,
        secondary_peak_reverse_v=rectifier.peak_reverse_v if rectifier else None,
        secondary_forward_current_a=rectifier.recovery.forward_current_a if rectifier else 0.0,
        secondary_recovery_current_a=rectifier.recovery.recovery_current_a if rectifier else 0.0,
        secondary_recovery_charge_c=rectifier.recovery.recovery_charge_c if rectifier else 0.0,
        secondary_snubber_loss_w=secondary_snubber_w,
        secondary_damping_loss_w=secondary_damping_w,
    )
