"""Dissipation in an RC snubber's resistor, from a measured node voltage or from Cs·V²·fsw.

The waveform method drives the nominal Rs–Cs branch with the measured node voltage and averages
Rs·i² over one switching period. It assumes that the probe measures the voltage across the whole
branch (node to the branch's reference), that Rs and Cs have their nominal values, and that the
record spans one switching period plus ``BRANCH_SETTLE_TIME_CONSTANTS``·Rs·Cs of branch start-up
(:func:`waveform_method_record_s`); a shorter record gets Cs·V²·fsw, which ignores the ring and
the partial discharge at light load. Scope noise reaches the resistor almost whole (its band lies
far above the branch's corner) and would read as loss; the noise level measured off the edges is
subtracted (:func:`noise_power_w`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Loss methods, as stored, and as shown beside a loss value.
WAVEFORM, CV2F = "waveform", "cv2f"
METHOD_LABELS = {WAVEFORM: "waveform", CV2F: "Cs·V²·fsw"}
#: Snubber branch start-up: decay time constants skipped before the loss window.
BRANCH_SETTLE_TIME_CONSTANTS = 5.0


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


def waveform_method_record_s(branch: SnubberBranch) -> float:
    """Shortest record for the waveform method: one switching period plus the branch's start-up
    (``BRANCH_SETTLE_TIME_CONSTANTS`` · Rs·Cs, after which the unknown initial charge of Cs has
    decayed below 1 %)."""
    return branch.period_s + BRANCH_SETTLE_TIME_CONSTANTS * branch.time_constant_s


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
    skips the first few τ. Power is (v − Vc)²/Rs; it includes the record's noise power (see
    :func:`noise_power_w`).
    """
    from scipy.signal import lfilter  # imported here: scipy.signal takes ~0.3 s to import

    v = np.asarray(volts, dtype=float)
    a, beta = _first_order_hold(sample_interval_s, branch.time_constant_s)
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


def _first_order_hold(sample_interval_s: float, tau_s: float) -> tuple[float, float]:
    """(a, β) of the branch's first-order-hold step (see :func:`branch_resistor_power_w`)."""
    a = math.exp(-sample_interval_s / tau_s)
    return a, tau_s * -math.expm1(-sample_interval_s / tau_s) / sample_interval_s


def noise_power_w(noise_rms_v: float, sample_interval_s: float, branch: SnubberBranch) -> float:
    """Mean power that white noise of ``noise_rms_v`` on the samples adds to the branch's Rs.

    The resistor's voltage is the node voltage minus the low-pass-filtered Vc, i.e. the node voltage
    through the high-pass filter 1 − H of the first-order-hold step. Its impulse response is
    g0 = β, gk = −β·(1 − a)·a^(k−1), so white noise of variance σ² gives σ²·Σg² = σ²·2β²/(1 + a)
    across Rs (close to σ²: the branch's corner 1/(2π·Rs·Cs) lies far below the noise band).
    """
    a, beta = _first_order_hold(sample_interval_s, branch.time_constant_s)
    return noise_rms_v**2 * 2 * beta**2 / (1 + a) / branch.rs_ohm
