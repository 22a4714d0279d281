"""IEEE Std 181 levels, reference instants, overshoot and settling on steps with known answers."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from labseq.analysis import analyze_capture, histogram_state_levels
from labseq.analysis.levels import last_band_entry, last_upward_crossing, state_changes

FS = 1e9
DT = 1 / FS


def first_order_step(
    tau_s: float, n: int = 4000, pre: int = 500, top_v: float = 10.0
) -> np.ndarray:
    """0 V, then ``top_v·(1 − exp(−t/τ))`` from sample ``pre`` on."""
    t = (np.arange(n) - pre) * DT
    return np.where(t < 0, 0.0, top_v * -np.expm1(-np.clip(t, 0, None) / tau_s))


def second_order_step(t_s: np.ndarray, zeta: float, fn_hz: float) -> np.ndarray:
    """Unit step response of an underdamped second-order system (closed form), 0 before t = 0."""
    wn = 2 * math.pi * fn_hz
    wd = wn * math.sqrt(1 - zeta**2)
    tc = np.clip(t_s, 0, None)
    phi = math.acos(zeta)
    y = 1 - np.exp(-zeta * wn * tc) * np.sin(wd * tc + phi) / math.sqrt(1 - zeta**2)
    return np.where(t_s < 0, 0.0, y)


def test_histogram_levels_of_a_noisy_pulse_train() -> None:
    rng = np.random.default_rng(3)
    x = np.tile(np.r_[np.full(300, 2.0), np.full(700, 48.0)], 20) + rng.normal(0, 0.3, 20000)
    low, high = histogram_state_levels(x)
    # IEEE Std 181-2011 5.2.1.3: state levels are the modes of the two histogram halves.
    assert low == pytest.approx(2.0, abs=0.05)
    assert high == pytest.approx(48.0, abs=0.05)


def test_first_order_step_rise_and_settling() -> None:
    tau = 20e-9
    figures = analyze_capture(first_order_step(tau), DT, -500 * DT)
    edge = figures.worst
    # IEEE Std 181-2011 5.3.3: 10-90 % transition duration of an exponential is τ·ln 9.
    assert edge.rise_time_s == pytest.approx(tau * math.log(9), rel=0.01)
    # Mid-reference (50 %) instant: τ·ln 2 after the start.
    assert edge.edge_time_s == pytest.approx(tau * math.log(2), rel=0.01)
    # IEEE Std 181-2011 5.7: settling into ±5 % ends at 95 %, τ·ln 20, i.e. τ·ln 10 after 50 %.
    assert edge.settling_time_s == pytest.approx(tau * math.log(10), rel=0.02)
    assert edge.overshoot_pct == pytest.approx(0.0, abs=0.1)  # no overshoot: monotonic step
    assert edge.ring_frequency_hz is None  # no oscillation to fit


@pytest.mark.parametrize("zeta", [0.1, 0.25, 0.45])
def test_second_order_step_overshoot_and_settling(zeta: float) -> None:
    fn = 10e6
    t = (np.arange(20000) - 1000) * DT
    volts = 5.0 + 100.0 * second_order_step(t, zeta, fn)
    edge = analyze_capture(volts, DT, t[0], settling_band=0.02).worst
    # Second-order step overshoot exp(−πζ/√(1−ζ²)) (Ogata, Modern Control Engineering, 5-3).
    expected_pct = 100 * math.exp(-math.pi * zeta / math.sqrt(1 - zeta**2))
    assert edge.overshoot_pct == pytest.approx(expected_pct, abs=0.2)
    assert edge.base_v == pytest.approx(5.0, abs=0.05)
    assert edge.plateau_v == pytest.approx(105.0, abs=0.1)
    # Reference instants found with brentq on the closed form (scipy), not on samples.
    t50 = brentq(lambda x: second_order_step(np.array([x]), zeta, fn)[0] - 0.5, 0, 0.5 / fn)
    assert edge.edge_time_s == pytest.approx(t50, abs=0.02 * DT + 1e-12)
    # IEEE Std 181-2011 5.7: last entry into ±2 % of the step, from a 100× denser grid.
    fine = np.linspace(0, 2e-5 - 1000 * DT, 2_000_000)
    outside = np.abs(second_order_step(fine, zeta, fn) - 1) > 0.02
    t_settle = fine[np.flatnonzero(outside)[-1] + 1]
    assert edge.settling_time_s == pytest.approx(t_settle - t50, abs=2 * DT)
    # The ring itself: ωd and ζ of the pole pair (second-order system, Ogata 5-3).
    assert edge.ring_frequency_hz == pytest.approx(fn * math.sqrt(1 - zeta**2), rel=0.002)
    assert edge.damping_ratio == pytest.approx(zeta, rel=0.01)


def test_hysteresis_ignores_ringing_between_the_references() -> None:
    v = np.r_[np.zeros(10), np.full(10, 10.0), np.full(5, 5.0), np.full(5, 9.5), np.full(5, 0.5)]
    changes = state_changes(v, 1.0, 9.0)
    # IEEE Std 181-2011 5.2: a state is left only when the other state's reference is crossed.
    assert changes.rise_from.tolist() == [9] and changes.rise_to.tolist() == [10]
    assert changes.fall_from.tolist() == [29] and changes.fall_to.tolist() == [30]


def test_crossing_and_band_entry_interpolate_linearly() -> None:
    v = np.array([0.0, 0.0, 4.0, 8.0, 12.0, 11.0, 10.4, 10.0])
    # IEEE Std 181-2011 5.3.3: linear interpolation between the samples that straddle the level.
    assert last_upward_crossing(v, 5.0, 0, v.size) == pytest.approx(2.25)
    # Band 10 ± 0.5: last outside sample is index 5 (11.0), enters on 10.5 at 5 + 0.5/0.6.
    assert last_band_entry(v, 10.0, 0.5, 0, v.size) == pytest.approx(5 + 0.5 / 0.6)
    assert last_band_entry(v[:6], 10.0, 0.5, 0, 6) is None  # ends outside: not settled


def test_state_levels_survive_a_ring_that_overshoots_by_the_whole_step():
    # A CCM switch node: 40 % of each period on (0 V), 60 % off at a 61 V plateau, an
    # under-damped ring (ζ = 0.06, 20 MHz, 75 V) that reaches about twice the plateau. The middle of
    # the range then lies above the plateau, so IEEE 181's midpoint split would put both states
    # in its lower half; with Otsu's split (Otsu, IEEE Trans. SMC 1979) the modes are the true
    # state levels, which IEEE Std 181-2011 5.2.1.3 defines as the histogram modes.
    dt, period = 1e-9, 5e-6
    t = np.arange(20_000) * dt
    phase = np.mod(t, period)
    off = phase >= 0.4 * period
    tau = phase - 0.4 * period
    zeta, f = 0.06, 20e6
    ring = 75.0 * np.exp(-zeta * 2 * np.pi * f * tau) * np.sin(2 * np.pi * f * tau)
    v = np.where(off, 61.0 + ring, 0.0)
    v = np.round(v / (250 / 256)) * (250 / 256)  # 8-bit steps over 250 V
    assert 0.5 * (v.max() + v.min()) > 61.0  # the middle of the range is above the plateau
    low, high = histogram_state_levels(v)
    assert low == pytest.approx(0.0, abs=1.0)
    assert high == pytest.approx(61.0, abs=1.0)
