"""Dissipation in an RC snubber's resistor, from a measured node voltage or from Cs·V²·fsw."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.signal import lfilter


@dataclass(frozen=True)
class SnubberBranch:
    """A series Rs–Cs branch from the measured node to the reference, and the switching rate."""

    rs_ohm: float
    cs_f: float
    fsw_hz: float

    def __post_init__(self) -> None:
        for name in ("rs_ohm", "cs_f", "fsw_hz"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"snubber {name} must be a positive number, got {value!r}")

    @property
    def time_constant_s(self) -> float:
        """τ = Rs·Cs."""
        return self.rs_ohm * self.cs_f

    @property
    def period_s(self) -> float:
        """Switching period 1/fsw."""
        return 1.0 / self.fsw_hz


def cv2f_loss_w(cs_f: float, volts: float, fsw_hz: float) -> float:
    """Resistor loss of an RC snubber that charges to ``volts`` and discharges once per cycle.

    P = Cs·V²·fsw: each cycle dissipates ½·Cs·V² in Rs while Cs charges and ½·Cs·V² while it
    discharges, whatever Rs is (Severns, "Design of Snubbers for Power Circuits", RC snubber loss).
    """
    return cs_f * volts**2 * fsw_hz


def branch_resistor_power_w(
    volts: np.ndarray, sample_interval_s: float, branch: SnubberBranch
) -> np.ndarray:
    """Instantaneous power in Rs when the measured ``volts`` drives the Rs–Cs branch.

    The capacitor voltage obeys Cs·dVc/dt = (v − Vc)/Rs. Taking v as piecewise linear between
    samples, the exact step over one interval h with a = exp(−h/τ) and β = τ(1 − a)/h is
    ``Vc[n+1] = a·Vc[n] + (1 − β)·v[n+1] + (β − a)·v[n]`` (first-order-hold discretisation),
    run as one IIR filter (``scipy.signal.lfilter``). The branch starts at Vc = v[0]; the caller
    skips the first few τ. Power is (v − Vc)²/Rs; it includes the record's noise power.
    """
    v = np.asarray(volts, dtype=float)
    tau = branch.time_constant_s
    a = math.exp(-sample_interval_s / tau)
    beta = tau * -math.expm1(-sample_interval_s / tau) / sample_interval_s
    vc, _ = lfilter([1.0 - beta, beta - a], [1.0, -a], v, zi=[beta * v[0]])
    power = np.subtract(v, vc, out=vc)  # in place: records run to millions of samples
    np.square(power, out=power)
    power *= 1.0 / branch.rs_ohm
    return power


def period_means_w(
    power_w: np.ndarray, sample_interval_s: float, t_starts_s: np.ndarray, period_s: float
) -> np.ndarray:
    """Mean of ``power_w`` over one period from each start time (times from the first sample).

    Each window is the whole number of samples nearest to the period, integrated by the
    trapezoidal rule; the rounding changes the window by at most half a sample.
    """
    p = np.asarray(power_w, dtype=float)
    samples = max(1, round(period_s / sample_interval_s))
    starts = np.clip(np.round(np.asarray(t_starts_s) / sample_interval_s).astype(int), 0, None)
    starts = np.minimum(starts, p.size - 1 - samples)
    return np.array(
        [np.trapezoid(p[a : a + samples + 1]) / samples for a in starts.tolist()], dtype=float
    )
