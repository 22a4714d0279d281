"""Dissipation in an RC snubber's resistor, from a measured node voltage or from Cs·V²·fsw.

The waveform method drives the nominal Rs–Cs branch with the measured node voltage and averages
Rs·i² over one switching period. It assumes that the probe measures the voltage across the whole
branch (node to the branch's reference), that Rs and Cs have their nominal values, and that the
record spans one switching period plus ``BRANCH_SETTLE_TIME_CONSTANTS``·Rs·Cs of branch start-up
(:func:`waveform_method_record_s`); a shorter record gets Cs·V²·fsw, which ignores the ring and
the partial discharge at light load. Scope noise reaches the resistor almost whole (its band lies
far above the branch's corner) and would read as loss; the noise level measured off the edges is
subtracted (:func:`noise_power_w`). The analysis takes the loss from :func:`branch_period_means_w`,
which steps the branch through the record a block at a time and forms the power only inside the
loss windows, so a record of tens of millions of samples needs no record-long power array.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from labseq.analysis.levels import BLOCK_SAMPLES

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

    v = np.asarray(volts, dtype=float)
    run = _BranchRun(v, sample_interval_s, branch, marks=())
    return run.step(v.size)


def period_means_w(
    power_w: np.ndarray, sample_interval_s: float, t_starts_s: np.ndarray, period_s: float
) -> np.ndarray:
    """Mean of ``power_w`` over one period from each start time (times from the first sample).

    Each window is the whole number of samples nearest to the period, integrated by the
    trapezoidal rule; the rounding changes the window by at most half a sample.
    """
    p = np.asarray(power_w, dtype=float)
    starts, samples = _period_windows(p.size, sample_interval_s, t_starts_s, period_s)
    return np.array(
        [np.trapezoid(p[a : a + samples + 1]) / samples for a in starts.tolist()], dtype=float
    )


def branch_period_means_w(
    volts: np.ndarray, sample_interval_s: float, branch: SnubberBranch, t_starts_s: np.ndarray
) -> np.ndarray:
    """Mean power in Rs over one switching period from each start time, when the measured
    ``volts`` drives the branch: the figures of :func:`period_means_w` over
    :func:`branch_resistor_power_w`, without the record-long power array.

    The branch is stepped through the record a block of ``BLOCK_SAMPLES`` at a time, its
    filter state carried from block to block (which gives the very Vc of one pass), and the
    power is formed only inside the windows; its state at each window's start is kept for
    windows that overlap. A window longer than a block is integrated block by block, which
    changes its mean by rounding only.
    """
    starts, samples = _period_windows(volts.size, sample_interval_s, t_starts_s, branch.period_s)
    run = _BranchRun(volts, sample_interval_s, branch, marks=np.unique(starts))
    means = np.empty(starts.size)
    for k in np.argsort(starts, kind="stable").tolist():
        first = int(starts[k])
        stop = first + samples + 1
        run.seek(first)
        total, previous = 0.0, None
        while run.position < stop:
            power = run.step(min(stop, run.position + BLOCK_SAMPLES))
            joined = power if previous is None else np.concatenate(([previous], power))
            total += float(np.trapezoid(joined))
            previous = power[-1]
        means[k] = total / samples
    return means


def _period_windows(
    record_samples: int, sample_interval_s: float, t_starts_s: np.ndarray, period_s: float
) -> tuple[np.ndarray, int]:
    """First sample of each one-period window, and the window's length in intervals."""
    samples = max(1, round(period_s / sample_interval_s))
    if samples >= record_samples:
        raise ValueError(
            f"the record ({record_samples} samples) is shorter than one period ({samples})"
        )
    starts = np.clip(np.round(np.asarray(t_starts_s) / sample_interval_s).astype(int), 0, None)
    return np.minimum(starts, record_samples - 1 - samples), samples


class _BranchRun:
    """The Rs–Cs branch driven by a record, stepped forward from its first sample (see
    :func:`branch_resistor_power_w`); its state at each of the sorted sample indices ``marks``
    is kept as it passes them, so that it can go back there."""

    def __init__(
        self,
        volts: np.ndarray,
        sample_interval_s: float,
        branch: SnubberBranch,
        marks: np.ndarray | tuple[()],
    ) -> None:
        a, beta = _first_order_hold(sample_interval_s, branch.time_constant_s)
        self.coefficients = ([1.0 - beta, beta - a], [1.0, -a])
        self.volts, self.rs_ohm = volts, branch.rs_ohm
        self.marks = np.asarray(marks, dtype=int)
        self.position, self.state = 0, np.array([beta * float(volts[0])])
        self.kept: dict[int, np.ndarray] = {}

    def seek(self, index: int) -> None:
        """Go to sample ``index``: back to a state kept there, or forward a block at a time."""
        if index < self.position:
            self.position, self.state = index, self.kept[index]
        while self.position < index:
            self.step(min(index, self.position + BLOCK_SAMPLES))
        self.kept[index] = self.state

    def step(self, stop: int) -> np.ndarray:
        """Power in Rs from the current sample up to ``stop`` (not included), stepping there."""
        from scipy.signal import lfilter  # imported here: scipy.signal takes ~0.3 s to import

        inside = self.marks[(self.marks > self.position) & (self.marks < stop)].tolist()
        pieces = []
        for end in [*inside, stop]:
            v = np.asarray(self.volts[self.position : end], dtype=float)
            vc, self.state = lfilter(*self.coefficients, v, zi=self.state)
            power = np.subtract(v, vc, out=vc)  # in place: records run to millions of samples
            np.square(power, out=power)
            power *= 1.0 / self.rs_ohm
            pieces.append(power)
            self.position = end
            self.kept[end] = self.state  # at the marks, and at ``stop`` (a few per record)
        return pieces[0] if len(pieces) == 1 else np.concatenate(pieces)


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
